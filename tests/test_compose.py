"""Folding a chain into one field (nl_unwarp.compose), checked against ITK.

Reference: SimpleITK's ``TransformToDisplacementField`` of a
``CompositeTransform`` gives the composed displacement of ITK itself on a
target grid (ITK applies its list's last member first: CONVENTIONS.md 4).
A plain-numpy path in the module (:func:`sample_field`) is a second,
independently written reference for the compiled kernel.
"""

from __future__ import annotations

import logging

import numpy as np
import pytest
import SimpleITK as sitk
from hypothesis import given, settings
from hypothesis import strategies as st
from nibabel.affines import voxel_sizes
from scipy import ndimage

from nl_unwarp.compose import (
    AffineStep,
    CoverageError,
    FactorStep,
    FieldStep,
    _Program,
    affine_pull_points,
    compose_chain,
    grid_with_margin,
    resample_chain,
    sample_factor,
    sample_field,
)
from nl_unwarp.resample import resample_volume

#: Kernel vs reference, mm: both double precision, output float32 (~1e-6 of 10 mm).
KERNEL_TOL_MM = 1e-5
#: Ours vs ITK: same trilinear rule; ITK's output field is float64, ours float32.
ITK_TOL_MM = 1e-5
LPS = np.array([-1.0, -1.0, 1.0])
#: Our one-pass sampling vs scipy.ndimage on the same points, intensities ~100 +- 40:
#: float32 output (half an ulp, 4e-6) and chain points computed in a different
#: order (~1e-12 voxel) times gradients of ~10 per voxel.
SAMPLE_ATOL = 1e-4
#: Nearest neighbour: voxels whose point lies within rounding of a voxel boundary
#: may round either way (none measured; a few allowed).
NEAREST_AGREEMENT = 0.995
FILL = -3.5


def _oblique(shape, zooms, angle_deg, centre) -> np.ndarray:
    a = np.deg2rad(angle_deg)
    rot = np.array([[np.cos(a), -np.sin(a), 0.0], [np.sin(a), np.cos(a), 0.0], [0.0, 0.0, 1.0]])
    rot = rot @ np.array([[1.0, 0.0, 0.0], [0.0, np.cos(a / 2), -np.sin(a / 2)],
                          [0.0, np.sin(a / 2), np.cos(a / 2)]])
    aff = np.eye(4)
    aff[:3, :3] = rot * np.asarray(zooms, float)
    aff[:3, 3] = np.asarray(centre, float) - aff[:3, :3] @ ((np.asarray(shape) - 1) / 2.0)
    return aff


def _field(shape, affine, seed, amplitude_mm=3.0, jacobian=False) -> FieldStep:
    rng = np.random.default_rng(seed)
    disp = rng.normal(0.0, amplitude_mm, tuple(shape) + (3,)).astype(np.float32)
    jac = rng.uniform(0.8, 1.2, tuple(shape)).astype(np.float32) if jacobian else None
    return FieldStep(disp, affine, jac)


def _interleaved(step: FieldStep) -> FieldStep:
    """The same field with displacement and Jacobian (or ones) side by side per voxel, voxels x
    fastest: the layout :func:`nl_unwarp.warp.compute_warp` makes."""
    nx, ny, nz = step.shape
    block = np.empty((nz, ny, nx, 4), np.float32).transpose(2, 1, 0, 3)
    block[..., :3] = step.disp_ras_mm
    block[..., 3] = 1.0 if step.jacobian is None else step.jacobian
    return FieldStep(block[..., :3], step.affine, None if step.jacobian is None else block[..., 3])


def _affine(seed) -> AffineStep:
    rng = np.random.default_rng(seed)
    m = np.eye(4)
    m[:3, :3] += rng.normal(0.0, 0.05, (3, 3))
    m[:3, 3] = rng.normal(0.0, 4.0, 3)
    return AffineStep(m)


