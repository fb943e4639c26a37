"""Functional series that resamples once: per-volume motion composed with the correction.

The gradient-nonlinearity distortion is fixed in the scanner frame, so one
correction field (on the raw grid grown by a margin) serves every volume.
Head motion is estimated between *corrected* volumes (antspyx rigid
registration of each to the first); then, for each volume, its motion
affine is composed with the correction and the raw volume is resampled once,
its intensities multiplied by the correction's Jacobian determinant at each
voxel's corrected-space position (``--no-jacobian`` leaves the factor out).

Run::

    python workflows/functional.py OUTDIR                       # fictional demo data
    python workflows/functional.py OUTDIR --bold BOLD.nii.gz --coil COIL.json \\
        [--isocenter-offset DX DY DZ]

Needs antspyx. Demo data are FICTIONAL (synthetic phantom, demo gradient system).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from nipype.interfaces import utility as niu
from nipype.pipeline import engine as pe

sys.path.insert(0, str(Path(__file__).resolve().parent))

from morphometry import node_results, rigid, write_distorted_series  # noqa: E402

from nl_unwarp.demo import demo_coil_path  # noqa: E402
from nl_unwarp.interfaces.compose import MakeComposableField  # noqa: E402
from nl_unwarp.interfaces.warp import ApplyWarp  # noqa: E402
from nl_unwarp.workflows.resample_once import init_series_resample_once_wf  # noqa: E402

DEMO_SHAPE = (36, 40, 30)
DEMO_VOXEL_MM = 5.0
DEMO_ISOCENTER_OFFSET_MM = (0.0, 0.0, 40.0)
#: Head poses of the demo volumes (pull maps from the first volume's frame).
DEMO_MOTION = [
    {"angles_deg": (0.0, 0.0, 0.0), "translation_mm": (0.0, 0.0, 0.0)},
    {"angles_deg": (2.0, 0.0, -1.5), "translation_mm": (1.5, -1.0, 2.0)},
    {"angles_deg": (-1.0, 2.5, 1.0), "translation_mm": (-2.0, 1.0, -1.5)},
]


def estimate_motion(series: str) -> list:
    """Rigid transforms (antspyx) from volume 0 to each volume, as ITK .mat files (pull maps).

    Volume 0 gets the identity (written as an affine file too).
    """
    import os

    import ants
    import nibabel as nib
    import numpy as np

    from nl_unwarp.io.atomic import OutputSet
    from nl_unwarp.io.transforms import write_itk_affine

    img = nib.load(series)
    data = np.asarray(img.dataobj, np.float32)

    def volume(t):
        path = os.path.abspath(f"volume_{t:03d}.nii.gz")
        vol = nib.Nifti1Image(data[..., t], img.affine)
        vol.set_qform(img.affine, code=1)
        vol.set_sform(img.affine, code=1)
        nib.save(vol, path)
        return ants.image_read(path)

    reference = volume(0)
    out = []
    for t in range(data.shape[3]):
        path = os.path.abspath(f"motion_{t:03d}.mat")
        if t == 0:
            with OutputSet() as sink:
                write_itk_affine(sink, path, np.eye(4))
        else:
            # Dense metric sampling: reproducible (random sampling is not, across threads).
            result = ants.registration(fixed=reference, moving=volume(t), type_of_transform="Rigid",
                                       aff_random_sampling_rate=1.0, random_seed=1)
            ants.write_transform(ants.read_transform(result["fwdtransforms"][0]), path)
        out.append(path)
    return out


def init_functional_wf(*, order: int = 3, jacobian: bool = True, write_fields: bool = False,
                       name: str = "functional_wf") -> pe.Workflow:
    """Motion and distortion correction of a series in one resampling per volume.

    Parameters
    ----------
    order : int
        B-spline order of the single resampling.
    jacobian : bool
        Multiply by the correction's Jacobian determinant (intensity preservation).
    write_fields : bool
        Also write one composed displacement field per volume.
    name : str

    Inputs
    ------
    bold
        Raw 4-D series.
    coil_model
        Coil model file.
    isocenter_offset_mm
        Device coordinates (mm) of the world origin.

    Outputs
    -------
    bold_once
        The series corrected for distortion and motion (volume 0's frame, raw grid).
    motion
        Per-volume rigid transforms (volume 0 -> volume t).
    correction_field
        Our correction, covering the raw field of view with a margin.
    composed_fields
        One composed field per volume (``write_fields``).
    """
    wf = pe.Workflow(name=name)
    inputnode = pe.Node(niu.IdentityInterface(["bold", "coil_model", "isocenter_offset_mm"]),
                        name="inputnode")
    outputnode = pe.Node(niu.IdentityInterface(["bold_once", "motion", "correction_field",
                                                "composed_fields"]), name="outputnode")
    field = pe.Node(MakeComposableField(), name="correction_field")
    corrected = pe.Node(ApplyWarp(jacobian=False), name="corrected")
    motion = pe.Node(niu.Function(function=estimate_motion, input_names=["series"],
                                  output_names=["transforms"]), name="motion")
    once = init_series_resample_once_wf(order=order, write_fields=write_fields)
    if jacobian:
        wf.connect(field, "out_jacobian", once, "inputnode.jacobian_map")
    wf.connect([
        (inputnode, field, [("bold", "reference"), ("coil_model", "coil_model"),
                            ("isocenter_offset_mm", "isocenter_offset_mm")]),
        (inputnode, corrected, [("bold", "in_file")]),
        (field, corrected, [("out_field", "field")]),
        (corrected, motion, [("out_file", "series")]),
        (inputnode, once, [("bold", "inputnode.in_file"), ("bold", "inputnode.reference")]),
        (motion, once, [("transforms", "inputnode.motion_transforms")]),
        (field, once, [("out_field", "inputnode.correction_field")]),
        (once, outputnode, [("outputnode.out_file", "bold_once"),
                            ("outputnode.composed_fields", "composed_fields")]),
        (motion, outputnode, [("transforms", "motion")]),
        (field, outputnode, [("out_field", "correction_field")]),
    ])
    return wf


def make_demo_inputs(outdir: str | Path, *, shape=DEMO_SHAPE, voxel_mm: float = DEMO_VOXEL_MM) -> dict:
    """Write a fictional distorted series with known head motion; return the workflow inputs."""
    outdir = Path(outdir).resolve()
    bold = write_distorted_series(outdir / "sub-demo_task-rest_bold.nii.gz",
                                  [rigid(**pose) for pose in DEMO_MOTION], shape=shape, voxel_mm=voxel_mm,
                                  centre_mm=(0.0, -5.0, 10.0), isocenter_offset_mm=DEMO_ISOCENTER_OFFSET_MM)
    return {"bold": str(bold), "coil_model": str(demo_coil_path()),
            "isocenter_offset_mm": list(DEMO_ISOCENTER_OFFSET_MM)}


def run(outdir: str | Path, inputs: dict, *, order: int = 3, jacobian: bool = True,
        write_fields: bool = False) -> dict:
    """Build and run the pipeline in ``outdir``; returns the output paths."""
    wf = init_functional_wf(order=order, jacobian=jacobian, write_fields=write_fields)
    wf.base_dir = str(Path(outdir).resolve() / "work")
    for key, value in inputs.items():
        setattr(wf.inputs.inputnode, key, value)
    results = node_results(wf.run())
    out = {"bold_once": results["resample"].out_file, "motion": results["motion"].transforms,
           "correction_field": results["correction_field"].out_field,
           "correction_jacobian": results["correction_field"].out_jacobian}
    if write_fields:
        out["composed_fields"] = results["compose"].out_field
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("outdir")
    parser.add_argument("--bold")
    parser.add_argument("--coil")
    parser.add_argument("--isocenter-offset", nargs=3, type=float, metavar=("DX", "DY", "DZ"))
    parser.add_argument("--order", type=int, default=3)
    parser.add_argument("--no-jacobian", action="store_true",
                        help="do not multiply by the correction's Jacobian determinant")
    parser.add_argument("--write-fields", action="store_true",
                        help="also write one composed displacement field per volume")
    args = parser.parse_args(argv)
    if args.bold:
        if not args.coil:
            parser.error("--bold needs --coil")
        inputs = {"bold": args.bold, "coil_model": args.coil}
        if args.isocenter_offset:
            inputs["isocenter_offset_mm"] = list(args.isocenter_offset)
    else:
        print("functional: FICTIONAL demo data (synthetic series, demo gradient system)")
        inputs = make_demo_inputs(args.outdir)
    for key, value in run(args.outdir, inputs, order=args.order, jacobian=not args.no_jacobian,
                          write_fields=args.write_fields).items():
        print(f"{key:18s} {value}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
