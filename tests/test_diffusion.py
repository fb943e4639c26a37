"""The coil tensor and effective diffusion weighting, checked against outside references.

* A linear gradient system has a constant gradient (definition): L = I, b unchanged.
* Biot-Savart coils (magpylib, ``tests/coils.py``): the tensor of a model fitted to
  their fields matches numerical derivatives of the field itself, with the transposition
  L = J^T that the field law needs (the untransposed Jacobian does not match).
* Frames: L in the b-vector frame against a brute-force derivative of the summed coil
  fields in world coordinates, for oblique grids, both affine handednesses and non-HFS
  patient positions.
* b_eff = b |L g|^2 and g_eff = L g / |L g| against the b-matrix transform b' = L b L^T
  (Bammer et al., Magn Reson Med 2003, from memory).
* dipy: ``gradient_table`` accepts our tables; a ``TensorModel`` fit of an isotropic
  phantom recovers the true ADC with our per-voxel tables, and with the nominal table is
  off by the predicted tr(L^T L)/3.
"""

from __future__ import annotations

import numpy as np
import pytest
from coils import AXES, coil_set
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.spatial.transform import Rotation

from nl_unwarp.coil import CoilModel
from nl_unwarp.diffusion import (
    TENSOR_COMPONENTS,
    apparent_md_ratio,
    coil_tensor_at,
    compute_coil_tensor,
    effective_volume,
    effective_weighting,
    mask_mean_table,
    shell_deviation,
    split_shells,
    weighting_summary,
)
from nl_unwarp.errors import InputError
from nl_unwarp.fit import fit_coil
from nl_unwarp.frames import DeviceFrame, offset_from_table_position
from nl_unwarp.io.atomic import OutputSet
from nl_unwarp.io.bvals import ras_from_bvec_frame, read_bvals, read_bvecs, write_bvals, write_bvecs
from nl_unwarp.warp import index_to_ras

#: Double-precision rounding through a handful of 3 x 3 products.
EXACT_TOL = 1e-12
#: Values on the grid are float32 (relative rounding ~6e-8 of entries near 1).
FLOAT32_TOL = 1e-6
#: Biot-Savart check: a degree-9 fit to samples on a 150 mm sphere leaves 1.7e-5 in the
#: derivatives at 20-120 mm (measured); five-point differences with 0.5 mm steps add
#: O(h^4) ~ 1e-9. The untransposed Jacobian is off by 3e-2 there (measured).
BIOT_SAVART_TOL = 1e-4
BIOT_SAVART_WRONG = 1e-2
#: Finite-difference step (mm) and tolerance of the world-frame brute force: central
#: differences of a smooth series, error O(h^2 u''') ~ 1e-9 for 0.01 mm steps.
FD_STEP_MM = 0.01
FD_TOL = 1e-7
#: The task's aim: the corrected ADC within 1 % of the truth.
ADC_TOL = 0.01
#: Noise-free signals fit exactly: the nominal-table ADC bias must match the prediction
#: to this (relative), float32 tensor rounding included.
PREDICTION_TOL = 1e-4
#: Before correction the bias must exceed this somewhere (relative), else the test
#: would not show that the correction does anything.
LEAST_BIAS = 0.03
#: True diffusivity of the isotropic phantom, mm^2/s (free water near 20 C is ~2e-3;
#: this is the brain-like order of magnitude, any value works).
ADC_MM2_PER_S = 1.0e-3


def oblique_affine(zooms, angles_deg, centre_ras_mm, shape, *, flip_first: bool = False):
    """Voxel -> RAS affine: rotated axes, given voxel sizes, grid centred on ``centre_ras_mm``."""
    rot = Rotation.from_euler("xyz", angles_deg, degrees=True).as_matrix()
    m = rot @ np.diag(zooms)
    if flip_first:
        m[:, 0] = -m[:, 0]
    affine = np.eye(4)
    affine[:3, :3] = m
    affine[:3, 3] = np.asarray(centre_ras_mm) - m @ ((np.asarray(shape) - 1) / 2)
    return affine


