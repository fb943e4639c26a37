"""Resampling through a warp (nl_unwarp.resample) against scipy.ndimage.

Reference: ``scipy.ndimage.map_coordinates(order=k, mode="mirror")`` with its
own spline prefilter (``spline_filter(mode="mirror")``) in float64, at raw
voxel coordinates computed here from the two affines and the field; beyond
half a voxel outside the raw grid the value is the fill.
"""

from __future__ import annotations

import numpy as np
import pytest
from sampling import inside_fov, oblique_affine, reference_coords
from scipy import ndimage

from nl_unwarp import resample
from nl_unwarp.resample import ORDERS, correct_image, prefilter, resample_volume
from nl_unwarp.warp import WarpField

#: float32 carries 6e-8 relative; the input cast, the coefficients stored in
#: float32 between the per-axis passes and the output rounding each add a few
#: ulp (measured ~1e-7 of the image scale). Relative to max |image|.
RESAMPLE_RTOL = 1e-6
#: Prefilter in float32 against scipy's float64 spline_filter: a few ulp of the
#: largest coefficient (measured 3e-7 for order 5). Relative to max |coef|.
PREFILTER_RTOL = 1e-6
FILL = -3.25


def _smooth(rng, shape, sigma=1.5):
    vol = ndimage.gaussian_filter(rng.normal(size=shape), sigma, mode="wrap")
    return vol / np.abs(vol).max()


def _disp(rng, shape, amplitude_mm):
    disp = np.stack([_smooth(rng, shape, 3.0) for _ in range(3)], -1)
    return (amplitude_mm * disp).astype(np.float32)


def _scipy_reference(volume, coords, order):
    """scipy.ndimage.map_coordinates with the mirror spline prefilter, float64."""
    return ndimage.map_coordinates(np.asarray(volume, dtype=float), coords, order=order,
                                   mode="mirror")


def _assert_matches(got, ref, inside, scale):
    assert got.dtype == np.float32
    np.testing.assert_allclose(got[inside], ref[inside], rtol=0, atol=RESAMPLE_RTOL * scale)
    assert np.all(got[~inside] == np.float32(FILL))


RAW_SHAPE = (22, 20, 18)
RAW_AFFINE = oblique_affine(RAW_SHAPE, (2.0, 2.5, 3.0), (10.0, -5.0, 25.0), (4.0, -3.0, 8.0))
# Output grid rotated against the raw grid and larger: it differs from the raw
# affine (as when correcting onto another grid) and reaches outside the raw FOV.
OUT_SHAPE = (24, 22, 19)
OUT_AFFINE = oblique_affine(OUT_SHAPE, (2.2, 2.4, 3.1), (-12.0, 8.0, 40.0), (5.0, -2.0, 7.0))


def _test_volume(rng, dtype):
    if dtype == np.int16:
        return np.round(20000.0 * _smooth(rng, RAW_SHAPE)).astype(np.int16)
    return (100.0 + 30.0 * _smooth(rng, RAW_SHAPE)).astype(dtype)


@pytest.mark.parametrize("threads", [1, 3])
@pytest.mark.parametrize("order", ORDERS)
@pytest.mark.parametrize("shape", [(23, 21, 19), (17, 1, 9)])
def test_prefilter_matches_spline_filter(order, shape, threads, monkeypatch):
    monkeypatch.setattr(resample, "_threads", lambda: threads)
    rng = np.random.default_rng(order)
    vol = 100.0 + 30.0 * _smooth(rng, shape) + rng.normal(0.0, 5.0, shape)
    got = prefilter(vol, order)
    assert got.dtype == np.float32 and got.shape == shape
    # scipy.ndimage.spline_filter, mirror boundary (orders 0, 1 need none).
    ref = ndimage.spline_filter(vol, order=order, mode="mirror") if order > 1 else vol
    np.testing.assert_allclose(got, ref, rtol=0, atol=PREFILTER_RTOL * np.abs(ref).max())


