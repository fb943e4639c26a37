"""The compiled pull-back kernel (nl_unwarp._kernels.pull_resample) against scipy.ndimage.

Reference: ``scipy.ndimage.map_coordinates(mode="mirror", prefilter=False)`` on
the same B-spline coefficients (``scipy.ndimage.spline_filter(mode="mirror")``
for cubic), at coordinates computed here from the two affines and the field.
"""

from __future__ import annotations

import numpy as np
import pytest
from sampling import inside_fov, oblique_affine, reference_coords
from scipy import ndimage

from nl_unwarp._kernels import pull_resample

#: Kernel and scipy read the same float32 coefficients and sum in float64;
#: what differs is the float32 rounding of the output, half an ulp: 7.6e-6
#: for values in [128, 256) (images here are 100 +- 30, times a Jacobian
#: <= 1.2), and the order of the affine products (~1e-13 voxel).
KERNEL_ATOL = 1e-5
FILL = -7.5


def _smooth_volume(rng, shape):
    """Band-limited random image, values ~ 100 +- 30."""
    vol = ndimage.gaussian_filter(rng.normal(size=shape), 1.5, mode="wrap")
    return 100.0 + 30.0 * vol / np.abs(vol).max()


def _smooth_disp(rng, shape, amplitude_mm):
    """Seeded smooth random displacement, (X, Y, Z, 3) RAS mm, |d| <= ~amplitude."""
    disp = np.stack([ndimage.gaussian_filter(rng.normal(size=shape), 3.0, mode="wrap")
                     for _ in range(3)], -1)
    return (amplitude_mm * disp / np.abs(disp).max()).astype(np.float32)


def _maps(raw_affine, out_affine):
    raw_inv = np.linalg.inv(raw_affine)
    return np.ascontiguousarray((raw_inv @ out_affine)[:3]), np.ascontiguousarray(raw_inv[:3, :3])


def _coefficients(vol, order):
    if order <= 1:
        return vol.astype(np.float32)
    return ndimage.spline_filter(vol, order=order, mode="mirror").astype(np.float32)


def _run(coef, disp, raw_affine, out_affine, order, jac=None):
    index_map, ras_to_index = _maps(raw_affine, out_affine)
    out = np.empty(disp.shape[:3], dtype=np.float32)
    jac_arr = jac if jac is not None else np.ones((1, 1, 1), np.float32)
    pull_resample(coef, disp, index_map, ras_to_index, jac_arr, jac is not None, FILL, order, out)
    return out


RAW_SHAPE = (22, 20, 18)
RAW_AFFINE = oblique_affine(RAW_SHAPE, (2.0, 2.5, 3.0), (10.0, -5.0, 25.0), (4.0, -3.0, 8.0))
# The output grid is rotated against the raw one and a little larger, so that
# some of its points fall beyond the raw field of view.
OUT_SHAPE = (24, 22, 19)
OUT_AFFINE = oblique_affine(OUT_SHAPE, (2.2, 2.4, 3.1), (-12.0, 8.0, 40.0), (5.0, -2.0, 7.0))


@pytest.mark.parametrize("order", [0, 1, 3])
@pytest.mark.parametrize("use_jac", [False, True])
@pytest.mark.parametrize("layout", ["C", "C-view", "F-view"])
def test_pull_resample_matches_map_coordinates(order, use_jac, layout):
    rng = np.random.default_rng(100 + order)
    vol = _smooth_volume(rng, RAW_SHAPE)
    disp = _smooth_disp(rng, OUT_SHAPE, 3.0)
    if layout != "C":
        # compute_warp hands out a view into an (X, Y, Z, 4) array, in either
        # memory order (the kernel walks the voxels in the field's order).
        packed = np.zeros(OUT_SHAPE + (4,), np.float32, order=layout[0])
        packed[..., :3] = disp
        disp = packed[..., :3]
    jac = (1.0 + 0.2 * rng.uniform(-1, 1, OUT_SHAPE)).astype(np.float32) if use_jac else None
    coef = _coefficients(vol, order)
    got = _run(coef, disp, RAW_AFFINE, OUT_AFFINE, order, jac)

    coords = reference_coords(RAW_AFFINE, OUT_AFFINE, disp)
    # scipy.ndimage.map_coordinates, mirror boundary, on the same coefficients.
    ref = ndimage.map_coordinates(coef.astype(float), coords, order=order, mode="mirror",
                                  prefilter=False)
    if use_jac:
        ref = ref * jac
    inside = inside_fov(coords, RAW_SHAPE)
    assert 0.05 < (~inside).mean() < 0.5  # both cases are exercised
    edge = inside & np.any((coords < 0) | (coords > np.array(RAW_SHAPE)[:, None, None, None] - 1),
                           axis=0)
    assert edge.sum() > 10  # points in the half-voxel margin, where mirror applies
    np.testing.assert_allclose(got[inside], ref[inside], rtol=0, atol=KERNEL_ATOL)
    assert np.all(got[~inside] == np.float32(FILL))


