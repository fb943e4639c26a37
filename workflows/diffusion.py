#!/usr/bin/env python
"""Diffusion run: correct a DWI series' geometry and give its true diffusion weighting.

1. The warp of the gradient system is computed on the DWI grid and the whole
   series resampled once through it (all volumes with one field: the
   distortion is fixed in the scanner frame).
2. On the same (corrected) grid, the coil tensor L is computed in the frame of
   the bvec file, with the b-value deviation per shell, a mask-averaged
   effective b-table and, optionally, per-voxel b-values and b-vectors.
3. The corrected series keeps its nominal bval/bvec: the geometric
   correction moves signal but does not change the gradients that encoded it
   (``docs/diffusion.md``); the tensor carries the weighting's error.

Run::

    python workflows/diffusion.py OUTDIR                                   # fictional demo data
    python workflows/diffusion.py OUTDIR --dwi DWI.nii.gz --bval DWI.bval --bvec DWI.bvec \\
        --coil COIL.json [--position HFS] [--table-position TP1 TP2 TP3] [--voxel-tables]

The demo simulates an isotropic medium (ADC 1e-3 mm^2/s) seen through the FICTIONAL demo
gradient system 6 cm off the isocenter, runs the pipeline, and fits the mean diffusivity with
dipy at sampled voxels, with the nominal table and with the per-voxel tables. Needs dipy for
that last step. For research pipelines only: not for diagnosis.
"""

from __future__ import annotations

import argparse
import json
import shutil
from pathlib import Path

from nipype.interfaces import utility as niu
from nipype.pipeline import engine as pe

from nl_unwarp.demo import demo_coil_path
from nl_unwarp.interfaces.diffusion import DiffusionWeighting
from nl_unwarp.interfaces.warp import ApplyWarp, MakeWarp

DEMO_SHAPE = (24, 24, 18)
DEMO_VOXEL_MM = 8.0
#: The isotropic medium: a ball in the middle of the grid, and its diffusivity.
DEMO_RADIUS_MM = 80.0
DEMO_ADC_MM2_PER_S = 1.0e-3
#: Table moved 6 cm: the isocenter sits 6 cm from the grid centre along z.
DEMO_TABLE_POSITION_MM = (0.0, 0.0, 60.0)
DEMO_DIRECTIONS, DEMO_BVAL = 12, 1000.0
PRODUCTS = ["corrected", "field", "tensor", "tensor_sidecar", "deviation", "summary", "mean_bval",
            "mean_bvec", "voxel_bvals", "voxel_bvecs"]
FRAME_INPUTS = ["patient_position", "table_position_mm", "isocenter_offset_mm"]


def init_diffusion_pipeline_wf(*, voxel_tables: bool = False, order: int = 3,
                               name: str = "diffusion_pipeline_wf") -> pe.Workflow:
    """Correct a DWI series once and compute its coil tensor and effective b-tables.

    Inputs: ``in_file``, ``bval``, ``bvec``, ``coil_model``, ``patient_position``,
    ``table_position_mm``, ``isocenter_offset_mm``. Outputs: :data:`PRODUCTS`.
    """
    workflow = pe.Workflow(name=name)
    inputnode = pe.Node(niu.IdentityInterface(fields=["in_file", "bval", "bvec", "coil_model",
                                                      *FRAME_INPUTS]), name="inputnode")
    outputnode = pe.Node(niu.IdentityInterface(fields=PRODUCTS), name="outputnode")
    make_warp = pe.Node(MakeWarp(), name="make_warp")
    apply = pe.Node(ApplyWarp(order=order), name="apply_warp")
    weighting = pe.Node(DiffusionWeighting(voxel_tables=voxel_tables), name="weighting")
    frame = [(f, f) for f in FRAME_INPUTS]
    workflow.connect([
        (inputnode, make_warp, [("in_file", "reference"), ("coil_model", "coil_model"), *frame]),
        (inputnode, apply, [("in_file", "in_file")]),
        (make_warp, apply, [("out_field", "field"), ("out_jacobian", "jacobian_map")]),
        (inputnode, weighting, [("in_file", "in_file"), ("bval", "in_bval"), ("bvec", "in_bvec"),
                                ("coil_model", "coil_model"), *frame]),
        (apply, outputnode, [("out_file", "corrected")]),
        (make_warp, outputnode, [("out_field", "field")]),
        (weighting, outputnode, [(f"out_{p}", p) for p in PRODUCTS[2:]]),
    ])
    return workflow


