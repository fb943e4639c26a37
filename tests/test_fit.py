"""Least-squares fitting of harmonic coil models (nl_unwarp.fit).

Synthetic samples are evaluated with scipy.special (independent of our
recurrences); physical samples come from magpylib's Biot-Savart fields, which
are checked here against the closed-form field of a current loop.
"""

from __future__ import annotations

import json
from math import factorial

import numpy as np
import pytest
from coils import COIL_RADIUS_M, MAXWELL_HALF_SPACING, bz_tesla, coil_set, encode_direct, loop_pair
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.constants import mu_0
from scipy.special import eval_gegenbauer, lpmv

from nl_unwarp.coil import AXES, LINEAR_TERMS, AxisExpansion, CoilModel
from nl_unwarp.errors import InputError
from nl_unwarp.fit import (
    encoded_from_field,
    fit_axis,
    fit_coil,
    fit_samples,
    fit_terms,
    term_allowed,
    valid_radius_from_samples,
)
from nl_unwarp.io.coilfile import load_coil, save_coil

#: Noise-free samples of a model inside the fitted basis: only rounding remains
#: (coefficients are O(0.1), the design is well conditioned).
EXACT_TOL = 1e-11
#: magpylib against the closed form: both are double-precision evaluations of
#: the same law (elliptic integrals vs. a power), relative.
CLOSED_FORM_RTOL = 1e-10
#: Leakage of unfitted degrees (>= 13, relative size ~(0.5 a / sqrt(a^2 + d^2))^12)
#: into fitted coefficients with random (not exactly orthogonal) sampling; measured
#: <= 6e-6 of the linear term at degree 11 with 1500 samples. Relative to alpha_10.
LEAKAGE_TOL = 2e-5
#: At Maxwell's spacing alpha_30 is zero up to leakage (measured 2.5e-6 of alpha_50).
MAXWELL_TOL = 1e-4

#: Nominal gradient dividing the loop-pair fields (any value: the fit is linear).
NOMINAL_T_PER_M = 1e-5
LOOP_CURRENT_A = 1.0


def schmidt_reference(points: np.ndarray, n: int, m: int) -> tuple[np.ndarray, np.ndarray]:
    """C_n^m, S_n^m from scipy.special.lpmv (with the Condon-Shortley phase removed).

    Schmidt factor sqrt((2 - delta_m0) (n - m)! / (n + m)!), as in CONVENTIONS.md section 2.
    """
    x, y, z = points.T
    rho = np.sqrt(x * x + y * y + z * z)
    cos_t = np.divide(z, rho, out=np.ones_like(z), where=rho > 0)
    phi = np.arctan2(y, x)
    norm = np.sqrt((2 - (m == 0)) * factorial(n - m) / factorial(n + m))
    radial = rho**n * norm * (-1) ** m * lpmv(m, n, cos_t)
    return radial * np.cos(m * phi), radial * np.sin(m * phi)


def random_expansion(rng, degree: int, orders=None) -> tuple[np.ndarray, np.ndarray]:
    alpha = np.zeros((degree + 1, degree + 1))
    beta = np.zeros_like(alpha)
    for kind, n, m in fit_terms(degree, orders):
        (alpha if kind == "cos" else beta)[n, m] = rng.normal(scale=0.1)
    return alpha, beta


def reference_encoded(points_mm, alpha, beta, r0_mm) -> np.ndarray:
    """R0 * sum(alpha C + beta S) at points / R0, from the scipy reference harmonics."""
    total = np.zeros(len(points_mm))
    for n in range(alpha.shape[0]):
        for m in range(n + 1):
            c, s = schmidt_reference(points_mm / r0_mm, n, m)
            total += alpha[n, m] * c + beta[n, m] * s
    return r0_mm * total


def ball_points(rng, count: int, radius_mm: float) -> np.ndarray:
    """Uniform random points in a ball (seeded by the caller's generator)."""
    v = rng.normal(size=(count, 3))
    return v / np.linalg.norm(v, axis=1, keepdims=True) * radius_mm * rng.uniform(0, 1, (count, 1)) ** (1 / 3)


def sphere_points(rng, count: int, radius_mm: float) -> np.ndarray:
    v = rng.normal(size=(count, 3))
    return radius_mm * v / np.linalg.norm(v, axis=1, keepdims=True)


