#!/usr/bin/env python
"""Per-image quality report for a 1 mm 256 x 256 x 176 image. Target: under 5 s.

Two figures (best of N runs):

* pages: the page rendered from arrays (statistics, head mask, the five
  figures, HTML) -- what the report adds once the correction has run;
* files: the same from the NIfTI files (raw, ITK field, Jacobian, corrected,
  all gzip-compressed) -- what ``nl-unwarp report image`` and the pipeline's
  report node do, reading included.

The warp and the correction are computed beforehand and not timed. Nothing is
asserted: it prints the figures.

Usage: python benchmarks/bench_report.py [--repeats N]
"""

from __future__ import annotations

import argparse
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
    paths = {k: folder / f"{k}.nii.gz" for k in ("field", "jacobian")}
    summary = correct_file(
        folder / "raw.nii.gz",
        demo_coil_path(),
        folder / "corrected.nii.gz",
        warp_outputs=WarpOutputs(**paths),
        frame=FrameSpec("HFS", isocenter_offset_mm=ISOCENTER_OFFSET_MM),
    )
    return summary, paths


def _best(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()

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
        pages_s = _best(lambda: render_image_page(inputs), args.repeats)

        def from_files():
            write_image_report(
                folder / "report.html",
                raw_file=folder / "raw.nii.gz",
                summary=summary,
                field_file=paths["field"],
                jacobian_file=paths["jacobian"],
                corrected_file=folder / "corrected.nii.gz",
            )

        files_s = _best(from_files, args.repeats)
        size_kb = (folder / "report.html").stat().st_size / 1024
    print(f"{'stage':10} {'best (s)':>9}  target {TARGET_S:g} s")
    print(f"{'pages':10} {pages_s:9.2f}  {'ok' if pages_s < TARGET_S else 'SLOW'}")
    print(f"{'files':10} {files_s:9.2f}  {'ok' if files_s < TARGET_S else 'SLOW'}")
    print(f"page size  {size_kb:.0f} KiB (self-contained)")


if __name__ == "__main__":
    main()