def unit_vectors(rng, count):
    v = rng.normal(size=(count, 3))
    return v / np.linalg.norm(v, axis=1, keepdims=True)


# --- io: the b-table files ---------------------------------------------------------------------


def test_bval_bvec_files_round_trip(tmp_path, rng):
    bvals = np.r_[0.0, rng.uniform(900, 1100, 5).round(2), 2000.0]
    bvecs = np.vstack([np.zeros(3), unit_vectors(rng, 6)])
    with OutputSet() as out:
        write_bvals(out, tmp_path / "a.bval", bvals)
        write_bvecs(out, tmp_path / "a.bvec", bvecs)
    # BIDS: one row of b-values, three rows (x, y, z) of vectors.
    assert len((tmp_path / "a.bval").read_text().splitlines()) == 1
    assert len((tmp_path / "a.bvec").read_text().splitlines()) == 3
    np.testing.assert_allclose(read_bvals(tmp_path / "a.bval"), bvals, rtol=1e-6)
    np.testing.assert_allclose(read_bvecs(tmp_path / "a.bvec"), bvecs, atol=1e-8)


def test_bvec_reader_refuses_what_is_not_a_table(tmp_path):
    (tmp_path / "bad.bvec").write_text("0 1 0 0\n0 0 1\n0 0 0 1\n")
    with pytest.raises(InputError, match="rows of different lengths"):
        read_bvecs(tmp_path / "bad.bvec")
    (tmp_path / "long.bvec").write_text("0 2 0\n0 0 1\n0 0 0\n")
    with pytest.raises(InputError, match="volume 1: b-vector norm 2"):
        read_bvecs(tmp_path / "long.bvec")
    (tmp_path / "neg.bval").write_text("0 -1000\n")
    with pytest.raises(InputError, match="non-negative"):
        read_bvals(tmp_path / "neg.bval")


@pytest.mark.parametrize("flip_first", [False, True])
def test_bvec_frame_follows_fsl_voxel_axes(flip_first):
    """FSL convention (from memory): vectors along the voxel axes, the first reversed when det > 0."""
    affine = oblique_affine((2.0, 2.5, 3.0), (12, -20, 35), (0, 0, 0), (10, 10, 10), flip_first=flip_first)
    m = affine[:3, :3]
    frame = ras_from_bvec_frame(affine)
    # FSL's first axis runs along +i for radiological storage (det < 0), along -i otherwise.
    first = m[:, 0] / np.linalg.norm(m[:, 0]) * (-1 if np.linalg.det(m) > 0 else 1)
    np.testing.assert_allclose(frame[:, 0], first, atol=EXACT_TOL)
    np.testing.assert_allclose(frame[:, 1:], m[:, 1:] / np.linalg.norm(m[:, 1:], axis=0), atol=EXACT_TOL)
    # Whatever the storage, the FSL frame is radiological: det of the frame is -1.
    assert np.linalg.det(frame) == pytest.approx(-1.0)
    sheared = affine.copy()
    sheared[0, 1] += 0.5
    with pytest.raises(ValueError, match="not orthogonal"):
        ras_from_bvec_frame(sheared)


# --- linear system --------------------------------------------------------------------------------


def test_linear_system_gives_identity_and_nominal_table(rng):
    shape = (9, 8, 7)
    affine = oblique_affine((3.0, 3.0, 4.0), (15, -10, 25), (20, -30, 40), shape)
    frame = DeviceFrame("FFDR", offset_from_table_position((5, -8, 30)))
    field = compute_coil_tensor(CoilModel.ideal(), shape, affine, frame,
                                ras_from_bvec=ras_from_bvec_frame(affine))
    np.testing.assert_allclose(field.tensor.reshape(-1, 9), np.tile(np.eye(3).ravel(), (np.prod(shape), 1)),
                               atol=FLOAT32_TOL)
    bvals = np.r_[0.0, 1000.0, 1000.0, 3000.0]
    bvecs = np.vstack([np.zeros(3), unit_vectors(rng, 3)])
    b_eff, g_eff = effective_weighting(field.matrices(), bvals, bvecs)
    np.testing.assert_allclose(b_eff, np.broadcast_to(bvals, b_eff.shape), rtol=FLOAT32_TOL)
    np.testing.assert_allclose(g_eff, np.broadcast_to(bvecs, g_eff.shape), atol=FLOAT32_TOL)
    summary, maps = weighting_summary(field, bvals, bvecs, np.ones(shape, bool))
    assert [s["bval"] for s in summary["shells"]] == [1000.0, 3000.0]
    assert np.abs(maps).max() < FLOAT32_TOL * 3