@pytest.mark.parametrize("degree", [3, 8])
def test_fit_recovers_known_coefficients(rng, degree):
    alpha, beta = random_expansion(rng, degree)
    points = ball_points(rng, 800, 180.0)
    encoded = reference_encoded(points, alpha, beta, 200.0)
    axis, report = fit_axis(points, encoded, degree=degree, reference_radius_mm=200.0, valid_radius_mm=180.0)
    np.testing.assert_allclose(axis.alpha, alpha, rtol=0, atol=EXACT_TOL)
    np.testing.assert_allclose(axis.beta, beta, rtol=0, atol=EXACT_TOL)
    assert report.residual_max_mm < 1e3 * EXACT_TOL
    assert (report.samples, report.terms) == (800, (degree + 1) ** 2)
    assert (axis.reference_radius_mm, axis.valid_radius_mm) == (200.0, 180.0)


def test_condition_number_is_that_of_the_normalised_design(rng):
    # Reference: numpy.linalg.cond of the column-normalised design, built from scipy harmonics.
    points = sphere_points(rng, 300, 150.0)
    degree = 4
    terms = fit_terms(degree)
    cols = [schmidt_reference(points / 150.0, n, m)[0 if kind == "cos" else 1] for kind, n, m in terms]
    design = np.stack(cols, -1)
    expected = np.linalg.cond(design / np.linalg.norm(design, axis=0))
    _, report = fit_axis(points, points[:, 2], degree=degree, reference_radius_mm=150.0,
                         valid_radius_mm=150.0)
    assert report.condition_number == pytest.approx(expected, rel=1e-9)


def test_orders_restrict_the_fitted_terms(rng):
    alpha, beta = random_expansion(rng, 6, orders=[0, 2])
    points = ball_points(rng, 400, 150.0)
    encoded = reference_encoded(points, alpha, beta, 150.0)
    axis, report = fit_axis(points, encoded, degree=6, reference_radius_mm=150.0, valid_radius_mm=150.0,
                            orders=[0, 2])
    np.testing.assert_allclose(axis.alpha, alpha, atol=EXACT_TOL)
    np.testing.assert_allclose(axis.beta, beta, atol=EXACT_TOL)
    assert report.terms == 7 + 2 * 5
    # Without order 2 the model cannot follow the data: a residual of the size of those terms remains.
    _, partial = fit_axis(points, encoded, degree=6, reference_radius_mm=150.0, valid_radius_mm=150.0,
                          orders=[0])
    assert partial.residual_rms_mm > 1e6 * report.residual_rms_mm


def test_underdetermined_fits_are_refused(rng):
    with pytest.raises(ValueError, match="cannot determine"):
        fit_axis(sphere_points(rng, 10, 100.0), np.zeros(10), degree=3, reference_radius_mm=100.0,
                 valid_radius_mm=100.0)
    on_axis = np.zeros((50, 3))
    on_axis[:, 2] = np.linspace(-100, 100, 50)
    with pytest.raises(ValueError, match="vanishes at every sample"):
        fit_axis(on_axis, on_axis[:, 2], degree=2, reference_radius_mm=100.0, valid_radius_mm=100.0)
    # On one circle about the z axis, C_0^0 = 1, C_1^0 = z and C_2^0 = (3 z^2 - r^2) / 2 are
    # all constant: no sampling there can tell them apart.
    phi = np.linspace(0, 2 * np.pi, 60, endpoint=False)
    circle = np.stack([100 * np.cos(phi), 100 * np.sin(phi), np.full_like(phi, 50.0)], -1)
    with pytest.raises(ValueError, match="separate only"):
        fit_axis(circle, circle[:, 0], degree=2, reference_radius_mm=100.0, valid_radius_mm=100.0)
    with pytest.raises(ValueError, match="shape|expected"):
        fit_axis(on_axis, on_axis[:10, 2], degree=2, reference_radius_mm=100.0, valid_radius_mm=100.0)


def test_encoded_from_field_units():
    # u = Bz / G: 1.5 mT in a 30 mT/m gradient is 50 mm from the isocenter.
    assert encoded_from_field(np.array([1.5]), gradient_mT_per_m=30.0)[0] == pytest.approx(50.0, rel=1e-15)


