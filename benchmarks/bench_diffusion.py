#!/usr/bin/env python
"""Benchmark: coil tensor, b-value deviation maps and streamed per-voxel b-tables.

Grid 140 x 140 x 90 at 2 mm (a whole-head DWI), 100 volumes (10 b=0, 45 at b=1000, 45 at
b=2000, seeded random directions), the FICTIONAL demo gradient system, head-first supine with
the isocenter 2 cm from the grid centre. Each stage runs in a fresh subprocess (numba kernels
loaded from their cache after a warm-up on a tiny grid, outside the timed section), so that its
peak resident memory (``VmHWM``) is its own:

``maps``     ``compute_coil_tensor`` + ``weighting_summary`` (tensor and per-shell deviation
             maps with their figures), in memory. Target: **< 10 s**.
``files``    ``diffusion_weighting_files`` writing the tensor (gzip), the deviation maps (gzip)
             and the summary, from a DWI header (the data are never read: a mask is given).
``tables``   the same, also streaming per-voxel b-values (X, Y, Z, N) and b-vectors
             (X, Y, Z, N, 3) to uncompressed ``.nii`` (0.7 GB + 2.1 GB). Target: peak
             memory **< 4 GB**.

Run::

    python benchmarks/bench_diffusion.py [--json figures.json] [--workdir /tmp/bench_dwi] [--quick]

Nothing here asserts: the figures are printed (and written as JSON).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

SHAPE = (140, 140, 90)
QUICK_SHAPE = (48, 48, 30)
VOXEL_MM = 2.0
ISOCENTER_OFFSET_MM = (0.0, 0.0, 20.0)
SEED = 20260505


def table():
    import numpy as np

    rng = np.random.default_rng(SEED)
    g = rng.normal(size=(100, 3))
    g /= np.linalg.norm(g, axis=1, keepdims=True)
    g[:10] = 0
    b = np.r_[np.zeros(10), np.full(45, 1000.0), np.full(45, 2000.0)]
    return b, g


def grid(shape):
    import numpy as np

    affine = np.diag([-VOXEL_MM, VOXEL_MM, VOXEL_MM, 1.0])
    affine[:3, 3] = [VOXEL_MM * (shape[0] - 1) / 2, -VOXEL_MM * (shape[1] - 1) / 2,
                     -VOXEL_MM * (shape[2] - 1) / 2]
    return affine


def peak_rss_mb() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def write_inputs(workdir: Path, shape) -> dict:
    """A DWI header over a sparse zero-filled file (never read), its table and a ball mask."""
    import nibabel as nib
    import numpy as np

    affine = grid(shape)
    hdr = nib.Nifti1Header()
    hdr.set_data_shape(tuple(shape) + (100,))
    hdr.set_data_dtype(np.int16)
    hdr.set_qform(affine, code=1)
    hdr.set_sform(affine, code=1)
    dwi = workdir / "dwi.nii"
    with open(dwi, "wb") as f:
        hdr.write_to(f)
        f.write(b"\0" * (int(hdr.get_data_offset()) - f.tell()))
        f.truncate(int(hdr.get_data_offset()) + 2 * int(np.prod(shape)) * 100)
    b, g = table()
    (workdir / "dwi.bval").write_text(" ".join(f"{v:g}" for v in b) + "\n")
    (workdir / "dwi.bvec").write_text("".join(" ".join(f"{v:.8f}" for v in row) + "\n" for row in g.T))
    ijk = np.indices(shape).reshape(3, -1).T
    ras = ijk @ affine[:3, :3].T + affine[:3, 3]
    mask = (np.linalg.norm(ras / [75.0, 90.0, 70.0], axis=1) < 1).reshape(shape).astype(np.uint8)
    img = nib.Nifti1Image(mask, affine)
    img.set_qform(affine, code=1)
    img.set_sform(affine, code=1)
    nib.save(img, str(workdir / "mask.nii.gz"))
    return {"dwi": str(dwi), "bval": str(workdir / "dwi.bval"), "bvec": str(workdir / "dwi.bvec"),
            "mask": str(workdir / "mask.nii.gz")}


def warm_up() -> None:
    """Load numba's cached kernels (compile them on a first run) outside the timed section."""
    import numpy as np

    from nl_unwarp.demo import demo_coil_path
    from nl_unwarp.diffusion import compute_coil_tensor, effective_volume, weighting_summary
    from nl_unwarp.frames import DeviceFrame
    from nl_unwarp.io.bvals import ras_from_bvec_frame
    from nl_unwarp.io.coilfile import load_coil

    affine = grid((6, 6, 6))
    field = compute_coil_tensor(load_coil(demo_coil_path()), (6, 6, 6), affine, DeviceFrame("HFS"),
                                ras_from_bvec=ras_from_bvec_frame(affine))
    b, g = table()
    weighting_summary(field, b, g, np.ones((6, 6, 6), bool))
    effective_volume(field.tensor, g[20])