def write_demo(folder: Path) -> dict:
    """Simulate the demo DWI (geometry and weighting distorted by the demo coil); returns inputs."""
    import nibabel as nib
    import numpy as np

    from nl_unwarp.frames import DeviceFrame, offset_from_table_position
    from nl_unwarp.io.bvals import ras_from_bvec_frame
    from nl_unwarp.io.coilfile import load_coil
    from nl_unwarp.phantom import Phantom, forward_simulate

    folder.mkdir(parents=True, exist_ok=True)
    coil = load_coil(demo_coil_path())
    frame = DeviceFrame("HFS", offset_from_table_position(DEMO_TABLE_POSITION_MM))
    affine = np.diag([DEMO_VOXEL_MM] * 3 + [1.0])
    affine[:3, 3] = -DEMO_VOXEL_MM * (np.asarray(DEMO_SHAPE) - 1) / 2
    rng = np.random.default_rng(20260503)
    dirs = rng.normal(size=(DEMO_DIRECTIONS, 3))
    bvecs = np.vstack([np.zeros((2, 3)), dirs / np.linalg.norm(dirs, axis=1, keepdims=True)])
    bvals = np.r_[0.0, 0.0, np.full(DEMO_DIRECTIONS, DEMO_BVAL)]
    ball = Phantom(radius_mm=DEMO_RADIUS_MM, marker_spacing_mm=1e3, marker_radius_mm=1.0,
                   marker_extent_mm=0.0, edge_mm=4.0)
    q = frame.device_from_ras @ ras_from_bvec_frame(affine)

    class Weighted:
        """The ball's intensity times the attenuation under the applied gradient."""

        def __init__(self, b, g):
            self.b, self.g_dev = b, q @ g

        def intensity(self, points_ras):
            _, jac = coil.encode(frame.to_device(points_ras))
            applied = np.einsum("...ck,c->...k", jac, self.g_dev)
            attenuation = np.exp(-self.b * np.sum(applied**2, -1) * DEMO_ADC_MM2_PER_S)
            return ball.intensity(points_ras) * attenuation

    volumes = []
    for b, g in zip(bvals, bvecs, strict=True):
        volumes.append(forward_simulate(Weighted(b, g), lambda r: coil.encode(r, jacobian=False)[0],
                                        DEMO_SHAPE, affine, frame))
    img = nib.Nifti1Image(np.stack(volumes, -1).astype(np.float32), affine)
    img.set_qform(affine, code=1)
    img.set_sform(affine, code=1)
    paths = {"in_file": folder / "dwi.nii.gz", "bval": folder / "dwi.bval", "bvec": folder / "dwi.bvec"}
    nib.save(img, str(paths["in_file"]))
    paths["bval"].write_text(" ".join(f"{v:g}" for v in bvals) + "\n")
    paths["bvec"].write_text("".join(" ".join(f"{v:.8f}" for v in row) + "\n" for row in bvecs.T))
    return {k: str(v) for k, v in paths.items()}


def md_check(corrected: str, bval: str, bvec: str, voxel_bvals: str, voxel_bvecs: str, *,
             samples: int = 200, seed: int = 0) -> dict:
    """dipy mean diffusivity at sampled voxels inside the ball: nominal vs per-voxel tables."""
    import nibabel as nib
    import numpy as np
    from dipy.core.gradients import gradient_table
    from dipy.reconst.dti import TensorModel

    from nl_unwarp.io.bvals import read_bvals, read_bvecs

    data = nib.load(corrected).get_fdata()
    b_vox, g_vox = nib.load(voxel_bvals).dataobj, nib.load(voxel_bvecs).dataobj
    bvals, bvecs = read_bvals(bval), read_bvecs(bvec)
    inside = np.argwhere(data[..., 0] > 0.9 * np.percentile(data[..., 0], 99))
    pick = inside[np.random.default_rng(seed).choice(len(inside), min(samples, len(inside)), replace=False)]
    nominal, corrected_md = [], []
    model = TensorModel(gradient_table(bvals, bvecs=bvecs))
    for i, j, k in pick:
        signal = data[i, j, k]
        nominal.append(model.fit(signal).md)
        gtab = gradient_table(np.asarray(b_vox[i, j, k], float), bvecs=np.asarray(g_vox[i, j, k], float))
        corrected_md.append(TensorModel(gtab).fit(signal).md)
    nominal, corrected_md = np.array(nominal), np.array(corrected_md)
    return {"voxels": len(pick), "truth_mm2_per_s": DEMO_ADC_MM2_PER_S,
            "nominal_max_rel_error": float(np.abs(nominal / DEMO_ADC_MM2_PER_S - 1).max()),
            "corrected_max_rel_error": float(np.abs(corrected_md / DEMO_ADC_MM2_PER_S - 1).max()),
            "nominal_median_rel_error": float(np.median(nominal / DEMO_ADC_MM2_PER_S - 1)),
            "corrected_median_rel_error": float(np.median(corrected_md / DEMO_ADC_MM2_PER_S - 1))}


