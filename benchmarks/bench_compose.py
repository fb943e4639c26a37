#!/usr/bin/env python
"""Resample once vs plain correction, 1 mm 256 x 256 x 176 grid, same run.

* **plain**: the warp on the raw grid, then the corrected image (cubic
  B-spline, Jacobian factor) -- what ``nl-unwarp correct`` computes;
* **once**: the warp on the raw grid grown by the field margin (the field we
  write for composition), then the raw image resampled once onto a 1 mm
  target grid through ``[W, A, det J, G]``: a registration warp ``W`` on the
  target grid, an affine ``A`` (6 degrees, 3 % scale), our correction ``G``
  with its Jacobian factor, in one pass (:func:`nl_unwarp.compose.resample_chain`:
  no composed field is stored); the chain has the shape the unrolled kernel
  takes, and the generic program is timed beside it;
* **once, coarse field**: the same with our field on a 2 mm grid
  (``--field-spacing 2``: the field file a pipeline that composes later
  would ask for), read trilinearly in the chain;
* **once, coarse field, J on the raw grid**: the same 2 mm field with the
  Jacobian map on the raw image's grid as a factor step before it, the layout
  the BIDS app and ``nl-unwarp compose --jacobian-map`` use (``J`` is then
  interpolated on its own grid);
* **once, fields as read from files**: the 1 mm field as
  :func:`~nl_unwarp.io.itk.read_itk_field` gives it back from the file we
  write, with the Jacobian map on the raw grid as a factor step before it, as
  ``nl-unwarp compose --jacobian-map`` and ``ResampleOnce`` build the chain
  from a correction's files (reading is outside the timed section);
* **two-pass** (for reference): the composed field stored on the target grid
  (:func:`~nl_unwarp.compose.compose_chain`), then resampled through
  (:func:`~nl_unwarp.resample.resample_volume`), as a tool that needs the
  field file would do;
* **SimpleITK** (the peer): ``sitk.Resample`` of the raw image onto the
  target grid through a ``CompositeTransform`` of the same ``W``, ``A`` and
  ``G`` read from the files we write (cubic B-spline, ``sitkBSpline``; ITK
  has no factor step, so no Jacobian factor: our one pass without it is
  compared with it for agreement). Reading the files and building the
  transform are outside the timed section.

The fields are x fastest (NIfTI's order), as our warps are made and as fields
read from files are. Repetitions are interleaved (plain, once, two-pass, ...)
so that the load of a shared machine falls on all alike; the tables give the
median wall time and the median CPU time (user + system of the process, all
threads) per stage. On a busy machine the CPU time is the steadier figure.

Target: once / plain <= 1.25. Three readings are printed for the 1 mm field:
with the warps (the composable field computed in the timed section, on its
larger grid, against the plain correction's warp on the raw grid), with the
fields given (the composable field exists, as in a pipeline that made it for
registration), and against a plain correction that writes its composable
field too (``nl-unwarp correct --out-field``: the grown warp, its interior
used for the image), which is what a pipeline that composes later runs first;
and the three again with the 2 mm field (a plain correction writing a 2 mm
field computes the 1 mm warp of the image and the 2 mm field: one more warp
stage). One more row gives the last reading with the Jacobian map on the raw
grid (the BIDS app's layout), and one the fields-given reading with the 1 mm
field as read back from its file (the layout the compose command and
``ResampleOnce`` meet). The last row is the peer's: our one pass against
SimpleITK's. Nothing is asserted.

Usage: python benchmarks/bench_compose.py [--repeats N] [--quick]
"""

from __future__ import annotations

import argparse
import os
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

SHAPE = (256, 256, 176)
SHAPE_QUICK = (96, 96, 64)
TARGET_RATIO = 1.25
ISOCENTER_OFFSET_MM = (0.0, 10.0, 30.0)
SEED = 0
COARSE_MM = 2.0


def _affine(shape, centre=(0.0, 0.0, 0.0)) -> np.ndarray:
    aff = np.eye(4)
    aff[:3, 3] = np.asarray(centre) - (np.asarray(shape) - 1) / 2
    return aff