# --- Biot-Savart coils ----------------------------------------------------------------------------


@pytest.fixture(scope="module")
def biot_savart():
    """Golay/Maxwell coils and a degree-9 harmonic model fitted to their fields."""
    rng = np.random.default_rng(20260501)
    coils = coil_set()
    points = 150.0 * unit_vectors(rng, 1200)
    samples = {a: (points, coils[a].encoded_mm(points)) for a in AXES}
    model, _ = fit_coil(samples, degree=9, reference_radius_mm=150.0, valid_radius_mm=150.0,
                        label="Biot-Savart test coils")
    return coils, model


def field_derivatives(coils, points_device_mm, step_mm=0.5):
    """d u_c / d r_k of the Biot-Savart fields, five-point central differences: [n, k, c]."""
    out = np.empty((len(points_device_mm), 3, 3))

    def encoded(p):
        return np.stack([coils[a].encoded_mm(p) for a in AXES], -1)

    for k in range(3):
        e = np.eye(3)[k] * step_mm
        p = points_device_mm
        out[:, k, :] = (-encoded(p + 2 * e) + 8 * encoded(p + e) - 8 * encoded(p - e)
                        + encoded(p - 2 * e)) / (12 * step_mm)
    return out


def test_tensor_matches_biot_savart_field_derivatives(biot_savart, rng):
    coils, model = biot_savart
    points = unit_vectors(rng, 25) * rng.uniform(20, 120, (25, 1))
    # HFS with no offset: device = LPS, and the b-vector frame chosen as the device axes.
    frame = DeviceFrame("HFS")
    lmat = coil_tensor_at(model, frame, frame.to_ras(points), frame.ras_from_device)
    truth = field_derivatives(coils, points)
    np.testing.assert_allclose(lmat, truth, atol=BIOT_SAVART_TOL)
    # The encoding Jacobian itself (not transposed) is not the gradient map.
    _, jac = model.encode(points)
    assert np.abs(jac - truth).max() > BIOT_SAVART_WRONG


# --- frames ---------------------------------------------------------------------------------------


def world_gradient_brute_force(coil, frame, affine, point_ras, bvec):
    """Applied gradient per unit nominal gradient, in FSL bvec axes, from world-space differences.

    The nominal direction is turned into world coordinates from the FSL definition of
    the axes (first voxel axis reversed when det > 0, from memory), the coil amplitudes
    are its device components, and the summed encoded field is differentiated along
    world axes; the result is projected back on the FSL axes.
    """
    m = affine[:3, :3]
    axes = m / np.linalg.norm(m, axis=0)
    if np.linalg.det(m) > 0:
        axes[:, 0] = -axes[:, 0]
    amplitudes = frame.device_from_ras @ (axes @ bvec)

    def total_field(p_ras):
        u, _ = coil.encode(frame.to_device(p_ras), jacobian=False)
        return u @ amplitudes

    grad = np.array([(total_field(point_ras + FD_STEP_MM * e) - total_field(point_ras - FD_STEP_MM * e))
                     / (2 * FD_STEP_MM) for e in np.eye(3)])
    return np.linalg.solve(axes, grad)


@pytest.mark.parametrize(("position", "flip_first"), [("FFDR", False), ("HFP", True), ("HFS", True),
                                                      ("FFS", False)])
