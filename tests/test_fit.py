"""Least-squares fitting of harmonic coil models (nl_unwarp.fit).

Synthetic samples are evaluated with scipy.special (independent of our
recurrences); physical samples come from magpylib's Biot-Savart fields, which
are checked here against the closed-form field of a current loop.
"""

from __future__ import annotations

from math import factorial

import numpy as np
import pytest
from coils import COIL_RADIUS_M, MAXWELL_HALF_SPACING, bz_tesla, loop_pair
from scipy.constants import mu_0
from scipy.special import eval_gegenbauer, lpmv

from nl_unwarp.coil import AXES, LINEAR_TERMS, AxisExpansion, CoilModel
from nl_unwarp.fit import encoded_from_field, fit_axis, fit_coil, fit_terms
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