def _grid_points(shape, affine) -> np.ndarray:
    ijk = np.stack(np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij"), -1)
    return ijk @ affine[:3, :3].T + affine[:3, 3]


def _reference(chain, points):
    """Plain numpy: apply each step in turn; misses recorded."""
    pts = points.reshape(-1, 3).copy()
    factor = np.ones(len(pts))
    missed = np.zeros(len(pts), bool)
    for step in chain:
        if isinstance(step, AffineStep):
            pts = affine_pull_points(step.matrix_ras, pts)
            continue
        if isinstance(step, FactorStep):
            factor *= sample_factor(step, pts)
            continue
        if step.jacobian is not None:  # the same as a factor map on the field's grid, just before it
            factor *= sample_factor(FactorStep(step.jacobian, step.affine), pts)
        disp, inside = sample_field(step, pts)
        pts = pts + disp
        missed |= ~inside
    return pts.reshape(points.shape), factor.reshape(points.shape[:-1]), missed.reshape(points.shape[:-1])


def _chain():
    g_shape = (20, 22, 18)
    w_shape = (16, 18, 20)
    g = _field(g_shape, _oblique(g_shape, (3.0, 3.0, 3.5), 12.0, (1.0, -2.0, 3.0)), 1, jacobian=True)
    w = _field(w_shape, _oblique(w_shape, (3.5, 3.0, 3.0), -8.0, (0.0, 1.0, -1.0)), 2)
    return [w, _affine(3), g]


@pytest.mark.parametrize("target", ["axis", "oblique"])
def test_kernel_matches_plain_reference(target):
    chain = _chain()
    shape = (14, 15, 13)
    if target == "axis":
        aff = np.diag([3.0, 3.0, 3.0, 1.0])
        aff[:3, 3] = -np.array(shape) * 1.5
    else:
        aff = _oblique(shape, (2.5, 3.0, 3.2), 20.0, (0, 0, 0))
    result = compose_chain(chain, shape, aff, on_outside="ignore")
    points = _grid_points(shape, aff)
    ref_pts, ref_factor, ref_missed = _reference(chain, points)
    np.testing.assert_allclose(result.disp_ras_mm, ref_pts - points, atol=KERNEL_TOL_MM)
    np.testing.assert_allclose(result.factor, ref_factor, rtol=1e-5)
    np.testing.assert_array_equal(result.uncovered, ref_missed)
    assert result.uncovered.any() and not result.uncovered.all()  # both cases exercised


def _shifted(affine, voxels) -> np.ndarray:
    """The grid moved by ``voxels`` (3,) of its own voxel steps."""
    out = affine.copy()
    out[:3, 3] = affine[:3, :3] @ np.asarray(voxels, float) + affine[:3, 3]
    return out


def _layout_chain(layout, target_shape, target_affine):
    """Chains that take each of the kernel's step kinds (checked by their program rows)."""
    w, a, g = _chain()
    g_bare = FieldStep(g.disp_ras_mm, g.affine)
    if layout == "interpolated":  # field; affine; field with a factor on its own grid
        return [w, a, g], {"field", "affine", "field+factor"}
    if layout == "own-grid factor":  # a factor map on an unrelated oblique grid
        shape = (12, 13, 11)
        factor = FactorStep(np.random.default_rng(6).uniform(0.8, 1.2, shape),
                            _oblique(shape, (3.2, 2.9, 3.6), 33.0, (2.0, 0.0, -1.0)))
        return [w, a, factor, g_bare], {"field", "affine", "factor"}
    if layout == "lattice factor":  # a smaller factor map on the field's lattice (a raw-grid Jacobian)
        shape = (14, 15, 12)
        factor = FactorStep(np.random.default_rng(7).uniform(0.8, 1.2, shape), _shifted(g.affine, (3, 4, 2)))
        return [w, a, factor, g_bare], {"field", "affine", "field+factor"}
    if layout == "nodes":  # a factor and a field on the target grid itself: read at their nodes
        rng = np.random.default_rng(8)
        factor = FactorStep(rng.uniform(0.8, 1.2, (16, 17, 15)), _shifted(target_affine, (-1, -1, -1)))
        w_nodes = FieldStep(rng.normal(0.0, 2.0, tuple(target_shape) + (3,)), target_affine)
        return [factor, w_nodes, a, g], {"factor@nodes", "field@nodes", "affine", "field+factor"}
    # A field 0.01 voxel off the target grid: not a lattice, so interpolated.
    near = FieldStep(np.random.default_rng(9).normal(0.0, 2.0, tuple(target_shape) + (3,)),
                     _shifted(target_affine, (0.01, 0.0, 0.0)))
    return [near, a, g], {"field", "affine", "field+factor"}


LAYOUTS = ["interpolated", "own-grid factor", "lattice factor", "nodes", "near-lattice"]
KIND_NAMES = {0: "affine", 1: "field", 2: "factor", 3: "field+factor", 4: "field@nodes", 5: "factor@nodes"}


@pytest.mark.parametrize("layout", LAYOUTS)
def test_every_step_kind_matches_plain_reference(layout):
    shape = (14, 15, 13)
    aff = _oblique(shape, (2.5, 3.0, 3.2), 20.0, (0, 0, 0))
    chain, kinds = _layout_chain(layout, shape, aff)
    assert {KIND_NAMES[row[0]] for row in _Program(chain, shape, aff).rows} == kinds
    result = compose_chain(chain, shape, aff, on_outside="ignore")
    points = _grid_points(shape, aff)
    ref_pts, ref_factor, ref_missed = _reference(chain, points)
    np.testing.assert_allclose(result.disp_ras_mm, ref_pts - points, atol=KERNEL_TOL_MM)
    np.testing.assert_allclose(result.factor, ref_factor, rtol=1e-5)
    np.testing.assert_array_equal(result.uncovered, ref_missed)
    assert result.uncovered.any() and not result.uncovered.all()


def _raw_image(shape, seed):
    rng = np.random.default_rng(seed)
    return (100.0 + 30.0 * ndimage.gaussian_filter(rng.normal(size=shape), 1.2, mode="wrap")
            / 0.1).astype(np.float32)


def _raw_for_sampling():
    raw_shape = (22, 20, 19)
    return _raw_image(raw_shape, 10), _oblique(raw_shape, (2.6, 2.8, 3.0), -5.0, (0.5, -0.5, 1.0))


def _scipy_at_chain_points(chain, shape, aff, raw, raw_aff, order):
    """Reference: scipy.ndimage.map_coordinates (mirror boundary, as ours) at the end points of
    the plain-numpy chain, times its factor, FILL outside the raw image; also where the raw
    image is, and the plain chain's misses."""
    ref_pts, ref_factor, ref_missed = _reference(chain, _grid_points(shape, aff))
    inv = np.linalg.inv(raw_aff)
    idx = np.moveaxis(ref_pts @ inv[:3, :3].T + inv[:3, 3], -1, 0)
    coef = ndimage.spline_filter(raw.astype(float), order=order, mode="mirror") if order > 1 else raw
    expected = ndimage.map_coordinates(coef, idx, order=order, mode="mirror", prefilter=False) * ref_factor
    inside = np.all((idx >= -0.5) & (idx <= np.array(raw.shape)[:, None, None, None] - 0.5), axis=0)
    return np.where(inside, expected, FILL), inside, ref_missed


@pytest.mark.parametrize("order", [0, 1, 2, 3])
@pytest.mark.parametrize("layout", ["interpolated", "nodes", "own-grid factor"])
def test_resample_chain_matches_scipy_at_the_chain_points(order, layout):
    """One pass (follow the chain, sample the raw image) against scipy.ndimage.map_coordinates
    (mirror boundary, as ours) at the end points of the plain-numpy chain, times its factor."""
    shape = (14, 15, 13)
    aff = _oblique(shape, (2.5, 3.0, 3.2), 20.0, (0, 0, 0))
    chain, _ = _layout_chain(layout, shape, aff)
    raw, raw_aff = _raw_for_sampling()
    got = resample_chain(raw, raw_aff, chain, shape, aff, order=order, fill=FILL, on_outside="ignore")
    expected, inside, _ = _scipy_at_chain_points(chain, shape, aff, raw, raw_aff, order)
    assert 0.2 < inside.mean() < 1.0  # both the image and the fill are exercised
    # Nearest neighbour: a voxel whose point sits on a rounding boundary may differ.
    close = np.isclose(got.data, expected, rtol=0, atol=SAMPLE_ATOL)
    assert close.mean() >= (NEAREST_AGREEMENT if order == 0 else 1.0)
    # And the same as folding the field first, then resampling through it.
    composed = compose_chain(chain, shape, aff, on_outside="ignore")
    two_pass = resample_volume(raw, raw_aff, composed.disp_ras_mm, aff, jacobian=composed.factor,
                               order=order, fill=FILL)
    assert np.isclose(got.data, two_pass, rtol=0, atol=SAMPLE_ATOL).mean() >= (
        NEAREST_AGREEMENT if order == 0 else 1.0)


def test_resample_chain_counts_only_points_inside_the_raw_image():
    shape = (6, 6, 6)
    raw = np.diag([2.0, 2.0, 2.0, 1.0])
    field = _field(shape, raw, 5, amplitude_mm=0.1)
    target = raw.copy()
    target[:3, 3] = -4.0
    image = _raw_image(shape, 11)
    result = resample_chain(image, raw, [field], shape, target, on_outside="raise")
    assert not result.uncovered.any()  # off the field = off the raw grid: filled anyway
    big = raw.copy()
    big[:3, 3] = -10.0
    with pytest.raises(CoverageError, match="identity"):
        resample_chain(_raw_image((12, 12, 12), 12), big, [field], shape, target, on_outside="raise")


def _unrolled_chain(shape_name, target_shape, target_affine):
    """Chains of the shape ``[W@nodes, A..., G]`` that the unrolled kernel takes."""
    w, a, g = _chain()
    w_nodes = FieldStep(np.random.default_rng(12).normal(0.0, 2.0, tuple(target_shape) + (3,)),
                        target_affine)
    w_larger = FieldStep(np.random.default_rng(13).normal(0.0, 2.0, (15, 17, 14, 3)),
                         _shifted(target_affine, (-1, -2, 0)))  # a grown target grid, read at nodes
    g_bare = FieldStep(g.disp_ras_mm, g.affine)
    # A smaller factor map on G's lattice (our raw-grid Jacobian inside the grown field's grid).
    lattice_factor = FactorStep(np.random.default_rng(14).uniform(0.8, 1.2, (14, 15, 12)),
                                _shifted(g.affine, (3, 4, 2)))
    # A factor map on a grid of its own (our raw-grid Jacobian before a coarser field).
    own_factor = FactorStep(np.random.default_rng(15).uniform(0.8, 1.2, (11, 13, 9)),
                            _oblique((11, 13, 9), (1.7, 2.1, 2.4), 11.0, (2.0, -1.0, 1.5)))
    # A field of one slice (a 2D acquisition's), 40 mm thick: no neighbour along its normal.
    g_slice = _field((20, 22, 1), _oblique((20, 22, 1), (3.0, 3.0, 40.0), 12.0, (1.0, -2.0, 3.0)), 16,
                     jacobian=True)
    return {"W, A, A, G+J": [w_nodes, a, _affine(4), g],
            "A, G+J on one slice": [a, g_slice],
            "W (grown), A, G": [w_larger, a, g_bare],
            "A, G+J": [a, g],
            "G+J": [g],
            "W, A": [w_nodes, a],
            "W, A, J on G's lattice, G": [w_nodes, a, lattice_factor, g_bare],
            "W, A, J on its own grid, G": [w_nodes, a, own_factor, g_bare],
            # G voxel-interleaved, as compute_warp makes warps: J its fourth channel, or a map apart.
            "W, A, A, G+J interleaved": [w_nodes, a, _affine(4), _interleaved(g)],
            "A, G+J interleaved on one slice": [a, _interleaved(g_slice)],
            "W, A, J on G's lattice, G interleaved": [w_nodes, a, lattice_factor, _interleaved(g_bare)],
            "W, A, J on its own grid, G interleaved": [w_nodes, a, own_factor, _interleaved(g_bare)],
            }[shape_name]


UNROLLED = ["W, A, A, G+J", "A, G+J on one slice", "W (grown), A, G", "A, G+J", "G+J", "W, A",
            "W, A, J on G's lattice, G", "W, A, J on its own grid, G", "W, A, A, G+J interleaved",
            "A, G+J interleaved on one slice", "W, A, J on G's lattice, G interleaved",
            "W, A, J on its own grid, G interleaved"]


@pytest.mark.parametrize("order", [0, 1, 3])
@pytest.mark.parametrize("shape_name", UNROLLED)
def test_unrolled_chains_match_scipy_at_the_chain_points(order, shape_name):
    """The unrolled kernel (chains [W, A..., G]) against scipy.ndimage.map_coordinates at the end
    points of the plain-numpy chain, times its factor; misses as the plain-numpy chain has them."""
    from nl_unwarp.compose import _unrolled_arguments

    shape = (14, 15, 13)
    aff = _oblique(shape, (2.5, 3.0, 3.2), 20.0, (0, 0, 0))
    chain = _unrolled_chain(shape_name, shape, aff)
    unrolled = _unrolled_arguments(chain, shape, aff)
    assert unrolled is not None  # the path under test
    assert unrolled[9] == ("interleaved" in shape_name)  # the packed flag: G read four channels per load
    raw, raw_aff = _raw_for_sampling()
    got = resample_chain(raw, raw_aff, chain, shape, aff, order=order, fill=FILL, on_outside="ignore")
    expected, inside, ref_missed = _scipy_at_chain_points(chain, shape, aff, raw, raw_aff, order)
    assert 0.2 < inside.mean() < 1.0
    close = np.isclose(got.data, expected, rtol=0, atol=SAMPLE_ATOL)
    assert close.mean() >= (NEAREST_AGREEMENT if order == 0 else 1.0)
    np.testing.assert_array_equal(got.uncovered, ref_missed & inside)
    # The generic program gives the same numbers (same arithmetic, step for step).
    generic = resample_chain(raw, raw_aff, chain, shape, aff, order=order, fill=FILL, on_outside="ignore",
                             unroll=False)
    np.testing.assert_allclose(got.data, generic.data, rtol=0, atol=SAMPLE_ATOL)
    np.testing.assert_array_equal(got.uncovered, generic.uncovered)


@pytest.mark.parametrize("shape_name", ["W, A, A, G+J", "A, G+J on one slice", "W, A, J on G's lattice, G",
                                        "W, A, J on its own grid, G"])
def test_interleaved_fields_give_the_planar_numbers_to_the_bit(shape_name):
    """G voxel-interleaved (one 16-byte read per corner) and G planar (three volumes) give the
    same bits: both blend the channels on vectors that round as the scalar blend does. Internal
    consistency of two layouts; the scipy test above is the outside reference for both."""
    shape = (14, 15, 13)
    aff = _oblique(shape, (2.5, 3.0, 3.2), 20.0, (0, 0, 0))
    planar = _unrolled_chain(shape_name, shape, aff)
    interleaved = [_interleaved(s) if isinstance(s, FieldStep) else s for s in planar]
    # A factor map given as one channel of a voxel-interleaved block (a warp's Jacobian).
    interleaved = [FactorStep(_interleaved(FieldStep(np.zeros(s.values.shape + (3,)), s.affine,
                                                     s.values)).jacobian, s.affine)
                   if isinstance(s, FactorStep) else s for s in interleaved]
    raw, raw_aff = _raw_for_sampling()
    for order, unroll in [(0, True), (1, True), (3, True), (3, False)]:
        a = resample_chain(raw, raw_aff, planar, shape, aff, order=order, fill=FILL, on_outside="ignore",
                           unroll=unroll)
        b = resample_chain(raw, raw_aff, interleaved, shape, aff, order=order, fill=FILL,
                           on_outside="ignore", unroll=unroll)
        np.testing.assert_array_equal(a.data, b.data)
        np.testing.assert_array_equal(a.uncovered, b.uncovered)
    a = compose_chain(planar, shape, aff, on_outside="ignore")
    b = compose_chain(interleaved, shape, aff, on_outside="ignore")
    np.testing.assert_array_equal(a.disp_ras_mm, b.disp_ras_mm)
    np.testing.assert_array_equal(a.factor, b.factor)


def test_flat_buffers_read_either_layout_without_a_copy():
    from nl_unwarp.compose import flat_buffer

    planar = np.zeros((5, 6, 7, 3), np.float32, order="F")
    flat, node, channel = flat_buffer(planar)
    assert (node, channel) == (1, 5 * 6 * 7) and np.shares_memory(flat, planar)
    warp = _interleaved(FieldStep(planar, np.eye(4), np.ones((5, 6, 7), np.float32)))
    flat, node, channel = flat_buffer(warp.disp_ras_mm)
    assert (node, channel) == (4, 1) and np.shares_memory(flat, warp.disp_ras_mm)
    flat, node, _ = flat_buffer(warp.jacobian)
    assert node == 4 and flat[0] == 1.0 and flat.size == 4 * 5 * 6 * 7 - 3
    c_order = np.arange(5 * 6 * 7, dtype=np.float32).reshape(5, 6, 7)
    flat, node, _ = flat_buffer(c_order)  # copied to Fortran order
    assert node == 1 and not np.shares_memory(flat, c_order)
    np.testing.assert_array_equal(flat, c_order.ravel(order="F"))


def test_interleaved_block_only_for_a_whole_four_channel_block():
    from nl_unwarp.compose import interleaved_block

    step = _interleaved(_field((5, 6, 7), np.eye(4), 3, jacobian=True))
    block = interleaved_block(step.disp_ras_mm)
    assert block is not None and block.size == 4 * 5 * 6 * 7
    np.testing.assert_array_equal(block.reshape(7, 6, 5, 4)[..., :3].transpose(2, 1, 0, 3), step.disp_ras_mm)
    np.testing.assert_array_equal(block[3::4], step.jacobian.ravel(order="F"))
    wide = np.zeros((7, 6, 5, 4), np.float32).transpose(2, 1, 0, 3)
    assert interleaved_block(wide[..., 1:]) is None  # its last voxel's fourth channel is past the end
    assert interleaved_block(np.zeros((5, 6, 7, 3), np.float32, order="F")) is None  # planar
    assert interleaved_block(np.zeros((5, 6, 7, 3), np.float32)) is None  # C order
    assert interleaved_block(wide[::2, :, :, :3]) is None  # every other voxel


@pytest.mark.parametrize("unroll", [True, False])
def test_nan_in_a_field_fills_its_voxels(unroll):
    """NaN displacements in the registration field fill their target voxels, unflagged, in the
    unrolled kernel and the generic program alike (the kernels' ``FAST_MATH`` leaves out ``nnan``,
    so a NaN point fails every inside test instead of becoming an index); the other voxels are
    those of the same chain without the NaNs. Robustness, no outside reference."""
    shape = (14, 15, 13)
    aff = _oblique(shape, (2.5, 3.0, 3.2), 20.0, (0, 0, 0))
    chain = _unrolled_chain("W, A, A, G+J", shape, aff)
    raw, raw_aff = _raw_for_sampling()
    clean = resample_chain(raw, raw_aff, chain, shape, aff, fill=FILL, on_outside="ignore", unroll=unroll)
    holes = np.zeros(shape, bool)
    holes[1::4, ::5, 2::3] = True
    w = chain[0].disp_ras_mm.copy()
    w[holes, 1] = np.nan
    chain = [FieldStep(w, chain[0].affine)] + chain[1:]
    got = resample_chain(raw, raw_aff, chain, shape, aff, fill=FILL, on_outside="ignore", unroll=unroll)
    assert (got.data[holes] == np.float32(FILL)).all() and not got.uncovered[holes].any()
    np.testing.assert_array_equal(got.data[~holes], clean.data[~holes])


def test_other_chain_shapes_take_the_generic_program():
    from nl_unwarp.compose import _unrolled_arguments

    shape = (14, 15, 13)
    aff = _oblique(shape, (2.5, 3.0, 3.2), 20.0, (0, 0, 0))
    w, a, g = _chain()  # w is not on the target lattice
    factor = FactorStep(np.ones((4, 4, 4)), aff)
    g_bare = FieldStep(g.disp_ras_mm, g.affine)
    # (A factor map before a bare field is unrolled, on the field's lattice or not; before a
    # field with its own Jacobian it is a second factor.)
    for chain in ([w, a, g], [a, g, a], [factor, g], [g, g], [a, g_bare, factor]):
        assert _unrolled_arguments(chain, shape, aff) is None


def test_fields_in_nifti_order_are_not_copied():
    disp = np.zeros((5, 6, 7, 3), np.float32, order="F")
    jac = np.ones((5, 6, 7), np.float32, order="F")
    step = FieldStep(disp, np.eye(4), jac)
    assert np.shares_memory(step.disp_ras_mm, disp) and np.shares_memory(step.jacobian, jac)
    assert np.shares_memory(FactorStep(jac, np.eye(4)).values, jac)
    warp = _interleaved(step)  # compute_warp's layout: kept as it is, not copied
    again = FieldStep(warp.disp_ras_mm, np.eye(4), warp.jacobian)
    assert again.disp_ras_mm is warp.disp_ras_mm and again.jacobian is warp.jacobian
    c_order = FieldStep(np.ascontiguousarray(disp), np.eye(4))
    assert c_order.disp_ras_mm.flags.f_contiguous  # converted once, to NIfTI's order


def _sitk_transform(step):
    if isinstance(step, AffineStep):
        lps = np.diag([-1.0, -1.0, 1.0, 1.0]) @ step.matrix_ras @ np.diag([-1.0, -1.0, 1.0, 1.0])
        tx = sitk.AffineTransform(3)
        tx.SetMatrix(tuple(lps[:3, :3].ravel()))
        tx.SetTranslation(tuple(lps[:3, 3]))
        return tx
    disp_lps = (step.disp_ras_mm.astype(float) * LPS).transpose(2, 1, 0, 3)
    img = sitk.GetImageFromArray(np.ascontiguousarray(disp_lps), isVector=True)
    lps_aff = np.diag([-1.0, -1.0, 1.0]) @ step.affine[:3]
    spacing = np.linalg.norm(lps_aff[:, :3], axis=0)
    img.SetSpacing(tuple(spacing))
    img.SetOrigin(tuple(lps_aff[:, 3]))
    img.SetDirection(tuple((lps_aff[:, :3] / spacing).ravel()))
    return sitk.DisplacementFieldTransform(sitk.Image(img))


def test_composed_field_matches_itk_composite_transform():
    chain = _chain()
    shape = (12, 13, 11)
    aff = _oblique(shape, (3.0, 2.8, 3.1), 5.0, (0.5, 0.0, 0.0))
    ours = compose_chain(chain, shape, aff, on_outside="ignore")
    # ITK order: the reverse of ours.
    composite = sitk.CompositeTransform([_sitk_transform(s) for s in reversed(chain)])
    ref_img = sitk.Image([int(n) for n in shape], sitk.sitkFloat32)
    lps_aff = np.diag([-1.0, -1.0, 1.0]) @ aff[:3]
    spacing = np.linalg.norm(lps_aff[:, :3], axis=0)
    ref_img.SetSpacing(tuple(spacing))
    ref_img.SetOrigin(tuple(lps_aff[:, 3]))
    ref_img.SetDirection(tuple((lps_aff[:, :3] / spacing).ravel()))
    itk_field = sitk.TransformToDisplacementField(composite, sitk.sitkVectorFloat64, ref_img.GetSize(),
                                                  ref_img.GetOrigin(), ref_img.GetSpacing(),
                                                  ref_img.GetDirection())
    itk_ras = sitk.GetArrayFromImage(itk_field).transpose(2, 1, 0, 3) * LPS
    np.testing.assert_allclose(ours.disp_ras_mm, itk_ras, atol=ITK_TOL_MM)
    # Negative control: ITK's order given as ours is far off.
    wrong = compose_chain(chain[::-1], shape, aff, on_outside="ignore")
    assert np.abs(wrong.disp_ras_mm - itk_ras).max() > 100 * ITK_TOL_MM


def test_identity_and_single_affine():
    shape = (5, 6, 7)
    aff = _oblique(shape, (2.0, 2.0, 2.0), 30.0, (3.0, 4.0, 5.0))
    assert np.all(compose_chain([], shape, aff).disp_ras_mm == 0)
    step = _affine(9)
    got = compose_chain([step], shape, aff).disp_ras_mm
    points = _grid_points(shape, aff)
    # Closed form: q - p = (M - I) p + t.
    expected = points @ (step.matrix_ras[:3, :3] - np.eye(3)).T + step.matrix_ras[:3, 3]
    np.testing.assert_allclose(got, expected, atol=KERNEL_TOL_MM)
    # Two affines fold into their matrix product (second applied after the first).
    other = _affine(10)
    both = compose_chain([step, other], shape, aff).disp_ras_mm
    prod = other.matrix_ras @ step.matrix_ras
    np.testing.assert_allclose(both, points @ (prod[:3, :3] - np.eye(3)).T + prod[:3, 3],
                               atol=KERNEL_TOL_MM)


def test_jacobian_factors_multiply_where_each_step_is_applied():
    shape = (10, 10, 10)
    aff = np.diag([2.0, 2.0, 2.0, 1.0])
    aff[:3, 3] = -9.0
    ijk = np.stack(np.meshgrid(*[np.arange(10.0)] * 3, indexing="ij"), -1)
    # Jacobian map linear in x, so trilinear sampling is exact: J(x) = 1 + 0.01 x.
    jac = (1.0 + 0.01 * (ijk @ aff[:3, :3].T + aff[:3, 3])[..., 0]).astype(np.float32)
    g = FieldStep(np.zeros(shape + (3,), np.float32), aff, jac)
    shift = np.eye(4)
    shift[0, 3] = 3.0
    result = compose_chain([AffineStep(shift), g, g], (3, 3, 3), np.diag([1.0, 1.0, 1.0, 1.0]))
    x = _grid_points((3, 3, 3), np.eye(4))[..., 0] + 3.0
    np.testing.assert_allclose(result.factor, (1.0 + 0.01 * x) ** 2, rtol=1e-6)
    assert compose_chain([AffineStep(shift)], (2, 2, 2), np.eye(4)).factor is None


def test_coverage_warns_raises_or_ignores(caplog):
    shape = (6, 6, 6)
    field = _field(shape, np.diag([2.0, 2.0, 2.0, 1.0]), 4, amplitude_mm=0.1)
    target = np.diag([2.0, 2.0, 2.0, 1.0])
    target[:3, 3] = -4.0  # reaches 4 mm beyond the field's first voxels
    with caplog.at_level(logging.WARNING, logger="nl_unwarp"):
        result = compose_chain([field], shape, target)
    assert result.uncovered.any() and "identity" in caplog.text
    with pytest.raises(CoverageError, match="outside"):
        compose_chain([field], shape, target, on_outside="raise")
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="nl_unwarp"):
        compose_chain([field], shape, target, on_outside="ignore")
    assert caplog.text == ""


