"""Morphometry that resamples once: correct a T1w, register it to a template, resample once.

The gradient-nonlinearity correction is computed on the raw T1w's grid grown
by a margin, applied once to make the image that is registered to the
template (antspyx), then composed with the registration transforms so that
the raw T1w is resampled onto the template exactly once, its intensities
multiplied by the correction's Jacobian determinant at each template voxel's
corrected-space position (as correcting with the factor and then registering
would). ``--no-jacobian`` leaves the factor out.

Run::

    python workflows/morphometry.py OUTDIR                      # fictional demo data
    python workflows/morphometry.py OUTDIR --t1w T1w.nii.gz --coil COIL.json \
        --template TEMPLATE.nii.gz [--isocenter-offset DX DY DZ] [--registration SyN]

Without ``--t1w`` the run uses an embedded synthetic template and a synthetic
T1w distorted with nl_unwarp's FICTIONAL demo gradient system. Needs antspyx.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
from nipype.interfaces import utility as niu
from nipype.pipeline import engine as pe

from nl_unwarp.demo import demo_coil_path
from nl_unwarp.frames import DeviceFrame
from nl_unwarp.interfaces.compose import MakeComposableField
from nl_unwarp.interfaces.warp import ApplyWarp
from nl_unwarp.io.atomic import OutputSet
from nl_unwarp.io.coilfile import load_coil
from nl_unwarp.io.nifti import write_image
from nl_unwarp.phantom import forward_simulate
from nl_unwarp.workflows.resample_once import init_resample_once_wf

#: Demo geometry: a T1w-like raw grid off the gradient isocenter.
DEMO_SHAPE = (48, 56, 48)
DEMO_VOXEL_MM = 4.0
DEMO_ISOCENTER_OFFSET_MM = (0.0, 10.0, 50.0)
#: The demo subject's head pose relative to the template (pull map parameters).
DEMO_POSE = {"angles_deg": (4.0, -3.0, 5.0), "translation_mm": (3.0, -4.0, 2.0)}


class HeadPhantom:
    """Smooth ellipsoidal "head" with an inner "brain" and a plane-wave texture (RAS mm)."""

    def __init__(self, *, radii_mm=(70.0, 85.0, 75.0), texture_mm=(14.0, 22.0), seed: int = 3) -> None:
        rng = np.random.default_rng(seed)
        self.radii = np.asarray(radii_mm, float)
        self.waves = [(v / np.linalg.norm(v), rng.uniform(*texture_mm), rng.uniform(0, 2 * np.pi))
                      for v in rng.normal(size=(5, 3))]

    def intensity(self, points_ras_mm: np.ndarray) -> np.ndarray:
        pts = np.asarray(points_ras_mm, float)
        r = np.linalg.norm(pts / self.radii, axis=-1)
        head = 0.5 * (1 - np.tanh((r - 1.0) / 0.04))
        brain = 0.5 * (1 - np.tanh((r - 0.8) / 0.04))
        tex = sum(np.cos(2 * np.pi * (pts @ d) / w + p) for d, w, p in self.waves)
        return 40.0 * head + 60.0 * brain + 8.0 * brain * tex


def centred_affine(shape, voxel_mm: float, centre_mm=(0.0, 0.0, 0.0)) -> np.ndarray:
    aff = np.diag([voxel_mm] * 3 + [1.0])
    aff[:3, 3] = np.asarray(centre_mm, float) - voxel_mm * (np.asarray(shape) - 1) / 2
    return aff


def rigid(angles_deg=(0.0, 0.0, 0.0), translation_mm=(0.0, 0.0, 0.0)) -> np.ndarray:
    """4 x 4 rotation (about x, then y, then z) and translation, RAS mm."""
    ax, ay, az = np.deg2rad(angles_deg)
    rx = np.array([[1, 0, 0], [0, np.cos(ax), -np.sin(ax)], [0, np.sin(ax), np.cos(ax)]])
    ry = np.array([[np.cos(ay), 0, np.sin(ay)], [0, 1, 0], [-np.sin(ay), 0, np.cos(ay)]])
    rz = np.array([[np.cos(az), -np.sin(az), 0], [np.sin(az), np.cos(az), 0], [0, 0, 1]])
    m = np.eye(4)
    m[:3, :3] = rz @ ry @ rx
    m[:3, 3] = translation_mm
    return m


class _Moved:
    """The phantom seen after a head motion: ``I(x) = f(M x)`` (M a pull map)."""

    def __init__(self, phantom: HeadPhantom, pull: np.ndarray) -> None:
        self.phantom, self.pull = phantom, pull

    def intensity(self, points_ras_mm):
        pts = np.asarray(points_ras_mm, float)
        return self.phantom.intensity(pts @ self.pull[:3, :3].T + self.pull[:3, 3])


def write_template(path: str | Path, *, shape, voxel_mm: float) -> Path:
    """The phantom, undistorted, on a template grid."""
    aff = centred_affine(shape, voxel_mm)
    ijk = np.stack(np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij"), -1)
    data = HeadPhantom().intensity(ijk @ aff[:3, :3].T + aff[:3, 3]).astype(np.float32)
    with OutputSet() as out:
        write_image(out, path, data, aff)
    return Path(path)


def write_distorted_series(path: str | Path, pulls, *, shape, voxel_mm: float, centre_mm,
                           isocenter_offset_mm) -> Path:
    """Raw images as a linear-gradient scanner with the demo coil makes them.

    One volume per head pose (``pulls``: pose pull maps, world RAS mm); a
    single pose gives a 3-D image.
    """
    coil = load_coil(demo_coil_path())
    frame = DeviceFrame("HFS", isocenter_offset_mm)
    aff = centred_affine(shape, voxel_mm, centre_mm)
    vols = [forward_simulate(_Moved(HeadPhantom(), p), lambda r: coil.encode(r, jacobian=False)[0],
                             tuple(shape), aff, frame) for p in pulls]
    data = (vols[0] if len(vols) == 1 else np.stack(vols, -1)).astype(np.float32)
    with OutputSet() as out:
        write_image(out, path, data, aff)
    return Path(path)


def register(fixed: str, moving: str, transform_type: str = "Affine") -> list:
    """antspyx registration of ``moving`` to ``fixed``; transforms from fixed to moving,
    in application order (antspyx ``fwdtransforms``), copied into the node folder."""
    import os
    import shutil

    import ants

    # Dense metric sampling: reproducible (random sampling is not, across threads).
    result = ants.registration(fixed=ants.image_read(fixed), moving=ants.image_read(moving),
                               type_of_transform=transform_type, aff_random_sampling_rate=1.0,
                               random_seed=1)
    out = []
    for k, path in enumerate(result["fwdtransforms"]):
        suffix = ".nii.gz" if path.endswith(".nii.gz") else os.path.splitext(path)[1]
        name = f"registration_{k}{suffix}"
        shutil.copy(path, os.path.abspath(name))
        out.append(os.path.abspath(name))
    return out


def init_morphometry_wf(*, registration: str = "Affine", order: int = 3, jacobian: bool = True,
                        write_field: bool = False, name: str = "morphometry_wf") -> pe.Workflow:
    """Correct, register to a template, and resample the raw T1w once.

    Parameters
    ----------
    registration : str
        antspyx ``type_of_transform`` (``Affine``, ``SyN``, ...).
    order : int
        B-spline order of the single resampling.
    jacobian : bool
        Multiply by the correction's Jacobian determinant (intensity preservation).
    write_field : bool
        Also write the composed displacement field on the template grid.
    name : str

    Inputs
    ------
    t1w
        Raw (distorted) T1w image.
    coil_model
        Coil model file.
    template
        Template image (target grid).
    isocenter_offset_mm
        Device coordinates (mm) of the world origin.

    Outputs
    -------
    t1w_template
        The raw T1w resampled once onto the template.
    composed_field, composite
        Composed displacement field (template grid, with ``write_field``) and the
        un-folded ITK composite.
    correction_field
        Our correction, covering the raw field of view with a margin.
    registration
        The registration transforms (template -> corrected T1w).
    """
    wf = pe.Workflow(name=name)
    inputnode = pe.Node(niu.IdentityInterface(["t1w", "coil_model", "template", "isocenter_offset_mm"]),
                        name="inputnode")
    outputnode = pe.Node(niu.IdentityInterface(["t1w_template", "composed_field", "composite",
                                                "correction_field", "registration"]),
                         name="outputnode")
    field = pe.Node(MakeComposableField(), name="correction_field")
    # The corrected image is only for registration (on the raw grid, no Jacobian).
    corrected = pe.Node(ApplyWarp(jacobian=False), name="corrected")
    reg = pe.Node(niu.Function(function=register, input_names=["fixed", "moving", "transform_type"],
                               output_names=["transforms"]), name="register")
    reg.inputs.transform_type = registration
    once = init_resample_once_wf(order=order, write_field=write_field)
    if jacobian:
        wf.connect(field, "out_jacobian", once, "inputnode.jacobian_map")
    wf.connect([
        (inputnode, field, [("t1w", "reference"), ("coil_model", "coil_model"),
                            ("isocenter_offset_mm", "isocenter_offset_mm")]),
        (inputnode, corrected, [("t1w", "in_file")]),
        (field, corrected, [("out_field", "field")]),
        (inputnode, reg, [("template", "fixed")]),
        (corrected, reg, [("out_file", "moving")]),
        (inputnode, once, [("t1w", "inputnode.in_file"), ("template", "inputnode.reference")]),
        (reg, once, [("transforms", "inputnode.transforms")]),
        (field, once, [("out_field", "inputnode.correction_field")]),
        (once, outputnode, [("outputnode.out_file", "t1w_template"),
                            ("outputnode.composed_field", "composed_field"),
                            ("outputnode.composite", "composite")]),
        (field, outputnode, [("out_field", "correction_field")]),
        (reg, outputnode, [("transforms", "registration")]),
    ])
    return wf


def make_demo_inputs(outdir: str | Path, *, shape=DEMO_SHAPE, voxel_mm: float = DEMO_VOXEL_MM) -> dict:
    """Write the fictional template and distorted T1w; return the workflow inputs."""
    outdir = Path(outdir).resolve()
    template = write_template(outdir / "template.nii.gz", shape=shape, voxel_mm=voxel_mm)
    t1w = write_distorted_series(outdir / "sub-demo_T1w.nii.gz", [rigid(**DEMO_POSE)], shape=shape,
                                 voxel_mm=voxel_mm, centre_mm=(2.0, -3.0, 1.0),
                                 isocenter_offset_mm=DEMO_ISOCENTER_OFFSET_MM)
    return {"t1w": str(t1w), "template": str(template), "coil_model": str(demo_coil_path()),
            "isocenter_offset_mm": list(DEMO_ISOCENTER_OFFSET_MM)}


def run(outdir: str | Path, inputs: dict, *, registration: str = "Affine", order: int = 3,
        jacobian: bool = True, write_field: bool = False) -> dict:
    """Build and run the pipeline in ``outdir``; returns the output paths."""
    wf = init_morphometry_wf(registration=registration, order=order, jacobian=jacobian,
                             write_field=write_field)
    wf.base_dir = str(Path(outdir) / "work")
    for key, value in inputs.items():
        setattr(wf.inputs.inputnode, key, value)
    results = node_results(wf.run())
    out = {"t1w_template": results["resample"].out_file,
           "composite": results["compose"].out_composite,
           "correction_field": results["correction_field"].out_field,
           "correction_jacobian": results["correction_field"].out_jacobian,
           "registration": results["register"].transforms}
    if write_field:
        out["composed_field"] = results["compose"].out_field
    return out


def node_results(graph) -> dict:
    """Outputs of the executed nodes by name (nipype drops identity nodes from the run graph)."""
    return {node.name: node.result.outputs for node in graph.nodes()}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("outdir")
    parser.add_argument("--t1w")
    parser.add_argument("--coil")
    parser.add_argument("--template")
    parser.add_argument("--isocenter-offset", nargs=3, type=float, metavar=("DX", "DY", "DZ"))
    parser.add_argument("--registration", default="Affine")
    parser.add_argument("--order", type=int, default=3)
    parser.add_argument("--no-jacobian", action="store_true",
                        help="do not multiply by the correction's Jacobian determinant")
    parser.add_argument("--write-field", action="store_true",
                        help="also write the composed displacement field on the template grid")
    args = parser.parse_args(argv)
    if args.t1w:
        if not (args.coil and args.template):
            parser.error("--t1w needs --coil and --template")
        inputs = {"t1w": args.t1w, "coil_model": args.coil, "template": args.template}
        if args.isocenter_offset:
            inputs["isocenter_offset_mm"] = list(args.isocenter_offset)
    else:
        print("morphometry: FICTIONAL demo data (synthetic template and T1w, demo gradient system)")
        inputs = make_demo_inputs(args.outdir)
    for key, value in run(args.outdir, inputs, registration=args.registration, order=args.order,
                          jacobian=not args.no_jacobian, write_field=args.write_field).items():
        print(f"{key:18s} {value}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