@pytest.mark.parametrize("use_jacobian", [False, True])
@pytest.mark.parametrize("dtype", [np.float64, np.float32, np.int16])
@pytest.mark.parametrize("order", ORDERS)
def test_resample_volume_matches_map_coordinates(order, dtype, use_jacobian):
    rng = np.random.default_rng(10 * order + 1)
    vol = _test_volume(rng, dtype)
    disp = _disp(rng, OUT_SHAPE, 3.0)
    jac = (1.0 + 0.2 * _smooth(rng, OUT_SHAPE, 2.0)).astype(np.float32) if use_jacobian else None
    got = resample_volume(vol, RAW_AFFINE, disp, OUT_AFFINE, jacobian=jac, order=order, fill=FILL)
    coords = reference_coords(RAW_AFFINE, OUT_AFFINE, disp)
    ref = _scipy_reference(vol, coords, order)
    if use_jacobian:
        ref = ref * jac
    inside = inside_fov(coords, RAW_SHAPE)
    assert 0.05 < (~inside).mean() < 0.5
    _assert_matches(got, ref, inside, np.abs(vol).max() * 1.2)


def _warp(disp, affine, jac):
    return WarpField(affine=affine, disp_ras_mm=disp, jacobian=jac,
                     outside_valid=np.zeros(disp.shape[:3], dtype=bool))


@pytest.mark.parametrize("dtype", [np.int16, np.uint8])
def test_keep_dtype_rounds_and_clips(dtype):
    rng = np.random.default_rng(21)
    info = np.iinfo(dtype)
    # Noisy data spanning the whole range, and Jacobians up to 1.3: the cubic
    # spline overshoots and the factor pushes values past both limits.
    span = rng.uniform(info.min, info.max, RAW_SHAPE)
    data = np.clip(np.round(span), info.min, info.max).astype(dtype)
    disp = _disp(rng, OUT_SHAPE, 3.0)
    jac = (1.0 + 0.3 * _smooth(rng, OUT_SHAPE, 2.0)).astype(np.float32)
    warp = _warp(disp, OUT_AFFINE, jac)
    as_float = correct_image(data, RAW_AFFINE, warp, order=3, fill=FILL)
    kept = correct_image(data, RAW_AFFINE, warp, order=3, fill=FILL, keep_dtype=True)
    assert as_float.dtype == np.float32 and kept.dtype == dtype
    # numpy.rint (round half to even) then numpy.clip to the type's range.
    expected = np.clip(np.rint(as_float), info.min, info.max).astype(dtype)
    np.testing.assert_array_equal(kept, expected)
    assert (as_float > info.max).any() and (as_float < info.min).any()
    assert (np.abs(as_float - np.rint(as_float)) > 0.25).any()
    # And the float result itself is scipy's.
    coords = reference_coords(RAW_AFFINE, OUT_AFFINE, disp)
    ref = _scipy_reference(data, coords, 3) * jac
    _assert_matches(as_float, ref, inside_fov(coords, RAW_SHAPE), 1.3 * max(-info.min, info.max))


def test_keep_dtype_float64_and_default_float32():
    rng = np.random.default_rng(22)
    data = _test_volume(rng, np.float64)
    warp = _warp(_disp(rng, OUT_SHAPE, 2.0), OUT_AFFINE, np.ones(OUT_SHAPE, np.float32))
    kept = correct_image(data, RAW_AFFINE, warp, keep_dtype=True)
    default = correct_image(data, RAW_AFFINE, warp)
    assert kept.dtype == np.float64 and default.dtype == np.float32
    np.testing.assert_array_equal(kept, default.astype(np.float64))