def test_fit_coil_builds_a_model_that_round_trips(rng, tmp_path):
    truth = {}
    for name in AXES:
        # A plausible coil: terms of about 1 %, the nominal linear term near 1 (the file loader
        # checks that).
        alpha, beta = (0.1 * t for t in random_expansion(rng, 5))
        kind, n, m = LINEAR_TERMS[name]
        (alpha if kind == "cos" else beta)[n, m] += 1.0
        truth[name] = AxisExpansion(alpha, beta, 250.0, 200.0)
    model = CoilModel(truth, label="synthetic")
    points = sphere_points(rng, 600, 200.0)
    encoded, _ = model.encode(points, jacobian=False)
    samples = {name: (points, encoded[:, c]) for c, name in enumerate(AXES)}
    fitted, reports = fit_coil(samples, degree=5, reference_radius_mm=250.0, valid_radius_mm=200.0,
                               label="fitted synthetic", date="2026-01-01")
    inside = ball_points(rng, 200, 200.0)
    np.testing.assert_allclose(fitted.encode(inside, jacobian=False)[0],
                               model.encode(inside, jacobian=False)[0], atol=1e-9)
    assert fitted.source["kind"] == "fit" and fitted.source["date"] == "2026-01-01"
    assert set(reports) == set(AXES) and fitted.valid_radius_mm == 200.0
    again = load_coil(save_coil(fitted, tmp_path / "fitted.json"))
    assert again.source == fitted.source
    with pytest.raises(ValueError, match="missing for gradient axis z"):
        fit_coil({a: samples[a] for a in ("x", "y")}, degree=2, reference_radius_mm=250.0,
                 valid_radius_mm=200.0)


# --- Biot-Savart: current loops ------------------------------------------------------------------


def loop_axis_field(z_m, radius_m, current_a):
    """On-axis field of a loop at z = 0: mu0 I a^2 / (2 (a^2 + z^2)^(3/2)).

    Biot-Savart for a circular loop (Griffiths, Introduction to Electrodynamics, Ex. 5.6;
    Jackson, Classical Electrodynamics, §5.5).
    """
    return mu_0 * current_a * radius_m**2 / (2.0 * (radius_m**2 + np.asarray(z_m) ** 2) ** 1.5)


def test_magpylib_loop_matches_the_closed_form_on_axis():
    # Also confirms magpylib 5's units: metres, amperes, tesla.
    a, d = COIL_RADIUS_M, 0.3
    z = np.linspace(-0.5, 0.5, 41)
    points = np.stack([np.zeros_like(z), np.zeros_like(z), z], -1)
    pair = loop_pair(a, d, current_a=LOOP_CURRENT_A)
    expected = loop_axis_field(z - d, a, LOOP_CURRENT_A) - loop_axis_field(z + d, a, LOOP_CURRENT_A)
    np.testing.assert_allclose(bz_tesla(pair, points), expected, rtol=CLOSED_FORM_RTOL,
                               atol=CLOSED_FORM_RTOL * np.abs(expected).max())


def on_axis_coefficient(n: int, radius_m: float, half_spacing_m: float, r0_m: float) -> float:
    """Expected alpha_n0 of u = Bz / G_nominal for a loop pair (+I at +d, -I at -d).

    With R^2 = a^2 + d^2, the loop law expands by the Gegenbauer generating function
    (1 - 2 x t + t^2)^(-3/2) = sum C_n^(3/2)(x) t^n (Abramowitz & Stegun 22.9.3):
    Bz(z) = sum_{n odd} mu0 I a^2 R^(-3-n) C_n^(3/2)(d / R) z^n. An axisymmetric harmonic
    field is sum b_n r^n P_n(cos theta) with b_n its on-axis Taylor coefficients, and the
    Schmidt P_n^0 is P_n, so alpha_n0 = b_n R0^(n-1) / G_nominal.
    """
    big_r = np.hypot(radius_m, half_spacing_m)
    b_n = 0.0 if n % 2 == 0 else (mu_0 * LOOP_CURRENT_A * radius_m**2 * big_r ** (-3 - n)
                                  * eval_gegenbauer(n, 1.5, half_spacing_m / big_r))
    return b_n * r0_m ** (n - 1) / NOMINAL_T_PER_M


def fit_loop_pair(half_spacing: float, *, degree: int = 11, seed: int = 7) -> AxisExpansion:
    """Fit u = Bz / G_nominal of a loop pair from 1500 samples on a sphere of radius a / 2."""
    a = COIL_RADIUS_M
    r0_mm = 0.5 * a * 1e3
    points_mm = sphere_points(np.random.default_rng(seed), 1500, r0_mm)
    bz = bz_tesla(loop_pair(a, half_spacing * a, current_a=LOOP_CURRENT_A), points_mm * 1e-3)
    encoded = encoded_from_field(bz * 1e3, gradient_mT_per_m=NOMINAL_T_PER_M * 1e3)
    axis, _ = fit_axis(points_mm, encoded, degree=degree, reference_radius_mm=r0_mm, valid_radius_mm=r0_mm)
    return axis