def test_points_landing_outside_the_raw_image_do_not_count():
    # A field exactly on the raw grid: a target point off the field lands
    # (identity) off the raw grid too, where the image is filled anyway.
    shape = (6, 6, 6)
    raw = np.diag([2.0, 2.0, 2.0, 1.0])
    field = _field(shape, raw, 5, amplitude_mm=0.1)
    target = raw.copy()
    target[:3, 3] = -4.0
    result = compose_chain([field], shape, target, raw_shape=shape, raw_affine=raw, on_outside="raise")
    assert not result.uncovered.any()
    # A larger raw image than the field: the same points now count.
    big = raw.copy()
    big[:3, 3] = -10.0
    with pytest.raises(CoverageError):
        compose_chain([field], shape, target, raw_shape=(12, 12, 12), raw_affine=big, on_outside="raise")


@pytest.mark.parametrize("margin_mm", [0.0, 5.0, 16.0])
def test_grid_with_margin(margin_mm):
    shape = (10, 1, 8)
    aff = _oblique(shape, (2.0, 3.0, 2.5), 15.0, (1.0, 2.0, 3.0))
    new_shape, new_aff = grid_with_margin(shape, aff, margin_mm)
    zooms = np.array([2.0, 3.0, 2.5])
    pad = np.ceil(margin_mm / zooms).astype(int)
    assert new_shape == tuple(int(n) for n in np.array(shape) + 2 * pad)
    # Old voxel 0 is new voxel ``pad``: same world point.
    np.testing.assert_allclose(new_aff[:3, :3] @ pad + new_aff[:3, 3], aff[:3, 3], atol=1e-9)
    np.testing.assert_allclose(new_aff[:3, :3], aff[:3, :3])
    assert np.all(pad * zooms >= margin_mm - 1e-9)


