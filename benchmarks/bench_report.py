#!/usr/bin/env python
"""Per-image quality report for a 1 mm 256 x 256 x 176 image. Target: under 5 s.

Three figures (median of N runs: the machine is shared, a median is steadier
than a best):

* pages: the page rendered from arrays (statistics, head mask, the five
  figures, HTML) -- what the report adds once the correction has run;
* files: the same from the gzip-compressed NIfTI files the pipeline's report
  node gets (raw, displacement magnitude map, corrected, and the coil model
  file): the ITK field and the Jacobian map are not read, the grid overlay and
  the Jacobian planes are evaluated from the coil model -- the target;
* files+field: without the magnitude map and coil file (``nl-unwarp report
  image`` as before): the three-component field and the Jacobian map are
  inflated too.

The warp and the correction are computed beforehand and not timed. Nothing is
asserted: it prints the figures.

Usage: python benchmarks/bench_report.py [--repeats N]
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

SHAPE = (256, 256, 176)
TARGET_S = 5.0
ISOCENTER_OFFSET_MM = (0.0, 10.0, 30.0)


def _inputs(folder: Path):
    from nl_unwarp.api import FrameSpec, WarpOutputs, correct_file
    from nl_unwarp.demo import demo_coil_path
    from nl_unwarp.io.atomic import OutputSet
    from nl_unwarp.io.nifti import write_image

    affine = np.eye(4)
    affine[:3, 3] = -(np.asarray(SHAPE) - 1) / 2
    ijk = np.meshgrid(*[np.arange(n, dtype=np.float32) for n in SHAPE], indexing="ij", sparse=True)
    centre = (np.asarray(SHAPE) - 1) / 2
    # An ellipsoidal "head" with a brighter core, on a noisy background (seeded).
    r = np.sqrt(sum(((g - c) / s) ** 2 for g, c, s in zip(ijk, centre, (80, 100, 75), strict=True)))
    rng = np.random.default_rng(7)
    raw = (np.where(r < 1, 600.0, 0.0) + np.where(r < 0.7, 300.0, 0.0)).astype(np.float32)
    raw += rng.normal(0, 10, SHAPE).astype(np.float32)
    with OutputSet() as out:
        write_image(out, folder / "raw.nii.gz", raw, affine)
    paths = {k: folder / f"{k}.nii.gz" for k in ("field", "jacobian", "magnitude")}
    summary = correct_file(
        folder / "raw.nii.gz",
        demo_coil_path(),
        folder / "corrected.nii.gz",
        warp_outputs=WarpOutputs(**paths),
        frame=FrameSpec("HFS", isocenter_offset_mm=ISOCENTER_OFFSET_MM),
    )
    return summary, paths


def _median(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()

    from nl_unwarp.demo import demo_coil_path
    from nl_unwarp.io.itk import read_itk_field
    from nl_unwarp.io.nifti import load_image
    from nl_unwarp.report.files import write_image_report
    from nl_unwarp.report.pages import ImageInputs, render_image_page

    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        print(f"preparing {SHAPE} image, warp and correction (not timed) ...", flush=True)
        summary, paths = _inputs(folder)
        raw = load_image(folder / "raw.nii.gz")
        disp, _ = read_itk_field(paths["field"])
        jac = np.asarray(load_image(paths["jacobian"]).data)
        corrected = np.asarray(load_image(folder / "corrected.nii.gz").data)
        inputs = ImageInputs("raw.nii.gz", raw.data, raw.affine, summary, disp, jac, corrected)
        render_image_page(inputs)  # warm-up: imports, font cache
        pages_s = _median(lambda: render_image_page(inputs), args.repeats)

        def from_files(**fast):
            write_image_report(
                folder / "report.html",
                raw_file=folder / "raw.nii.gz",
                summary=summary,
                field_file=paths["field"],
                jacobian_file=paths["jacobian"],
                corrected_file=folder / "corrected.nii.gz",
                **fast,
            )

        files_s = _median(
            lambda: from_files(magnitude_file=paths["magnitude"], coil_file=demo_coil_path()), args.repeats
        )
        size_kb = (folder / "report.html").stat().st_size / 1024
        field_s = _median(from_files, args.repeats)
        mib = {k: p.stat().st_size / 2**20 for k, p in paths.items()}
    print(f"{'stage':12} {'median (s)':>10}  target {TARGET_S:g} s")
    print(f"{'pages':12} {pages_s:10.2f}  {'ok' if pages_s < TARGET_S else 'SLOW'}")
    print(f"{'files':12} {files_s:10.2f}  {'ok' if files_s < TARGET_S else 'SLOW'}")
    print(
        f"{'files+field':12} {field_s:10.2f}  (field {mib['field']:.0f} MiB and Jacobian "
        f"{mib['jacobian']:.0f} MiB gzip inflated too)"
    )
    print(f"page size    {size_kb:.0f} KiB (self-contained)")


if __name__ == "__main__":
    main()