@pytest.mark.parametrize("half_spacing", [0.6, MAXWELL_HALF_SPACING, 1.1])
def test_loop_pair_fit_matches_the_biot_savart_series(half_spacing):
    axis = fit_loop_pair(half_spacing)
    a, r0_m = COIL_RADIUS_M, 0.5 * COIL_RADIUS_M
    # The linear term is the closed-form gradient 3 mu0 I a^2 d / (a^2 + d^2)^(5/2) (derivative
    # of the loop law at the centre of the pair).
    d = half_spacing * a
    gradient = 3 * mu_0 * LOOP_CURRENT_A * a**2 * d / (a**2 + d**2) ** 2.5
    assert axis.alpha[1, 0] * NOMINAL_T_PER_M == pytest.approx(gradient, rel=LEAKAGE_TOL)
    scale = abs(axis.alpha[1, 0])
    for n in range(1, 8):
        assert abs(axis.alpha[n, 0] - on_axis_coefficient(n, a, d, r0_m)) < LEAKAGE_TOL * scale, n
    # Axial symmetry: no m > 0 terms.
    assert np.abs(axis.alpha[:, 1:]).max() < LEAKAGE_TOL * scale
    assert np.abs(axis.beta).max() < LEAKAGE_TOL * scale


def test_maxwell_spacing_cancels_the_third_order_term():
    # Maxwell (Treatise, 1873, §715): opposed loops at a spacing of sqrt(3) a have no z^3 term.
    maxwell = fit_loop_pair(MAXWELL_HALF_SPACING)
    assert abs(maxwell.alpha[3, 0]) < MAXWELL_TOL * abs(maxwell.alpha[5, 0])
    # Closer (1.2 a) or wider (2.2 a) pairs have a clear third-order term, of opposite signs.
    close, wide = fit_loop_pair(0.6), fit_loop_pair(1.1)
    assert abs(close.alpha[3, 0]) > abs(close.alpha[5, 0])
    assert abs(wide.alpha[3, 0]) > abs(wide.alpha[5, 0])
    assert np.sign(close.alpha[3, 0]) == -np.sign(wide.alpha[3, 0])


# --- fits from samples: degree choice, symmetry, warnings, predicted error ----------------------

#: Agreement of our QR solve with numpy.linalg.lstsq (SVD) on the same well-conditioned design:
#: two backward-stable solvers, relative to the largest coefficient.
SOLVER_RTOL = 1e-10
#: Leave-one-out residuals by the PRESS identity against refitting without each sample: the same
#: least-squares problems solved two ways (rounding only), mm.
PRESS_TOL = 1e-9
#: The Biot-Savart check of the issue: encoded position inside the sampled sphere, mm.
INSIDE_TOL_MM = 0.05
#: Forbidden terms of a symmetric Biot-Savart coil, fitted to degree 9 without the constraint:
#: zero up to the leakage of unfitted degrees through random (not exactly orthogonal) sampling,
#: measured <= 4e-6 of the linear term with 1500 samples (allowed terms are 1e-4 .. 3e-2).
SYMMETRY_LEAK = 2e-5
#: The predicted error (difference to a degree d + 2 fit) against the true Biot-Savart error on
#: spheres from 0.9 to 1.5 sampled radii: the same order of magnitude, on the safe side (measured
#: 1.1 to 2.0 times the true error at degrees 11 and 13, over two sample draws).
PREDICTION_OVER = 3.0
PREDICTION_UNDER = 1.5
SAMPLED_RADIUS_MM = 150.0


def mirror_parity(points: np.ndarray, kind: str, n: int, m: int) -> tuple[int, int, int]:
    """Parity (+1 even, -1 odd) of a scipy reference harmonic under x, y and z mirrors."""
    c, s = schmidt_reference(points, n, m)
    value = c if kind == "cos" else s
    out = []
    for axis in range(3):
        flipped = points.copy()
        flipped[:, axis] *= -1
        c2, s2 = schmidt_reference(flipped, n, m)
        other = c2 if kind == "cos" else s2
        even, odd = np.allclose(other, value, atol=1e-12), np.allclose(other, -value, atol=1e-12)
        out.append(1 if even else -1 if odd else 0)
    return tuple(out)


