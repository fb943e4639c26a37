"""Run every compiled resampling kernel on one fixed case and save the results (a child process).

Used by ``test_reproducibility.py::test_cached_kernels_equal_fresh_ones``: run once with an
empty numba cache (the kernels are compiled) and once more with the cache that run wrote
(the kernels are loaded), the saved bytes must be equal.

Usage: python kernelrun.py OUT.npz
"""

from __future__ import annotations

import sys

import numpy as np
from sampling import oblique_affine  # this folder is first on the path of a script run from it

from nl_unwarp.api import FrameSpec, make_frame
from nl_unwarp.compose import (
    AffineStep,
    FactorStep,
    FieldStep,
    compose_chain,
    grid_with_margin,
    margin_slices,
    resample_chain,
)
from nl_unwarp.demo import demo_coil_path
from nl_unwarp.io.coilfile import load_coil
from nl_unwarp.resample import resample_volume
from nl_unwarp.warp import compute_warp

SHAPE = (24, 24, 24)
VOXEL_MM = 9.0
MARGIN_MM = 27.0


def _case():
    """A blob on a zero background (sums that cancel to rounding level near the edges), its
    grid, and the demo coil's warp on the grid grown by a margin, as the pipeline makes it."""
    affine = oblique_affine(SHAPE, (VOXEL_MM,) * 3, (0.0, 0.0, 0.0), (0.0, 0.0, 0.0))
    ijk = np.indices(SHAPE, dtype=float)
    r2 = sum((g - (n - 1) / 2) ** 2 for g, n in zip(ijk, SHAPE, strict=True))
    image = np.asfortranarray(np.where(r2 < 60.0, np.exp(-r2 / 30.0), 0.0).astype(np.float32) * 3.0)
    frame, _ = make_frame(FrameSpec("HFS", isocenter_offset_mm=(0.0, 0.0, 30.0)))
    grown_shape, grown_affine = grid_with_margin(SHAPE, affine, MARGIN_MM)
    warp = compute_warp(load_coil(demo_coil_path()), grown_shape, grown_affine, frame)
    return image, affine, warp, grown_affine


def main(out: str) -> None:
    image, affine, warp, grown_affine = _case()
    field = FieldStep(warp.disp_ras_mm, grown_affine, warp.jacobian)
    motion = np.eye(4)
    motion[:3, :3] = [[0.999, -0.03, 0.0], [0.03, 0.999, 0.01], [0.0, -0.01, 1.0]]
    motion[:3, 3] = [1.5, -2.0, 0.7]
    chain = [AffineStep(motion), field]
    # The Jacobian map on the image grid, as ApplyWarp is given it.
    inner = margin_slices(SHAPE, warp.disp_ras_mm.shape[:3])
    correction = [FactorStep(np.asfortranarray(warp.jacobian[inner]), affine),
                  FieldStep(warp.disp_ras_mm, grown_affine)]
    # The same with the field in three planar volumes (a Fortran-ordered field from elsewhere).
    planar = correction[:1] + [FieldStep(np.asfortranarray(warp.disp_ras_mm), grown_affine)]
    results = {}
    for order in (0, 1, 3):
        results[f"pull_{order}"] = resample_volume(image, affine, warp.disp_ras_mm, grown_affine,
                                                   jacobian=warp.jacobian, order=order)
        for unroll in (True, False):  # field_affine_field_sample, fold_chain_and_sample
            for name, steps in (("chain", chain), ("correction", correction), ("planar", planar)):
                results[f"{name}_{order}_{unroll}"] = resample_chain(
                    image, affine, steps, SHAPE, affine, order=order, unroll=unroll, on_outside="ignore").data
    composed = compose_chain(chain, SHAPE, affine, on_outside="ignore")  # fold_chain
    results["fold_disp"], results["fold_factor"] = composed.disp_ras_mm, composed.factor
    np.savez(out, **results)


if __name__ == "__main__":
    main(sys.argv[1])
