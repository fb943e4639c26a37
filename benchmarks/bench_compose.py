#!/usr/bin/env python
"""Resample once vs plain correction, 1 mm 256 x 256 x 176 grid, same run.

* plain: the warp on the raw grid, then the corrected image (cubic B-spline,
  Jacobian factor) -- what ``nl-unwarp correct`` does;
* once: the warp on the raw grid grown by the field margin (the composable
  field), folded with an affine and a second field (a registration warp on
  the target grid) onto the 1 mm target grid, then the raw image resampled
  once through the folded field (cubic B-spline, the correction's Jacobian
  carried through the chain).

Both figures include computing the correction's warp; the second table
gives the resampling stages alone (fields given). Target: once within
1.25 x plain. Nothing is asserted: it prints the figures (best of N runs).

Usage: python benchmarks/bench_compose.py [--repeats N]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

SHAPE = (256, 256, 176)
TARGET_RATIO = 1.25
ISOCENTER_OFFSET_MM = (0.0, 10.0, 30.0)


def _affine(shape, centre=(0.0, 0.0, 0.0)) -> np.ndarray:
    aff = np.eye(4)
    aff[:3, 3] = np.asarray(centre) - (np.asarray(shape) - 1) / 2
    return aff


def _registration():
    """An affine (6 degrees, 3 % scale) and a smooth 1 mm warp of a few mm on the target grid."""
    a = np.deg2rad(6.0)
    m = np.eye(4)
    m[:3, :3] = np.array([[np.cos(a), -np.sin(a), 0], [np.sin(a), np.cos(a), 0], [0, 0, 1]]) * 1.03
    m[:3, 3] = [2.0, -3.0, 4.0]
    ijk = np.stack(np.meshgrid(*[np.arange(n, dtype=np.float32) for n in SHAPE], indexing="ij"), -1)
    warp = np.stack([3.0 * np.sin(ijk[..., 1] / 30.0), 2.0 * np.cos(ijk[..., 2] / 25.0),
                     2.5 * np.sin(ijk[..., 0] / 40.0)], -1).astype(np.float32)
    return m, warp


def _best(fn, repeats):
    times, out = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    from nl_unwarp.api import FIELD_MARGIN_MM
    from nl_unwarp.compose import AffineStep, FieldStep, compose_chain, grid_with_margin
    from nl_unwarp.demo import demo_coil_path
    from nl_unwarp.frames import DeviceFrame
    from nl_unwarp.io.coilfile import load_coil
    from nl_unwarp.resample import correct_image, resample_volume
    from nl_unwarp.warp import compute_warp

    coil = load_coil(demo_coil_path())
    frame = DeviceFrame("HFS", ISOCENTER_OFFSET_MM)
    raw_aff = _affine(SHAPE)
    target_aff = _affine(SHAPE, (1.0, -2.0, 0.5))
    rng = np.random.default_rng(0)
    raw = rng.normal(100.0, 20.0, SHAPE).astype(np.float32)
    matrix, warp_w = _registration()
    w_step = FieldStep(warp_w, target_aff)
    grown_shape, grown_aff = grid_with_margin(SHAPE, raw_aff, FIELD_MARGIN_MM)

    def plain_warp():
        return compute_warp(coil, SHAPE, raw_aff, frame)

    def composable_warp():
        return compute_warp(coil, grown_shape, grown_aff, frame)

    # Warm up the compiled kernels on a small grid.
    small = compute_warp(coil, (16, 16, 16), _affine((16, 16, 16)), frame)
    correct_image(raw[:16, :16, :16], _affine((16, 16, 16)), small)
    compose_chain([AffineStep(matrix), FieldStep(small.disp_ras_mm, small.affine, small.jacobian)],
                  (8, 8, 8), _affine((8, 8, 8)), on_outside="ignore")

    t_warp, warp = _best(plain_warp, args.repeats)
    t_correct, _ = _best(lambda: correct_image(raw, raw_aff, warp), args.repeats)
    t_gwarp, gwarp = _best(composable_warp, args.repeats)
    g_step = FieldStep(gwarp.disp_ras_mm, gwarp.affine, gwarp.jacobian)
    chain = [w_step, AffineStep(matrix), g_step]
    t_compose, composed = _best(lambda: compose_chain(chain, SHAPE, target_aff, raw_shape=SHAPE,
                                                      raw_affine=raw_aff, on_outside="ignore"),
                                args.repeats)
    t_apply, _ = _best(lambda: resample_volume(raw, raw_aff, composed.disp_ras_mm, target_aff,
                                               jacobian=composed.factor, order=3), args.repeats)
    plain = t_warp + t_correct
    once = t_gwarp + t_compose + t_apply
    print(f"grid {SHAPE} at 1 mm, field margin {FIELD_MARGIN_MM:g} mm -> {grown_shape}; "
          f"best of {args.repeats}")
    print(f"plain   warp {t_warp:6.2f} s + correct {t_correct:6.2f} s           = {plain:6.2f} s")
    print(f"once    warp {t_gwarp:6.2f} s + compose {t_compose:6.2f} s + apply {t_apply:6.2f} s = "
          f"{once:6.2f} s")
    print(f"ratio once / plain (with warps)   {once / plain:5.2f}  (target {TARGET_RATIO})")
    print(f"ratio compose+apply / correct     {(t_compose + t_apply) / t_correct:5.2f}  (fields given)")
    print(f"uncovered target points           {100 * composed.uncovered_fraction:.3f} %")


if __name__ == "__main__":
    main()