@given(spacing=st.floats(0.7, 4.0), margin=st.floats(0.0, 25.0), angle=st.floats(-40.0, 40.0),
       single=st.booleans())
@settings(max_examples=40, deadline=None)
def test_grid_with_margin_at_another_spacing_covers_the_grid(spacing, margin, angle, single):
    """With ``spacing_mm`` the new grid keeps the axes, has that voxel size (nibabel's
    ``voxel_sizes`` as the reference) and holds every point within ``margin`` of the old
    voxel-centre box: its 8 corners moved out by the margin along each axis land inside the new
    voxel-centre box (continuous index in [0, n - 1]). Tolerance 1e-6 voxel (float rounding)."""
    shape = (10, 1 if single else 7, 8)
    aff = _oblique(shape, (2.0, 3.0, 1.2), angle, (1.0, 2.0, 3.0))
    new_shape, new_aff = grid_with_margin(shape, aff, margin, spacing_mm=spacing)
    np.testing.assert_allclose(voxel_sizes(new_aff), spacing, rtol=1e-12)
    old_axes = aff[:3, :3] / voxel_sizes(aff)
    np.testing.assert_allclose(new_aff[:3, :3] / spacing, old_axes, atol=1e-12)
    zooms = voxel_sizes(aff)
    corners = np.array(np.meshgrid(*[[0.0, n - 1.0] for n in shape], indexing="ij")).reshape(3, -1).T
    signs = np.where(corners > 0, 1.0, -1.0)
    # Out by the margin along each axis, in the old grid's voxel units.
    grown = corners + signs * margin / zooms
    world = grown @ aff[:3, :3].T + aff[:3, 3]
    index = (world - new_aff[:3, 3]) @ np.linalg.inv(new_aff[:3, :3]).T
    assert np.all(index >= -1e-6) and np.all(index <= np.array(new_shape) - 1 + 1e-6)
    # No more than one voxel of slack on each side.
    span_mm = (np.array(shape) - 1) * zooms + 2 * margin
    assert np.all(np.array(new_shape) - 1 <= span_mm / spacing + 1)


def test_bad_steps_are_refused():
    with pytest.raises(ValueError, match="last row"):
        AffineStep(np.ones((4, 4)))
    with pytest.raises(ValueError, match=r"\(X, Y, Z, 3\)"):
        FieldStep(np.zeros((3, 3, 3)), np.eye(4))
    with pytest.raises(ValueError, match="jacobian"):
        FieldStep(np.zeros((3, 3, 3, 3)), np.eye(4), np.ones((2, 2, 2)))
    with pytest.raises(TypeError):
        compose_chain(["not a step"], (2, 2, 2), np.eye(4))
    with pytest.raises(ValueError, match="on_outside"):
        compose_chain([], (2, 2, 2), np.eye(4), on_outside="sometimes")