@pytest.mark.parametrize("order", [1, 3, 4])
def test_complex_is_real_and_imaginary_parts(order):
    rng = np.random.default_rng(30 + order)
    real = 100.0 + 30.0 * _smooth(rng, RAW_SHAPE)
    imag = -50.0 + 20.0 * _smooth(rng, RAW_SHAPE)
    data = (real + 1j * imag).astype(np.complex64)
    disp = _disp(rng, OUT_SHAPE, 3.0)
    warp = _warp(disp, OUT_AFFINE, (1.0 + 0.2 * _smooth(rng, OUT_SHAPE, 2.0)).astype(np.float32))
    got = correct_image(data, RAW_AFFINE, warp, order=order, fill=FILL)
    assert got.dtype == np.complex64
    np.testing.assert_array_equal(got.real, correct_image(data.real, RAW_AFFINE, warp, order=order,
                                                          fill=FILL))
    np.testing.assert_array_equal(got.imag, correct_image(data.imag, RAW_AFFINE, warp, order=order,
                                                          fill=FILL))
    coords = reference_coords(RAW_AFFINE, OUT_AFFINE, disp)
    inside = inside_fov(coords, RAW_SHAPE)
    for part, got_part in ((data.real, got.real), (data.imag, got.imag)):
        ref = _scipy_reference(part, coords, order) * warp.jacobian
        np.testing.assert_allclose(got_part[inside], ref[inside], rtol=0,
                                   atol=RESAMPLE_RTOL * 160.0)


def test_4d_series_each_volume_matches_scipy():
    rng = np.random.default_rng(40)
    data = np.stack([100.0 + 30.0 * _smooth(rng, RAW_SHAPE) for _ in range(3)], -1)
    disp = _disp(rng, OUT_SHAPE, 3.0)
    jac = (1.0 + 0.2 * _smooth(rng, OUT_SHAPE, 2.0)).astype(np.float32)
    done = []
    got = correct_image(data, RAW_AFFINE, _warp(disp, OUT_AFFINE, jac), order=3, fill=FILL,
                        progress=lambda k, n: done.append((k, n)))
    assert got.shape == OUT_SHAPE + (3,)
    assert done == [(1, 3), (2, 3), (3, 3)]
    coords = reference_coords(RAW_AFFINE, OUT_AFFINE, disp)
    inside = inside_fov(coords, RAW_SHAPE)
    for t in range(3):
        _assert_matches(got[..., t], _scipy_reference(data[..., t], coords, 3) * jac, inside, 160.0)


@pytest.mark.parametrize("jacobian", [False, True])
def test_jacobian_switch(jacobian):
    rng = np.random.default_rng(50)
    data = 100.0 + 30.0 * _smooth(rng, RAW_SHAPE)
    disp = _disp(rng, OUT_SHAPE, 3.0)
    jac = (1.0 + 0.2 * _smooth(rng, OUT_SHAPE, 2.0)).astype(np.float32)
    got = correct_image(data, RAW_AFFINE, _warp(disp, OUT_AFFINE, jac), jacobian=jacobian,
                        fill=FILL)
    coords = reference_coords(RAW_AFFINE, OUT_AFFINE, disp)
    ref = _scipy_reference(data, coords, 3) * (jac if jacobian else 1.0)
    _assert_matches(got, ref, inside_fov(coords, RAW_SHAPE), 160.0)


@pytest.mark.parametrize("order", ORDERS)
def test_single_slice_is_resampled_in_plane(order):
    # A length-1 axis is constant along itself: the through-plane part of the
    # field cannot move signal. Reference: 2-D map_coordinates on the slice.
    rng = np.random.default_rng(60 + order)
    shape = (20, 18, 1)
    affine = oblique_affine(shape, (2.0, 2.0, 5.0), (0.0, 20.0, 10.0), (0.0, 0.0, 12.0))
    vol = 100.0 + 30.0 * _smooth(rng, shape)
    disp = _disp(rng, shape, 2.0)
    disp += (affine[:3, 2] / 5.0 * 7.0).astype(np.float32)  # 7 mm through-plane
    got = resample_volume(vol, affine, disp, affine, order=order, fill=FILL)
    coords = reference_coords(affine, affine, disp)
    ref = _scipy_reference(vol[..., 0], coords[:2, ..., 0], order)
    inside = inside_fov(coords, shape)[..., 0]
    assert inside.mean() > 0.8
    _assert_matches(got[..., 0], ref, inside, 130.0)


def test_unknown_order_is_rejected():
    vol = np.zeros((4, 4, 4), np.float32)
    disp = np.zeros((4, 4, 4, 3), np.float32)
    with pytest.raises(ValueError, match="order"):
        resample_volume(vol, np.eye(4), disp, np.eye(4), order=6)