@pytest.mark.parametrize("order", [0, 1, 3])
def test_fill_starts_half_a_voxel_outside(order):
    # Points 0.49 and 0.51 voxel beyond each end of raw axis 0.
    vol = _smooth_volume(np.random.default_rng(7), (10, 8, 6))
    coef = _coefficients(vol, order)
    xs = np.array([-0.51, -0.49, 9.49, 9.51])
    index_map = np.zeros((3, 4))
    index_map[0, 0], index_map[0, 3] = 1.0, 0.0
    index_map[1, 3], index_map[2, 3] = 3.3, 2.6
    out = np.empty((4, 1, 1), np.float32)
    disp = np.zeros((4, 1, 1, 3), np.float32)
    # Put the x coordinates in through the field (ras_to_index = identity).
    disp[:, 0, 0, 0] = xs - np.arange(4)
    pull_resample(coef, disp, index_map, np.eye(3), np.ones((1, 1, 1), np.float32), False,
                  FILL, order, out)
    coords = np.array([xs, np.full(4, 3.3), np.full(4, 2.6)])
    ref = ndimage.map_coordinates(coef.astype(float), coords, order=order, mode="mirror",
                                  prefilter=False)
    np.testing.assert_allclose(out[[1, 2], 0, 0], ref[[1, 2]], rtol=0, atol=KERNEL_ATOL)
    assert out[0, 0, 0] == out[3, 0, 0] == np.float32(FILL)


@pytest.mark.parametrize("order", [0, 1, 3])
def test_nan_displacement_gives_fill(order):
    """A NaN in a field (a registration field with holes) fills its voxel and leaves the others as
    they are: the kernels' floating-point freedoms (``FAST_MATH``) leave out ``nnan``, so a NaN
    point still fails the inside test instead of becoming an index. Robustness, no outside
    reference: the other voxels are compared with the same field without the NaNs."""
    rng = np.random.default_rng(21 + order)
    vol = _smooth_volume(rng, RAW_SHAPE)
    disp = _smooth_disp(rng, RAW_SHAPE, 3.0)
    coef = _coefficients(vol, order)
    clean = _run(coef, disp, RAW_AFFINE, RAW_AFFINE, order)
    holes = np.zeros(RAW_SHAPE, bool)
    holes[::4, 1::5, 2::3] = True
    disp[holes, rng.integers(0, 3, holes.sum())] = np.nan
    got = _run(coef, disp, RAW_AFFINE, RAW_AFFINE, order)
    assert (got[holes] == np.float32(FILL)).all()
    np.testing.assert_array_equal(got[~holes], clean[~holes])


@pytest.mark.parametrize("order", [0, 1, 3])
def test_length_one_axis_is_constant(order):
    # A single-slice raw image: any coordinate along the length-1 axis reads
    # the slice itself (scipy.ndimage also treats it so: a 2-D interpolation).
    rng = np.random.default_rng(11 + order)
    raw_shape, out_shape = (18, 16, 1), (18, 16, 1)
    raw_affine = oblique_affine(raw_shape, (2.0, 2.0, 5.0), (0.0, 20.0, 10.0), (0.0, 0.0, 12.0))
    vol = _smooth_volume(rng, raw_shape)
    disp = _smooth_disp(rng, out_shape, 2.0)
    disp[..., :] += raw_affine[:3, 2] / 5.0 * 9.0  # 9 mm through-plane (1.8 slices)
    coef = _coefficients(vol, order)
    got = _run(coef, disp, raw_affine, raw_affine, order)
    coords = reference_coords(raw_affine, raw_affine, disp)
    assert np.abs(coords[2]).min() > 1.0  # far off the slice
    ref = ndimage.map_coordinates(coef[..., 0].astype(float), coords[:2, ..., 0], order=order,
                                  mode="mirror", prefilter=False)
    inside = inside_fov(coords, raw_shape)[..., 0]
    assert inside.mean() > 0.8
    np.testing.assert_allclose(got[..., 0][inside], ref[inside], rtol=0, atol=KERNEL_ATOL)
    assert np.all(got[..., 0][~inside] == np.float32(FILL))