def _registration(shape):
    """An affine (6 degrees, 3 % scale) and a smooth 1 mm warp of a few mm on the target grid.

    The warp is Fortran-ordered (x fastest), three planar volumes (the kernel reads it at its
    nodes with its steps; a field read by ``read_itk_field`` is voxel-interleaved instead).
    """
    a = np.deg2rad(6.0)
    m = np.eye(4)
    m[:3, :3] = np.array([[np.cos(a), -np.sin(a), 0], [np.sin(a), np.cos(a), 0], [0, 0, 1]]) * 1.03
    m[:3, 3] = [2.0, -3.0, 4.0]
    ijk = np.meshgrid(*[np.arange(n, dtype=np.float32) for n in shape], indexing="ij")
    warp = np.empty(tuple(shape) + (3,), np.float32, order="F")
    warp[..., 0] = 3.0 * np.sin(ijk[1] / 30.0)
    warp[..., 1] = 2.0 * np.cos(ijk[2] / 25.0)
    warp[..., 2] = 2.5 * np.sin(ijk[0] / 40.0)
    return m, warp


def _sitk_peer(folder: Path, raw, raw_aff, target_aff, shape, warp_w, matrix, g):
    """SimpleITK's inputs from our files: raw image, target grid, and the composite ``[W, A, G]``
    (ITK's composite takes them in the reverse order, CONVENTIONS.md section 4)."""
    import SimpleITK as sitk

    from nl_unwarp.io.atomic import OutputSet
    from nl_unwarp.io.itk import write_itk_field
    from nl_unwarp.io.nifti import write_image
    from nl_unwarp.io.transforms import write_itk_affine

    with OutputSet() as out:
        write_image(out, folder / "raw.nii", raw, raw_aff)
        write_image(out, folder / "target.nii", np.zeros(shape, np.float32), target_aff)
        write_itk_field(out, folder / "w.nii", warp_w, target_aff)
        write_itk_affine(out, folder / "a.mat", matrix)
        write_itk_field(out, folder / "g.nii", g.disp_ras_mm, g.affine)

    def field(name):
        return sitk.DisplacementFieldTransform(sitk.ReadImage(str(folder / name), sitk.sitkVectorFloat64))

    composite = sitk.CompositeTransform([field("g.nii"), sitk.ReadTransform(str(folder / "a.mat")),
                                         field("w.nii")])
    return (sitk.ReadImage(str(folder / "raw.nii"), sitk.sitkFloat32),
            sitk.ReadImage(str(folder / "target.nii"), sitk.sitkFloat32), composite)