@pytest.mark.parametrize("axis", AXES)
def test_mirror_symmetry_keeps_exactly_the_terms_of_matching_parity(rng, axis):
    # Reference: parities evaluated numerically from scipy.special.lpmv harmonics, not derived:
    # a coil whose Bz is odd in its own axis and even in the other two allows a term exactly
    # when the term has that parity under each of the three mirrors.
    points = rng.normal(size=(40, 3))
    want = tuple(-1 if k == AXES.index(axis) else 1 for k in range(3))
    for kind, n, m in fit_terms(7):
        parity = mirror_parity(points, kind, n, m)
        assert 0 not in parity
        assert term_allowed(axis, kind, n, m, "mirror") == (parity == want), (kind, n, m)
    kept = fit_terms(7, axis=axis, symmetry="mirror")
    assert kept == [t for t in fit_terms(7) if term_allowed(axis, *t, "mirror")]


def test_axial_symmetry_keeps_the_rotation_invariant_z_terms(rng):
    # A term is invariant under any rotation about z exactly when m = 0 (scipy reference values).
    points = rng.normal(size=(30, 3))
    angle = 0.7
    rot = np.array([[np.cos(angle), -np.sin(angle), 0], [np.sin(angle), np.cos(angle), 0], [0, 0, 1]])
    for kind, n, m in fit_terms(6, axis="z", symmetry="mirror"):
        c, s = schmidt_reference(points, n, m)
        c2, s2 = schmidt_reference(points @ rot.T, n, m)
        invariant = np.allclose(c if kind == "cos" else s, c2 if kind == "cos" else s2, atol=1e-12)
        assert term_allowed("z", kind, n, m, "axial") == invariant
    assert fit_terms(7, axis="z", symmetry="axial") == [("cos", n, 0) for n in (1, 3, 5, 7)]


def test_fit_terms_are_degree_major():
    terms = fit_terms(5)
    assert [n for _, n, _ in terms] == sorted(n for _, n, _ in terms)
    assert len(terms) == 36


def test_qr_solve_matches_numpy_lstsq(rng):
    # Reference: numpy.linalg.lstsq (SVD) on the design built from scipy harmonics.
    degree, r0 = 8, 160.0
    points = ball_points(rng, 700, 150.0)
    alpha, beta = random_expansion(rng, degree)
    encoded = reference_encoded(points, alpha, beta, r0) + rng.normal(scale=0.05, size=700)
    axis, _ = fit_axis(points, encoded, degree=degree, reference_radius_mm=r0, valid_radius_mm=150.0)
    terms = fit_terms(degree)
    design = r0 * np.stack([schmidt_reference(points / r0, n, m)[kind == "sin"] for kind, n, m in terms], -1)
    expected = np.linalg.lstsq(design, encoded, rcond=None)[0]
    got = np.array([(axis.alpha if kind == "cos" else axis.beta)[n, m] for kind, n, m in terms])
    np.testing.assert_allclose(got, expected, rtol=0, atol=SOLVER_RTOL * np.abs(expected).max())


def test_leave_one_out_residual_matches_refitting(rng):
    # Reference: refit with numpy.linalg.lstsq leaving each sample out in turn.
    degree, r0 = 3, 100.0
    points = sphere_points(rng, 60, 90.0)
    encoded = points[:, 0] + 0.01 * points[:, 1] * points[:, 2] / r0 + rng.normal(scale=0.1, size=60)
    _, report = fit_axis(points, encoded, degree=degree, reference_radius_mm=r0, valid_radius_mm=90.0)
    terms = fit_terms(degree)
    design = r0 * np.stack([schmidt_reference(points / r0, n, m)[kind == "sin"] for kind, n, m in terms], -1)
    held_out = []
    for i in range(60):
        keep = np.arange(60) != i
        coef = np.linalg.lstsq(design[keep], encoded[keep], rcond=None)[0]
        held_out.append(design[i] @ coef - encoded[i])
    assert report.cv_rms_mm == pytest.approx(np.sqrt(np.mean(np.square(held_out))), abs=PRESS_TOL)
    assert report.cv_rms_mm > report.residual_rms_mm