def run(outdir: Path, inputs: dict, *, voxel_tables: bool, plugin: str = "Linear") -> dict:
    """Run the pipeline and copy its products (and the unchanged bval/bvec) into ``outdir``."""
    workflow = init_diffusion_pipeline_wf(voxel_tables=voxel_tables)
    workflow.base_dir = str(outdir / "work")
    node = workflow.get_node("inputnode")
    for key, value in inputs.items():
        setattr(node.inputs, key, value)
    graph = workflow.run(plugin=plugin)
    # nipype drops identity nodes from the run graph: read the working nodes.
    results = {node.name: node.result.outputs for node in graph.nodes()}
    sources = {"corrected": results["apply_warp"].out_file, "field": results["make_warp"].out_field,
               **{p: getattr(results["weighting"], f"out_{p}") for p in PRODUCTS[2:]}}
    out = {}
    for product in PRODUCTS:
        src = sources[product]
        if isinstance(src, str) and Path(src).exists():
            dest = outdir / f"dwi_{product}{''.join(Path(src).suffixes)}"
            out[product] = str(shutil.copyfile(src, dest))
    for key in ("bval", "bvec"):
        out[f"corrected_{key}"] = str(shutil.copyfile(inputs[key], outdir / f"dwi_corrected.{key}"))
    return out


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("outdir")
    p.add_argument("--dwi")
    p.add_argument("--bval")
    p.add_argument("--bvec")
    p.add_argument("--coil")
    p.add_argument("--position", default="HFS")
    p.add_argument("--table-position", nargs=3, type=float)
    p.add_argument("--isocenter-offset", nargs=3, type=float)
    p.add_argument("--voxel-tables", action="store_true", help="write per-voxel b-values and b-vectors")
    args = p.parse_args(argv)
    outdir = Path(args.outdir).resolve()
    outdir.mkdir(parents=True, exist_ok=True)
    demo = args.dwi is None
    if demo:
        inputs = write_demo(outdir / "demo_input")
        inputs.update(coil_model=str(demo_coil_path()), table_position_mm=list(DEMO_TABLE_POSITION_MM))
    else:
        inputs = {"in_file": str(Path(args.dwi).resolve()), "bval": str(Path(args.bval).resolve()),
                  "bvec": str(Path(args.bvec).resolve()), "coil_model": str(Path(args.coil).resolve())}
        if args.table_position:
            inputs["table_position_mm"] = args.table_position
        if args.isocenter_offset:
            inputs["isocenter_offset_mm"] = args.isocenter_offset
    inputs["patient_position"] = args.position
    products = run(outdir, inputs, voxel_tables=args.voxel_tables or demo)
    summary = json.loads(Path(products["summary"]).read_text())
    for shell in summary["shells"]:
        print(f"b = {shell['bval']:.0f}: median b deviation {100 * shell['median_deviation']:+.2f} %, "
              f"range {100 * shell['min_deviation']:+.2f} .. {100 * shell['max_deviation']:+.2f} %")
    if demo:
        check = md_check(products["corrected"], inputs["bval"], inputs["bvec"], products["voxel_bvals"],
                         products["voxel_bvecs"])
        (outdir / "md_check.json").write_text(json.dumps(check, indent=2) + "\n")
        print(f"dipy MD at {check['voxels']} voxels: nominal table off by up to "
              f"{100 * check['nominal_max_rel_error']:.2f} %, per-voxel tables by up to "
              f"{100 * check['corrected_max_rel_error']:.2f} %")
    print(f"outputs in {outdir}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