def _timed(fn):
    wall, cpu = time.perf_counter(), time.process_time()
    out = fn()
    return out, time.perf_counter() - wall, time.process_time() - cpu


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--quick", action="store_true", help=f"{SHAPE_QUICK} smoke run")
    args = parser.parse_args()
    import numba

    from nl_unwarp.api import _interior
    from nl_unwarp.compose import (
        FIELD_MARGIN_MM,
        AffineStep,
        FactorStep,
        FieldStep,
        compose_chain,
        grid_with_margin,
        resample_chain,
    )
    from nl_unwarp.demo import demo_coil_path
    from nl_unwarp.frames import DeviceFrame
    from nl_unwarp.io.coilfile import load_coil
    from nl_unwarp.io.itk import read_itk_field
    from nl_unwarp.resample import correct_image, resample_volume
    from nl_unwarp.warp import compute_warp

    shape = SHAPE_QUICK if args.quick else SHAPE
    coil = load_coil(demo_coil_path())
    frame = DeviceFrame("HFS", ISOCENTER_OFFSET_MM)
    raw_aff = _affine(shape)
    target_aff = _affine(shape, (1.0, -2.0, 0.5))
    raw = np.random.default_rng(SEED).normal(100.0, 20.0, shape).astype(np.float32)
    matrix, warp_w = _registration(shape)
    grown_shape, grown_aff = grid_with_margin(shape, raw_aff, FIELD_MARGIN_MM)
    coarse_shape, coarse_aff = grid_with_margin(shape, raw_aff, FIELD_MARGIN_MM, COARSE_MM)

    registration = [FieldStep(warp_w, target_aff), AffineStep(matrix)]  # W, A

    def chain_of(g):
        # FieldStep.jacobian: the factor sampled where G is applied, sharing its weights.
        return registration + [FieldStep(g.disp_ras_mm, g.affine, g.jacobian)]

    # Warm up (numba loads its cached kernels) on a small grid, same array layouts.
    small = compute_warp(coil, (16, 16, 16), _affine((16, 16, 16)), frame)
    correct_image(raw[:16, :16, :16], _affine((16, 16, 16)), small)
    small_grown = compute_warp(coil, (20, 20, 20), _affine((20, 20, 20)), frame)
    correct_image(raw[:16, :16, :16], _affine((16, 16, 16)), _interior(small_grown, (16, 16, 16),
                                                                        _affine((16, 16, 16))))
    small_chain = [FieldStep(warp_w[:8, :8, :8], _affine((8, 8, 8))), AffineStep(matrix),
                   FieldStep(small.disp_ras_mm, small.affine, small.jacobian)]
    for unroll in (True, False):
        resample_chain(raw[:16, :16, :16], _affine((16, 16, 16)), small_chain, (8, 8, 8), _affine((8, 8, 8)),
                       on_outside="ignore", unroll=unroll)
    folded = compose_chain(small_chain, (8, 8, 8), _affine((8, 8, 8)), on_outside="ignore")
    resample_volume(raw[:16, :16, :16], _affine((16, 16, 16)), folded.disp_ras_mm, _affine((8, 8, 8)),
                    jacobian=folded.factor)

    stages = ("warp", "correct", "grown warp", "correct interior", "once", "once generic", "once files",
              "coarse warp", "once coarse", "once coarse J raw", "compose", "apply", "sitk")
    wall = {s: [] for s in stages}
    cpu = {s: [] for s in stages}

    def record(stage, fn):
        out, w, c = _timed(fn)
        wall[stage].append(w)
        cpu[stage].append(c)
        return out

    import SimpleITK as sitk

    scratch = tempfile.TemporaryDirectory()
    grown0 = compute_warp(coil, grown_shape, grown_aff, frame)
    sitk_raw, sitk_target, composite = _sitk_peer(Path(scratch.name), raw, raw_aff, target_aff, shape,
                                                  warp_w, matrix, grown0)
    g_file = FieldStep(*read_itk_field(Path(scratch.name) / "g.nii"))
    no_factor = resample_chain(raw, raw_aff, registration + [FieldStep(grown0.disp_ras_mm, grown0.affine)],
                               shape, target_aff, on_outside="ignore").data
    del grown0
    agreement = uncovered = coarse_gap = sitk_gap = 0.0
    for _ in range(args.repeats):
        warp = record("warp", lambda: compute_warp(coil, shape, raw_aff, frame))
        record("correct", lambda w=warp: correct_image(raw, raw_aff, w))
        grown = record("grown warp", lambda: compute_warp(coil, grown_shape, grown_aff, frame))
        # What `nl-unwarp correct --out-field` does: the raw grid's warp as the grown warp's interior.
        inner = _interior(grown, shape, raw_aff)
        record("correct interior", lambda w=inner: correct_image(raw, raw_aff, w))
        chain = chain_of(grown)
        once = record("once", lambda c=chain: resample_chain(raw, raw_aff, c, shape, target_aff,
                                                             on_outside="ignore"))
        record("once generic", lambda c=chain: resample_chain(raw, raw_aff, c, shape, target_aff,
                                                              on_outside="ignore", unroll=False))
        # The raw-grid Jacobian map as a file gives it back: one volume, Fortran order.
        j_raw = FactorStep(np.asfortranarray(warp.jacobian), raw_aff)
        files_chain = registration + [j_raw, g_file]
        record("once files", lambda c=files_chain: resample_chain(raw, raw_aff, c, shape, target_aff,
                                                                  on_outside="ignore"))
        coarse = record("coarse warp", lambda: compute_warp(coil, coarse_shape, coarse_aff, frame))
        coarse_chain = chain_of(coarse)
        once_coarse = record("once coarse", lambda c=coarse_chain: resample_chain(
            raw, raw_aff, c, shape, target_aff, on_outside="ignore"))
        raw_j_chain = registration + [j_raw, FieldStep(coarse.disp_ras_mm, coarse.affine)]
        record("once coarse J raw", lambda c=raw_j_chain: resample_chain(raw, raw_aff, c, shape, target_aff,
                                                                          on_outside="ignore"))
        # Voxels whose end point crosses the raw image's edge between the two fields jump to the
        # fill value: the percentile shows the interior.
        coarse_gap = float(np.percentile(np.abs(once_coarse.data - once.data), 99.9))
        composed = record("compose", lambda c=chain: compose_chain(c, shape, target_aff, raw_shape=shape,
                                                                   raw_affine=raw_aff, on_outside="ignore"))
        two = record("apply", lambda f=composed: resample_volume(raw, raw_aff, f.disp_ras_mm, target_aff,
                                                                  jacobian=f.factor))
        agreement = max(agreement, float(np.abs(once.data - two).max()))
        peer = record("sitk", lambda: sitk.Resample(sitk_raw, sitk_target, composite, sitk.sitkBSpline, 0.0))
        sitk_gap = float(np.percentile(np.abs(sitk.GetArrayFromImage(peer).T - no_factor), 99.9))
        del peer
        uncovered = once.uncovered_fraction
        del warp, grown, inner, chain, once, composed, two, coarse, coarse_chain, once_coarse, raw_j_chain
        del files_chain, j_raw

    med_w = {s: statistics.median(v) for s, v in wall.items()}
    med_c = {s: statistics.median(v) for s, v in cpu.items()}
    load = os.getloadavg()
    print(f"grid {shape} at 1 mm; field margin {FIELD_MARGIN_MM:g} mm -> {grown_shape} "
          f"({coarse_shape} at {COARSE_MM:g} mm); median of "
          f"{args.repeats} interleaved runs; numba threads {numba.get_num_threads()}, cpus {os.cpu_count()}, "
          f"load average {load[0]:.2f} {load[1]:.2f} {load[2]:.2f}")
    print(f"{'stage':38s} {'wall s':>8s} {'cpu s':>8s}")
    labels = {"warp": "compute_warp, raw grid", "correct": "correct_image (cubic, x det J)",
              "grown warp": "compute_warp, grown grid",
              "correct interior": "correct_image, grown warp's interior", "once": "resample_chain (one pass)",
              "once generic": "  the same, generic program",
              "once files": "  the same, fields as read from files",
              "coarse warp": f"compute_warp, grown grid at {COARSE_MM:g} mm",
              "once coarse": f"resample_chain, {COARSE_MM:g} mm field",
              "once coarse J raw": "  the same, J on the raw grid",
              "compose": "compose_chain (stored field)", "apply": "resample_volume through it",
              "sitk": "SimpleITK Resample, composite [W, A, G]"}
    for s in stages:
        print(f"{labels[s]:38s} {med_w[s]:8.2f} {med_c[s]:8.2f}")

    def ratios(parts, base):
        return (sum(med_w[p] for p in parts) / sum(med_w[b] for b in base),
                sum(med_c[p] for p in parts) / sum(med_c[b] for b in base))

    plain = ("warp", "correct")
    rows = [("once / plain, with the warps", ("grown warp", "once"), plain),
            ("once / plain, fields given", ("once",), plain),
            ("once / plain writing its field (grown warp)", ("grown warp", "once"),
             ("grown warp", "correct interior")),
            ("once / plain, fields as read from files", ("once files",), plain),
            (f"once / plain, with the warps, {COARSE_MM:g} mm field", ("coarse warp", "once coarse"), plain),
            (f"once / plain, fields given, {COARSE_MM:g} mm field", ("once coarse",), plain),
            (f"once / plain writing its {COARSE_MM:g} mm field", ("coarse warp", "once coarse"),
             ("warp", "correct", "coarse warp")),
            ("  the same, J on the raw grid (BIDS app)", ("coarse warp", "once coarse J raw"),
             ("warp", "correct", "coarse warp")),
            ("two-pass / plain, with the warps", ("grown warp", "compose", "apply"), plain),
            ("two-pass / plain, fields given", ("compose", "apply"), plain),
            ("once / correct_image (resampling alone)", ("once",), ("correct",)),
            ("unrolled / generic program (one pass)", ("once",), ("once generic",)),
            ("once / SimpleITK composite (peer)", ("once",), ("sitk",))]
    print(f"{'ratio (target ' + str(TARGET_RATIO) + ')':46s} {'wall':>6s} {'cpu':>6s}")
    for label, parts, base in rows:
        rw, rc = ratios(parts, base)
        print(f"{label:46s} {rw:6.2f} {rc:6.2f}")
    print(f"one pass vs two-pass: largest difference {agreement:.2e} (intensities ~100)")
    print(f"uncovered target points: {100 * uncovered:.3f} %")
    print(f"SimpleITK vs our one pass without the Jacobian factor: 99.9th percentile of the "
          f"difference {sitk_gap:.2e} (intensities ~100)")
    print(f"one pass with the {COARSE_MM:g} mm field vs the 1 mm one: 99.9th percentile of the "
          f"difference {coarse_gap:.2e} (intensities ~100)")


if __name__ == "__main__":
    main()