@pytest.mark.parametrize("seed", [1, 2])
def test_cross_validation_finds_the_degree_of_noisy_samples(seed):
    # Samples of a degree-5 expansion (scipy reference values) with 0.02 mm noise: the
    # held-out error falls until degree 5 and is flat after it.
    rng = np.random.default_rng(seed)
    truth = {}
    for name in AXES:
        alpha, beta = (0.05 * t for t in random_expansion(rng, 5))
        kind, n, m = LINEAR_TERMS[name]
        (alpha if kind == "cos" else beta)[n, m] += 1.0
        alpha[5] = np.where(np.arange(6) <= 5, 0.05, 0.0)  # a clear degree-5 term at every order
        truth[name] = (alpha, beta)
    points = sphere_points(rng, 1200, 150.0)
    samples = {name: (points, reference_encoded(points, *truth[name], 200.0)
                      + rng.normal(scale=0.02, size=len(points))) for name in AXES}
    model, summary = fit_samples(samples, max_degree=10, reference_radius_mm=200.0)
    assert summary.degree_choice == "cross-validated"
    assert all(summary.axes[a].degree == 5 for a in AXES), {a: summary.axes[a].degree for a in AXES}
    # The held-out residual is the noise (0.02 mm) once the degree is right.
    for a in AXES:
        assert summary.axes[a].cv_rms_mm == pytest.approx(0.02, rel=0.15)
    assert model.source["method"] == "field-samples" and model.source["samples"] == 3 * 1200


def test_valid_radius_follows_the_samples(rng):
    assert valid_radius_from_samples(sphere_points(rng, 500, 120.0)) == (pytest.approx(120.0), 0.0)
    g = np.arange(-100.0, 100.1, 10.0)
    cube = np.stack(np.meshgrid(g, g, g), -1).reshape(-1, 3)
    radius, empty = valid_radius_from_samples(cube)
    # The sphere inscribed in the cube (half-width 100 mm), up to the direction bins' width.
    assert radius == pytest.approx(100.0, rel=0.01) and empty == 0.0
    upper = sphere_points(rng, 2000, 120.0)
    _, empty = valid_radius_from_samples(upper[upper[:, 2] > 0])
    assert 0.25 < empty < 0.6


def synthetic_samples(rng, points, *, scale=0.01, degree=5):
    model = {}
    for name in AXES:
        alpha, beta = (scale * t for t in random_expansion(rng, degree))
        kind, n, m = LINEAR_TERMS[name]
        (alpha if kind == "cos" else beta)[n, m] += 1.0
        model[name] = (points, reference_encoded(points, alpha, beta, 150.0))
    return model


def codes(summary):
    return {(w.code, w.axis) for w in summary.warnings}


def test_warnings_name_what_is_wrong(rng):
    sphere = sphere_points(rng, 600, 150.0)
    _, good = fit_samples(synthetic_samples(rng, sphere), degree=5)
    assert not good.warnings
    # Only the upper half of the sphere: directions without samples.
    upper = sphere_points(rng, 1200, 150.0)
    upper = upper[upper[:, 2] > 0]
    _, half = fit_samples(synthetic_samples(rng, upper), degree=5)
    assert {("coverage", a) for a in AXES} <= codes(half)
    # One octant of the sphere: the terms are hard to tell apart from one side (condition ~1e7).
    octant = sphere_points(rng, 4000, 150.0)
    octant = octant[(octant > 0).all(axis=1)]
    _, one_sided = fit_samples(synthetic_samples(rng, octant), degree=6)
    assert ("ill-conditioned", "x") in codes(one_sided)
    # A nominal gradient 10 % off: the linear term comes out 1.1.
    wrong = synthetic_samples(rng, sphere)
    wrong["y"] = (sphere, 1.1 * wrong["y"][1])
    _, off = fit_samples(wrong, degree=5)
    assert ("linear-term", "y") in codes(off) and ("linear-term", "x") not in codes(off)
    # Noise-free samples support the highest degree tried; a valid radius beyond the samples.
    _, limit = fit_samples(synthetic_samples(rng, sphere, degree=7), max_degree=4, valid_radius_mm=200.0)
    assert ("degree-at-limit", "z") in codes(limit) and ("beyond-samples", None) in codes(limit)
    # Few samples for the terms.
    few = sphere_points(rng, 60, 150.0)
    _, sparse = fit_samples(synthetic_samples(rng, few), degree=4)
    assert ("few-samples", "x") in codes(sparse)