def test_tensor_in_bvec_frame_matches_world_brute_force(demo_coil, rng, position, flip_first):
    shape = (20, 18, 12)
    affine = oblique_affine((2.5, 2.5, 4.0), (18, -12, 30), (30, -25, 60), shape, flip_first=flip_first)
    frame = DeviceFrame(position, offset_from_table_position((10, -5, 40)))
    field = compute_coil_tensor(demo_coil, shape, affine, frame, ras_from_bvec=ras_from_bvec_frame(affine))
    ijk = np.stack([rng.integers(0, n, 6) for n in shape], -1)
    for voxel in ijk:
        lmat = field.tensor[tuple(voxel)].astype(float).reshape(3, 3)
        point = index_to_ras(affine, voxel.astype(float))
        for g in unit_vectors(rng, 2):
            expected = world_gradient_brute_force(demo_coil, frame, affine, point, g)
            # float32 storage of the grid tensor and the lattice's error bound the match.
            np.testing.assert_allclose(lmat @ g, expected, atol=FD_TOL + 2 * field.interpolation_error
                                       + FLOAT32_TOL)
    assert np.abs(field.matrices() - np.eye(3)).max() > 0.01, "the test region shows no nonlinearity"


def test_grid_tensor_matches_direct_evaluation(demo_coil, rng):
    shape = (40, 36, 30)
    affine = oblique_affine((3.0, 3.0, 3.5), (5, 10, -20), (0, 10, 30), shape)
    frame = DeviceFrame("HFS")
    frame_rot = ras_from_bvec_frame(affine)
    field = compute_coil_tensor(demo_coil, shape, affine, frame, ras_from_bvec=frame_rot, seed=3)
    ijk = np.stack([rng.integers(0, n, 500) for n in shape], -1)
    direct = coil_tensor_at(demo_coil, frame, index_to_ras(affine, ijk.astype(float)), frame_rot)
    got = field.tensor[tuple(ijk.T)].reshape(-1, 3, 3)
    # The lattice is held to 1e-4 per component at other (seeded) voxels; float32 adds 1e-7.
    np.testing.assert_allclose(got, direct, atol=1e-4 + FLOAT32_TOL)
    assert TENSOR_COMPONENTS[1] == "xy" and TENSOR_COMPONENTS[3] == "yx"
    np.testing.assert_allclose(field.tensor[2, 3, 4, 1], direct_at(demo_coil, frame, affine, frame_rot,
                                                                   (2, 3, 4))[0, 1], atol=1e-4)


def direct_at(coil, frame, affine, frame_rot, voxel):
    return coil_tensor_at(coil, frame, index_to_ras(affine, np.asarray(voxel, float)), frame_rot)


@settings(max_examples=25, deadline=None)
@given(angles=st.tuples(*[st.floats(-180, 180)] * 3), seed=st.integers(0, 2**16))
def test_effective_weighting_does_not_depend_on_the_frame(angles, seed):
    """Rotating tensor and vectors together leaves b_eff unchanged and rotates g_eff."""
    rng = np.random.default_rng(seed)
    lmat = np.eye(3) + 0.1 * rng.normal(size=(4, 3, 3))
    g = unit_vectors(rng, 5)
    b = rng.uniform(500, 3000, 5)
    s = Rotation.from_euler("xyz", angles, degrees=True).as_matrix()
    b1, g1 = effective_weighting(lmat, b, g)
    b2, g2 = effective_weighting(s.T @ lmat @ s, b, g @ s)
    np.testing.assert_allclose(b1, b2, rtol=1e-10)
    np.testing.assert_allclose(g1 @ s, g2, atol=1e-10)
    np.testing.assert_allclose(apparent_md_ratio(lmat), apparent_md_ratio(s.T @ lmat @ s), rtol=1e-12)


# --- the weighting itself -------------------------------------------------------------------------


