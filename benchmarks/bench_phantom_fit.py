#!/usr/bin/env python
"""Coil model from a phantom scan with 500 markers. Target: under 60 s.

A phantom of exactly 500 markers (6 mm, a 24 mm lattice within about 120 mm of
the centre, three 8 mm orientation markers) in a 280 mm sphere is scanned
(simulated, 2 mm voxels, 150^3, seeded noise) through the fictional demo
gradient model, turned and shifted a little. Timed, each the median of N runs
(the machine is shared):

* detect: :func:`nl_unwarp.markers.detect_markers` on the image;
* match: :func:`nl_unwarp.markers.match_any_orientation` (24 orientations);
* fit: :func:`nl_unwarp.phantom_fit.fit_phantom`, degree 7, robust (soft L1) loss,
  with one BLAS thread (as ``fit phantom`` runs it, through threadpoolctl when
  installed) and with the BLAS library's default threads;
* fit, linear loss: the same problem with ``least_squares``' default loss (peer);
* in memory: detect + match + fit (one BLAS thread) -- the target;
* files: :func:`nl_unwarp.interfaces.phantom.fit_phantom_files` from a NIfTI file
  (read, detect, match, fit, coil file, marker table, report pages).

The simulation is not timed. Nothing is asserted: it prints the figures and
the ratios against the target and the peers measured in the same run.

Usage: python benchmarks/bench_phantom_fit.py [--repeats N] [--degree N]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

try:  # BLAS thread limits (threadpoolctl, when installed)
    from threadpoolctl import threadpool_limits
except ImportError:  # pragma: no cover
    threadpool_limits = None

TARGET_S = 60.0
MARKERS = 500
SPACING_MM = 24.0
VOXEL_MM = 2.0
FOV_MM = 300.0
BODY_RADIUS_MM = 140.0


def _design() -> tuple[np.ndarray, np.ndarray]:
    """Exactly MARKERS markers: the lattice points nearest the centre, and three orientation markers."""
    ticks = np.arange(-6, 7) * SPACING_MM
    grid = np.stack(np.meshgrid(ticks, ticks, ticks, indexing="ij"), -1).reshape(-1, 3)
    grid = grid[np.argsort(np.linalg.norm(grid, axis=1), kind="stable")][: MARKERS - 3]
    extra = SPACING_MM * np.array([[0.5, 0.5, 0.5], [1.5, 0.5, 0.5], [0.5, 0.5, 2.5]])
    return np.concatenate([grid, extra]), np.r_[np.full(MARKERS - 3, 6.0), np.full(3, 8.0)]


def _scene():
    from scipy.spatial.transform import Rotation

    from nl_unwarp.demo import demo_coil_path
    from nl_unwarp.frames import DeviceFrame
    from nl_unwarp.io.coilfile import load_coil
    from nl_unwarp.phantom import MarkerPhantom, forward_simulate

    markers, diameters = _design()
    coil = load_coil(demo_coil_path())
    rot = Rotation.from_euler("xyz", [2.0, -3.0, 1.5], degrees=True).as_matrix()
    phantom = MarkerPhantom(markers, diameters, body_radius_mm=BODY_RADIUS_MM, rotation=rot,
                            translation_ras_mm=np.array([3.0, -5.0, 6.0]), edge_mm=1.5)
    n = int(FOV_MM / VOXEL_MM)
    affine = np.diag([VOXEL_MM] * 3 + [1.0])
    affine[:3, 3] = phantom.translation_ras_mm - VOXEL_MM * (n - 1) / 2
    frame = DeviceFrame("HFS")
    image = forward_simulate(phantom, lambda r: coil.encode(r, jacobian=False)[0], (n, n, n), affine, frame)
    image += np.random.default_rng(20261202).normal(0.0, 0.02, image.shape)
    return markers, diameters, image.astype(np.float32), affine, frame


def _median(fn, repeats: int):
    times, result = [], None
    for _ in range(repeats):
        start = time.perf_counter()
        result = fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times), result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--degree", type=int, default=7)
    args = parser.parse_args()

    import nibabel as nib

    from nl_unwarp.interfaces.phantom import fit_phantom_files
    from nl_unwarp.markers import detect_markers, match_any_orientation
    from nl_unwarp.phantom_fit import PhantomScan, fit_phantom

    print(f"simulating a {MARKERS}-marker phantom scan ({int(FOV_MM / VOXEL_MM)}^3, {VOXEL_MM:g} mm) ...")
    markers, diameters, image, affine, frame = _scene()

    def detect():
        return detect_markers(image, affine, marker_diameter_mm=6.0, largest_diameter_mm=8.0,
                              expected_count=MARKERS)

    t_detect, found = _median(detect, args.repeats)
    t_match, match = _median(lambda: match_any_orientation(markers, found.centroids_ras_mm), args.repeats)
    scan = PhantomScan(markers[match.marker_index], found.centroids_ras_mm[match.detection_index], frame,
                       match.marker_index)
    def one_thread(fn):
        if threadpool_limits is None:
            return fn()
        with threadpool_limits(limits=1, user_api="blas"):
            return fn()

    t_threads, _ = _median(lambda: fit_phantom([scan], degree=args.degree), args.repeats)
    t_fit, fit = _median(lambda: one_thread(lambda: fit_phantom([scan], degree=args.degree)), args.repeats)
    t_lin, fit_lin = _median(lambda: one_thread(lambda: fit_phantom([scan], degree=args.degree,
                                                                    loss="linear")), args.repeats)

    with tempfile.TemporaryDirectory(prefix="nl_unwarp_bench_") as tmp:
        image_path = Path(tmp) / "scan.nii"
        nib.save(nib.Nifti1Image(image, affine), str(image_path))
        definition = Path(tmp) / "phantom.json"
        definition.write_text(json.dumps({
            "format": "nl_unwarp-phantom", "format_version": 1, "name": "NLU bench sphere (fictional)",
            "body": {"shape": "sphere", "radius_mm": BODY_RADIUS_MM},
            "markers": [{"position_mm": p.tolist(), "diameter_mm": float(d)}
                        for p, d in zip(markers, diameters, strict=True)]}))

        def files():
            return fit_phantom_files([image_path], definition, Path(tmp) / "coil.json", degree=args.degree,
                                     isocenter_offsets=[(0.0, 0.0, 0.0)], report_dir=Path(tmp) / "report",
                                     markers_tsv=Path(tmp) / "markers.tsv")

        t_files, _ = _median(files, args.repeats)

    total = t_detect + t_match + t_fit
    print(f"machine: {os.cpu_count()} CPUs, load average {', '.join(f'{v:.2f}' for v in os.getloadavg())}, "
          f"threadpoolctl {'used' if threadpool_limits else 'not installed (rows use default threads)'}")
    print(f"markers: {MARKERS} in the design, {len(found.centroids_ras_mm)} detected, "
          f"{len(match.marker_index)} matched; degree {args.degree}, "
          f"{sum(len(c) for c in [fit.coefficients])} coefficients")
    print(f"fit: residual rms {fit.residual_rms_mm:.4f} mm (rigid only {fit.rigid_residual_rms_mm:.4f}), "
          f"{fit.nfev} evaluations; linear loss {fit_lin.nfev} evaluations")
    print(f"median of {args.repeats} runs (s):")
    rows = [("detect", t_detect), ("match", t_match),
            (f"fit, soft L1, degree {args.degree}, 1 BLAS thread", t_fit),
            ("fit, soft L1, default BLAS threads", t_threads),
            ("fit, linear loss (peer), 1 BLAS thread", t_lin),
            ("in memory: detect + match + fit", total),
            ("files: read, fit, write model, table, report", t_files)]
    for name, value in rows:
        print(f"  {name:52s} {value:8.3f}")
    print("ratios:")
    print(f"  in memory / target ({TARGET_S:g} s)          {total / TARGET_S:8.4f}")
    print(f"  files / target                          {t_files / TARGET_S:8.4f}")
    print(f"  fit soft L1 / fit linear loss           {t_fit / t_lin:8.2f}")
    print(f"  fit default threads / 1 thread          {t_threads / t_fit:8.2f}")
    print(f"  detect / in memory                      {t_detect / total:8.2f}")


if __name__ == "__main__":
    main()