def test_fit_errors_name_the_axis(rng):
    sphere = sphere_points(rng, 100, 150.0)
    samples = synthetic_samples(rng, sphere)
    samples["z"] = (sphere[:10], samples["z"][1][:10])
    with pytest.raises(ValueError, match="^axis z: 10 samples cannot determine"):
        fit_samples(samples, degree=3)


@settings(max_examples=15, deadline=None, derandomize=True, database=None)
@given(r0=st.floats(60.0, 600.0), gain=st.floats(-3.0, 3.0).filter(lambda g: abs(g) > 1e-3))
def test_fit_is_linear_and_independent_of_the_reference_radius(r0, gain):
    # Invariants of a linear least-squares fit: scaling the data scales the fitted values, and
    # R0 only rescales the coefficients, not the fitted encoded positions.
    rng = np.random.default_rng(11)
    points = ball_points(rng, 300, 140.0)
    alpha, beta = random_expansion(rng, 4)
    values = reference_encoded(points, alpha, beta, 150.0)
    probe = ball_points(rng, 50, 140.0)
    base, _ = fit_axis(points, values, degree=4, reference_radius_mm=150.0, valid_radius_mm=140.0)
    other, _ = fit_axis(points, gain * values, degree=4, reference_radius_mm=r0, valid_radius_mm=140.0)

    def at(ax):
        model = CoilModel(dict.fromkeys(AXES, ax))
        return model.encode(probe, jacobian=False)[0][:, 0]

    np.testing.assert_allclose(at(other), gain * at(base), rtol=1e-9, atol=1e-9 * abs(gain) * 150.0)


# --- Biot-Savart coil set fitted from samples on a sphere ------------------------------------------


@pytest.fixture(scope="module")
def biot_savart():
    """The magpylib coil set sampled on a sphere, and direct fields at test points (computed once)."""
    coils = coil_set()
    rng = np.random.default_rng(5)
    samples = sphere_points(rng, 1500, SAMPLED_RADIUS_MM)
    inside = ball_points(rng, 400, SAMPLED_RADIUS_MM)
    factors = np.array([0.9, 1.0, 1.1, 1.25, 1.5])
    dirs = sphere_points(rng, 80, 1.0)
    shells = factors[:, None, None] * SAMPLED_RADIUS_MM * dirs[None]
    return {"coils": coils, "samples": samples, "encoded": encode_direct(coils, samples),
            "inside": inside, "inside_truth": encode_direct(coils, inside), "factors": factors,
            "shells": shells,
            "shell_truth": encode_direct(coils, shells.reshape(-1, 3)).reshape(shells.shape)}


@pytest.mark.parametrize("degree", [11, 13])
def test_biot_savart_coil_set_is_predicted_inside_the_sphere(biot_savart, degree):
    # Issue check: a Biot-Savart coil set (Golay saddles, Maxwell pair; magpylib) fitted to degree
    # >= 11 from samples on a sphere predicts the encoded position inside it to < 0.05 mm.
    b = biot_savart
    samples = {a: (b["samples"], b["encoded"][:, c]) for c, a in enumerate(AXES)}
    model, summary = fit_samples(samples, degree=degree)
    err_inside = np.linalg.norm(model.encode(b["inside"], jacobian=False)[0] - b["inside_truth"], axis=-1)
    assert err_inside.max() < INSIDE_TOL_MM
    assert summary.valid_radius_mm == pytest.approx(SAMPLED_RADIUS_MM)
    # The summary's predicted error follows the true error inside and outside the sphere, and
    # says how fast it grows: true error on shells at 0.9 .. 1.5 sampled radii.
    shells = b["shells"]
    true_max = np.linalg.norm(model.encode(shells, jacobian=False)[0] - b["shell_truth"], axis=-1).max(1)
    predicted = {round(e.radius_mm / SAMPLED_RADIUS_MM, 2): e.max_mm for e in summary.error_vs_radius}
    for factor, truth in zip(b["factors"], true_max, strict=True):
        assert truth / PREDICTION_UNDER < predicted[round(factor, 2)] < truth * PREDICTION_OVER, factor
    assert summary.predicted_error_max_mm < INSIDE_TOL_MM
    # Outside: the error grows much faster than r (as r^(d+2) or so, measured).
    assert summary.growth_exponent > degree
    assert true_max[-1] > 50 * true_max[1]