def test_effective_weighting_is_the_transformed_b_matrix(rng):
    """Bammer et al. 2003 (from memory): b' = L b L^T with b = b g g^T."""
    lmat = np.eye(3) + 0.08 * rng.normal(size=(6, 3, 3))
    g = np.vstack([np.zeros(3), unit_vectors(rng, 4)])
    b = np.r_[0.0, 1000.0, 1000.0, 2000.0, 3000.0]
    b_eff, g_eff = effective_weighting(lmat, b, g)
    for v in range(6):
        for n in range(5):
            bmat = lmat[v] @ (b[n] * np.outer(g[n], g[n])) @ lmat[v].T
            w, vec = np.linalg.eigh(bmat)
            assert b_eff[v, n] == pytest.approx(np.trace(bmat), rel=1e-12, abs=1e-9)
            if b[n] > 0:
                # Rank one: the principal eigenvector, up to sign.
                assert abs(vec[:, -1] @ g_eff[v, n]) == pytest.approx(1.0, abs=1e-12)
            else:
                assert not g_eff[v, n].any()


def test_grid_kernels_match_the_plain_formula(demo_coil, rng):
    shape = (16, 14, 10)
    affine = oblique_affine((6.0, 6.0, 8.0), (0, 15, 0), (20, 0, 50), shape)
    field = compute_coil_tensor(demo_coil, shape, affine, DeviceFrame("HFS"),
                                ras_from_bvec=ras_from_bvec_frame(affine))
    g = unit_vectors(rng, 7)
    b_eff, g_eff = effective_weighting(field.matrices(), np.ones(7), g)
    mean, lo, hi = shell_deviation(field.tensor, g)
    np.testing.assert_allclose(mean.ravel(order="F"), (b_eff - 1).mean(-1), atol=FLOAT32_TOL)
    np.testing.assert_allclose(lo.ravel(order="F"), (b_eff - 1).min(-1), atol=FLOAT32_TOL)
    np.testing.assert_allclose(hi.ravel(order="F"), (b_eff - 1).max(-1), atol=FLOAT32_TOL)
    scale, direction = effective_volume(field.tensor, g[3])
    np.testing.assert_allclose(scale.ravel(order="F"), b_eff[:, 3], rtol=FLOAT32_TOL)
    np.testing.assert_allclose(direction.reshape(-1, 3, order="F"), g_eff[:, 3], atol=FLOAT32_TOL)


def test_split_shells():
    bvals = np.array([0, 5, 1000, 995, 1010, 2000, 2005, 60, 3000])
    shells = split_shells(bvals)
    assert [s.bval for s in shells] == [60.0, 1000.0, 2002.5, 3000.0]
    assert shells[1].volumes == (2, 3, 4)
    assert split_shells(np.zeros(4)) == []


def test_summary_figures_and_mask_table(demo_coil, rng):
    shape = (20, 20, 16)
    affine = oblique_affine((8.0, 8.0, 8.0), (0, 0, 0), (0, 0, 40), shape)
    field = compute_coil_tensor(demo_coil, shape, affine, DeviceFrame("HFS"),
                                ras_from_bvec=ras_from_bvec_frame(affine))
    bvals = np.r_[0, np.full(12, 1000.0), np.full(12, 2500.0)]
    bvecs = np.vstack([np.zeros(3), unit_vectors(rng, 24)])
    mask = np.zeros(shape, bool)
    mask[4:16, 4:16, 3:13] = True
    summary, maps = weighting_summary(field, bvals, bvecs, mask)
    assert maps.shape == shape + (2,)
    b_eff, _ = effective_weighting(field.matrices(mask), bvals, bvecs)
    dev = b_eff[:, 1:13] / 1000.0 - 1
    first = summary["shells"][0]
    assert first["median_deviation"] == pytest.approx(np.median(dev.mean(-1)), abs=FLOAT32_TOL)
    assert first["max_deviation"] == pytest.approx(dev.max(), abs=FLOAT32_TOL)
    assert first["min_deviation"] == pytest.approx(dev.min(), abs=FLOAT32_TOL)
    assert summary["mask_voxels"] == mask.sum()
    mean_b, mean_g = mask_mean_table(field, mask, bvals, bvecs)
    assert mean_b[0] == 0 and np.allclose(np.linalg.norm(mean_g[1:], axis=1), 1)
    with pytest.raises(ValueError, match="mask is empty"):
        weighting_summary(field, bvals, bvecs, np.zeros(shape, bool))