def worker(stage: str, inputs: dict, shape, workdir: Path) -> dict:
    import nibabel as nib
    import numpy as np

    from nl_unwarp.api import FrameSpec
    from nl_unwarp.demo import demo_coil_path

    warm_up()
    before = peak_rss_mb()
    out = {"stage": stage}
    if stage == "maps":
        from nl_unwarp.diffusion import compute_coil_tensor, weighting_summary
        from nl_unwarp.frames import DeviceFrame
        from nl_unwarp.io.bvals import ras_from_bvec_frame
        from nl_unwarp.io.coilfile import load_coil

        affine = grid(shape)
        mask = np.asarray(nib.load(inputs["mask"]).dataobj) > 0
        b, g = table()
        start = time.perf_counter()
        field = compute_coil_tensor(load_coil(demo_coil_path()), shape, affine,
                                    DeviceFrame("HFS", ISOCENTER_OFFSET_MM),
                                    ras_from_bvec=ras_from_bvec_frame(affine))
        t_tensor = time.perf_counter() - start
        summary, _ = weighting_summary(field, b, g, mask)
        out.update(seconds=time.perf_counter() - start, tensor_seconds=t_tensor,
                   lattice_mm=field.lattice_mm, interpolation_error=field.interpolation_error,
                   shells=[{k: s[k] for k in ("bval", "median_deviation", "min_deviation", "max_deviation")}
                           for s in summary["shells"]])
    else:
        from nl_unwarp.interfaces.diffusion import diffusion_weighting_files

        paths = {"out_tensor": workdir / "tensor.nii.gz", "out_deviation": workdir / "bdev.nii.gz",
                 "out_summary": workdir / "summary.json"}
        if stage == "tables":
            paths.update(out_voxel_bvals=workdir / "voxel_bvals.nii",
                         out_voxel_bvecs=workdir / "voxel_bvecs.nii")
        start = time.perf_counter()
        diffusion_weighting_files(inputs["dwi"], inputs["bval"], inputs["bvec"], demo_coil_path(),
                                  frame=FrameSpec("HFS", isocenter_offset_mm=ISOCENTER_OFFSET_MM),
                                  mask=inputs["mask"], **{k: str(v) for k, v in paths.items()})
        out.update(seconds=time.perf_counter() - start,
                   bytes_written=sum(Path(p).stat().st_size for p in paths.values()))
        for p in paths.values():
            Path(p).unlink()
    out.update(peak_rss_mb=peak_rss_mb(), rss_before_mb=before)
    return out


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--json")
    p.add_argument("--workdir")
    p.add_argument("--quick", action="store_true", help=f"{QUICK_SHAPE} smoke run")
    p.add_argument("--_worker", nargs=2, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    shape = QUICK_SHAPE if args.quick else SHAPE
    if args._worker:
        stage, workdir = args._worker
        inputs = json.loads((Path(workdir) / "inputs.json").read_text())
        print(json.dumps(worker(stage, inputs, shape, Path(workdir))))
        return 0
    workdir = Path(args.workdir or tempfile.mkdtemp(prefix="nlu_bench_dwi_"))
    workdir.mkdir(parents=True, exist_ok=True)
    (workdir / "inputs.json").write_text(json.dumps(write_inputs(workdir, shape)))
    figures = []
    for stage in ("maps", "files", "tables"):
        cmd = [sys.executable, __file__, "--_worker", stage, str(workdir)]
        cmd += ["--quick"] if args.quick else []
        done = subprocess.run(cmd, check=True, capture_output=True, text=True, env=dict(os.environ))
        figures.append(json.loads(done.stdout.strip().splitlines()[-1]))
    print(f"grid {shape}, 100 volumes, {os.cpu_count()} CPUs, load {os.getloadavg()[0]:.2f}")
    print(f"{'stage':8} {'seconds':>8} {'peak RSS (MB)':>14}")
    for f in figures:
        print(f"{f['stage']:8} {f['seconds']:8.2f} {f['peak_rss_mb']:14.0f}")
    maps = figures[0]
    print(f"tensor alone {maps['tensor_seconds']:.2f} s, lattice {maps['lattice_mm']:g} mm, "
          f"interpolation error {maps['interpolation_error']:.1e}")
    for s in maps["shells"]:
        print(f"  b = {s['bval']:.0f}: median {100 * s['median_deviation']:+.2f} %, "
              f"range {100 * s['min_deviation']:+.2f} .. {100 * s['max_deviation']:+.2f} %")
    print(f"per-voxel tables: {figures[2]['bytes_written'] / 1e9:.2f} GB written")
    if args.json:
        Path(args.json).write_text(json.dumps({"shape": shape, "figures": figures}, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