def test_biot_savart_coils_obey_their_design_symmetry(biot_savart):
    # Golay saddles and the Maxwell pair (magpylib) are mirror-symmetric, and the pair axial:
    # an unconstrained fit finds the forbidden terms zero, and a constrained fit agrees.
    b = biot_savart
    samples = {a: (b["samples"], b["encoded"][:, c]) for c, a in enumerate(AXES)}
    free, _ = fit_samples(samples, degree=9)
    constrained, summary = fit_samples(samples, degree=9, symmetry="axial")
    for a in AXES:
        ax = free.axes[a]
        scale = abs(ax.linear_coefficient(a))
        for kind, n, m in fit_terms(9):
            value = (ax.alpha if kind == "cos" else ax.beta)[n, m]
            if not term_allowed(a, kind, n, m, "axial"):
                assert abs(value) < SYMMETRY_LEAK * scale, (a, kind, n, m)
        assert summary.axes[a].terms == len(fit_terms(9, axis=a, symmetry="axial"))
    # With a third of the terms, the constrained model is as close to the Biot-Savart truth.
    def error(model):
        return np.linalg.norm(model.encode(b["inside"], jacobian=False)[0] - b["inside_truth"], axis=-1).max()

    assert error(constrained) < 1.1 * error(free) < INSIDE_TOL_MM


def test_maxwell_spacing_through_the_field_sample_fit():
    # Maxwell (Treatise, 1873, §715) through fit_samples: field samples in mT at a nominal
    # gradient, axial symmetry, degree chosen by cross-validation.
    a = COIL_RADIUS_M
    r0_mm = 0.5 * a * 1e3
    points_mm = sphere_points(np.random.default_rng(3), 1500, r0_mm)
    result = {}
    for half in (0.6, MAXWELL_HALF_SPACING, 1.1):
        bz_mT = 1e3 * bz_tesla(loop_pair(a, half * a, current_a=LOOP_CURRENT_A), points_mm * 1e-3)
        gradient = 3 * mu_0 * LOOP_CURRENT_A * a**2 * (half * a) / (a**2 + (half * a) ** 2) ** 2.5
        u = encoded_from_field(bz_mT, gradient_mT_per_m=gradient * 1e3)
        samples = {"x": (points_mm, points_mm[:, 0]), "y": (points_mm, points_mm[:, 1]), "z": (points_mm, u)}
        model, _ = fit_samples(samples, symmetry="axial", max_degree=11, reference_radius_mm=r0_mm)
        result[half] = model.axes["z"].alpha
    maxwell, close, wide = result[MAXWELL_HALF_SPACING], result[0.6], result[1.1]
    assert abs(maxwell[3, 0]) < MAXWELL_TOL * abs(maxwell[5, 0])
    assert abs(close[3, 0]) > abs(close[5, 0]) and abs(wide[3, 0]) > abs(wide[5, 0])
    assert np.sign(close[3, 0]) == -np.sign(wide[3, 0])


def test_fit_provenance_round_trips_and_is_checked(rng, tmp_path):
    sphere = sphere_points(rng, 400, 150.0)
    model, _ = fit_samples(synthetic_samples(rng, sphere), degree=3, date="2026-12-02")
    assert model.source["kind"] == "fit" and model.source["degree"] == 3
    again = load_coil(save_coil(model, tmp_path / "fit.json"))
    assert again.source == model.source
    doc = json.loads((tmp_path / "fit.json").read_text())
    doc["source"]["samples"] = -1
    (tmp_path / "bad.json").write_text(json.dumps(doc))
    with pytest.raises(InputError, match="source.samples"):
        load_coil(tmp_path / "bad.json")


def test_fitted_model_files_follow_the_published_schema(rng, tmp_path):
    # Reference: JSON Schema draft 2020-12 as implemented by the jsonschema package, applied to
    # docs/coil-model.schema.json (the fit keys of the source object).
    jsonschema = pytest.importorskip("jsonschema")
    from pathlib import Path

    schema = json.loads((Path(__file__).resolve().parents[1] / "docs" / "coil-model.schema.json")
                        .read_text(encoding="utf-8"))
    model, _ = fit_samples(synthetic_samples(rng, sphere_points(rng, 300, 150.0)), degree=3,
                           date="2026-12-02")
    doc = json.loads(save_coil(model, tmp_path / "fit.json").read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator(schema).validate(doc)
    doc["source"]["residual_max_mm"] = -0.5
    assert not jsonschema.Draft202012Validator(schema).is_valid(doc)