# --- dipy -----------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def isotropic_phantom():
    """An isotropic medium seen through the demo gradients, far from the isocenter.

    Signals are simulated in the device frame straight from the coil model's Jacobian
    (independently of the grid, frames and file conventions used to correct them).
    """
    from nl_unwarp.demo import demo_coil_path
    from nl_unwarp.io.coilfile import load_coil

    rng = np.random.default_rng(20260502)
    coil = load_coil(demo_coil_path())
    shape = (9, 9, 7)
    affine = oblique_affine((18.0, 18.0, 20.0), (10, -5, 20), (10, -20, 30), shape, flip_first=True)
    frame = DeviceFrame("FFS", offset_from_table_position((0, 0, 30)))
    ras_from_bvec = ras_from_bvec_frame(affine)
    field = compute_coil_tensor(coil, shape, affine, frame, ras_from_bvec=ras_from_bvec)
    bvals = np.r_[0.0, 0.0, np.full(30, 1000.0)]
    bvecs = np.vstack([np.zeros((2, 3)), unit_vectors(rng, 30)])
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), -1).reshape(-1, 3)
    _, jac = coil.encode(frame.to_device(index_to_ras(affine, ijk.astype(float))))
    g_dev = bvecs @ (frame.device_from_ras @ ras_from_bvec).T
    applied = np.einsum("vck,nc->vnk", jac, g_dev)   # L_dev g = J^T g
    signal = 100.0 * np.exp(-bvals * np.sum(applied**2, -1) * ADC_MM2_PER_S)
    matrices = field.tensor[tuple(ijk.T)].astype(float).reshape(-1, 3, 3)
    return field, matrices, bvals, bvecs, signal


def test_dipy_accepts_our_tables(isotropic_phantom, tmp_path):
    from dipy.core.gradients import gradient_table
    from dipy.io.gradients import read_bvals_bvecs

    field, matrices, bvals, bvecs, _ = isotropic_phantom
    b_eff, g_eff = effective_weighting(matrices, bvals, bvecs)
    for v in (0, len(matrices) // 2, len(matrices) - 1):
        gtab = gradient_table(b_eff[v], bvecs=g_eff[v])
        np.testing.assert_array_equal(gtab.b0s_mask, bvals == 0)
    mean_b, mean_g = mask_mean_table(field, np.ones(field.shape, bool), bvals, bvecs)
    with OutputSet() as out:
        write_bvals(out, tmp_path / "mean.bval", mean_b)
        write_bvecs(out, tmp_path / "mean.bvec", mean_g)
    read_b, read_g = read_bvals_bvecs(str(tmp_path / "mean.bval"), str(tmp_path / "mean.bvec"))
    np.testing.assert_allclose(read_b, mean_b, rtol=1e-5)
    np.testing.assert_allclose(read_g, mean_g, atol=1e-7)
    assert gradient_table(read_b, bvecs=read_g).bvals.shape == (len(bvals),)


def test_dipy_tensor_fit_recovers_the_adc(isotropic_phantom):
    from dipy.core.gradients import gradient_table
    from dipy.reconst.dti import TensorModel

    field, matrices, bvals, bvecs, signal = isotropic_phantom
    b_eff, g_eff = effective_weighting(matrices, bvals, bvecs)
    nominal = TensorModel(gradient_table(bvals, bvecs=bvecs)).fit(signal).md
    corrected = np.array([TensorModel(gradient_table(b_eff[v], bvecs=g_eff[v])).fit(signal[v]).md
                          for v in range(len(matrices))])
    np.testing.assert_allclose(corrected, ADC_MM2_PER_S, rtol=ADC_TOL)
    predicted = apparent_md_ratio(matrices)
    np.testing.assert_allclose(nominal / ADC_MM2_PER_S, predicted, rtol=PREDICTION_TOL)
    assert np.abs(nominal / ADC_MM2_PER_S - 1).max() > LEAST_BIAS
