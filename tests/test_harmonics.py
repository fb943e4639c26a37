"""The harmonic engine (nl_unwarp.harmonics) against references outside the project.

Outside references used here:

* ``scipy.special.lpmv``: Ferrers functions :math:`P_n^m(x)` *with* the
  Condon-Shortley phase :math:`(-1)^m`;
* ``scipy.special.sph_harm_y``: complex orthonormal harmonics with that phase;
* closed forms of low-degree Legendre functions (Abramowitz & Stegun 1964, ch. 8
  and Table 22.9; recalled, so each is also checked against ``lpmv``);
* Rodrigues' formula :math:`P_n(x) = \\frac{1}{2^n n!} \\frac{d^n}{dx^n}(x^2 - 1)^n`
  (A&S 22.11.5), evaluated in exact rational arithmetic;
* Gauss-Legendre quadrature (``scipy.special.roots_legendre``) for the
  normalisation integrals over the sphere;
* Laplace's equation, which every solid harmonic satisfies.
"""

from __future__ import annotations

from fractions import Fraction
from math import comb, factorial, sqrt

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import special

from nl_unwarp.harmonics import (
    NORMALISATIONS,
    Basis,
    basis_factor,
    convert_coefficients,
    expansion,
    harmonic_table,
    iter_harmonics,
)

#: Degree of the comparisons with scipy (the brief asks for >= 30).
HIGH_DEGREE = 32
#: Agreement with scipy, relative to rho^n (Schmidt) or to its orthonormal
#: equivalent: |Schmidt P_n^m cos(m phi)| <= 1 (Schmidt addition theorem,
#: Winch et al. 2005), so rho^n bounds each value. Measured worst: 5e-14.
SCIPY_TOL = 1e-12
#: Unnormalised values reach ~1e40 at n = m = 32: compare relative to the
#: bound sqrt((n+m)! / ((2 - delta) (n-m)!)) of |P_n^m| (same 1e-12 reason).
UNNORMALISED_TOL = 1e-12
#: Closed forms and exact rationals: a few ulps of float64 per recurrence
#: step plus the normalisation factor's rounding (lgamma / exp, ~1e-14).
CLOSED_FORM_TOL = 1e-12
#: Coefficient round trips: two multiplications by reciprocal factors.
ROUND_TRIP_TOL = 1e-12
#: Quadrature is exact for these polynomial integrands; what is left is
#: float64 rounding summed over ~1e3 nodes.
QUADRATURE_TOL = 1e-12
#: Central-difference step (dimensionless, points within the unit ball).
FD_STEP = 1e-5
#: Central differences: truncation h^2/6 |f'''| <= 1e-10/6 * n^3 ~ 3e-8 at
#: n = 12 and rounding eps / h ~ 2e-11 (measured worst 5e-8).
FD_TOL = 1e-6
#: Laplacian from central differences of the analytic gradient: truncation
#: h^2/6 |f''''| relative to the second-derivative scale ~ h^2 n^2 (n <= 16);
#: measured worst 7e-7 over 300 random terms and points.
LAPLACE_STEP = 1e-4
LAPLACE_TOL = 1e-5
#: The streaming sum and the table sum add the same float64 terms in
#: different orders.
SUM_TOL = 1e-12

HYPOTHESIS = settings(max_examples=60, deadline=None, derandomize=True, database=None)

ALL_BASES = [Basis(n, cs) for n in NORMALISATIONS for cs in (False, True)]


def _polar(points: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Radius, polar angle from +z, azimuth from +x toward +y (CONVENTIONS.md section 2)."""
    x, y, z = points[..., 0], points[..., 1], points[..., 2]
    rho = np.sqrt(x * x + y * y + z * z)
    # arctan2 keeps theta accurate near the poles, where arccos(z / rho) cannot.
    return rho, np.arctan2(np.hypot(x, y), z), np.arctan2(y, x)


def _test_points(rng: np.random.Generator, count: int = 300, *, max_radius: float = 1.2):
    """Random points in a ball plus the awkward ones.

    Returns (points, away_from_axis): the mask excludes points within 1e-4
    of the z axis that are not on it (for lpmv, see its test).
    """
    direction = rng.normal(size=(count, 3))
    direction /= np.linalg.norm(direction, axis=1, keepdims=True)
    random_pts = direction * max_radius * rng.uniform(size=(count, 1)) ** (1.0 / 3.0)
    poles = np.array([[0, 0, 1.0], [0, 0, -1.0], [0, 0, 0.4], [0, 0, -0.7], [0, 0, 1.1]])
    near_poles = np.array([[1e-9, 2e-9, 0.9], [-3e-9, 1e-9, -0.8], [1e-6, -2e-6, 0.5],
                           [-2e-5, 3e-5, -1.0]])
    origin = np.zeros((1, 3))
    tiny = np.vstack([direction[:10] * 1e-7, [[1e-7, 0, 0], [0, 0, -1e-7], [3e-8, -4e-8, 5e-8]]])
    equator = np.array([[1.0, 0, 0], [0, -1.0, 0], [0.6, 0.8, 0], [-0.3, 0.4, 0]])
    pts = np.vstack([random_pts, poles, near_poles, origin, tiny, equator])
    rho, theta, _ = _polar(pts)
    on_axis = np.hypot(pts[:, 0], pts[:, 1]) == 0
    away = on_axis | (np.sin(theta) > 1e-4)
    return pts, away


def _schmidt_factor(n: int, m: int) -> float:
    """sqrt((2 - delta_m0) (n-m)! / (n+m)!), exact integers (CONVENTIONS.md section 2)."""
    return sqrt((2 - (m == 0)) * factorial(n - m) / factorial(n + m))


def test_schmidt_table_matches_scipy_lpmv(rng):
    # Source: scipy.special.lpmv includes the Condon-Shortley phase, so the
    # phase-free Ferrers function is (-1)^m lpmv (scipy docs).
    # lpmv takes x = cos(theta) and so cannot resolve sin(theta) below ~1e-8:
    # points just off the axis are checked against sph_harm_y below instead.
    pts, away = _test_points(rng)
    pts = pts[away]
    table_c, table_s = harmonic_table(pts, HIGH_DEGREE)
    rho, theta, phi = _polar(pts)
    for n in range(HIGH_DEGREE + 1):
        scale = rho**n
        for m in range(n + 1):
            ref = rho**n * _schmidt_factor(n, m) * (-1) ** m * special.lpmv(m, n, np.cos(theta))
            np.testing.assert_array_less(np.abs(table_c[:, n, m] - ref * np.cos(m * phi)),
                                         SCIPY_TOL * scale + 1e-300, err_msg=f"C n={n} m={m}")
            np.testing.assert_array_less(np.abs(table_s[:, n, m] - ref * np.sin(m * phi)),
                                         SCIPY_TOL * scale + 1e-300, err_msg=f"S n={n} m={m}")


def test_orthonormal_cs_table_matches_scipy_sph_harm_y(rng):
    # Source: scipy.special.sph_harm_y(n, m, theta, phi) is the complex
    # orthonormal harmonic with the Condon-Shortley phase; its real
    # orthonormal companions are Y_n^0 and sqrt(2) Re/Im Y_n^m for m > 0
    # (common practice, no source). It takes theta itself, so it is accurate
    # right next to the poles.
    pts, _ = _test_points(rng)
    table_c, table_s = harmonic_table(pts, HIGH_DEGREE, basis=Basis("orthonormal", True))
    rho, theta, phi = _polar(pts)
    for n in range(HIGH_DEGREE + 1):
        scale = SCIPY_TOL * sqrt((2 * n + 1) / (4 * np.pi)) * rho**n + 1e-300
        for m in range(n + 1):
            y = special.sph_harm_y(n, m, theta, phi) * rho**n
            ref_c, ref_s = (y.real, np.zeros_like(y.real)) if m == 0 else (sqrt(2) * y.real,
                                                                          sqrt(2) * y.imag)
            np.testing.assert_array_less(np.abs(table_c[:, n, m] - ref_c), scale, err_msg=f"n={n} m={m}")
            np.testing.assert_array_less(np.abs(table_s[:, n, m] - ref_s), scale, err_msg=f"n={n} m={m}")


@pytest.mark.parametrize("condon_shortley", [False, True])
def test_unnormalised_table_matches_lpmv(rng, condon_shortley):
    # Source: scipy.special.lpmv (with the Condon-Shortley phase), on the unit
    # sphere where the solid harmonic is the surface harmonic.
    pts, away = _test_points(rng, 200)
    rho, theta, phi = _polar(pts[away])
    unit = pts[away] / np.where(rho > 0, rho, 1.0)[:, None]
    unit[rho == 0] = [0.0, 0.0, 1.0]
    table_c, table_s = harmonic_table(unit, HIGH_DEGREE, basis=Basis("unnormalised", condon_shortley))
    for n, m in _pairs(HIGH_DEGREE):
        phase = 1 if condon_shortley else (-1) ** m
        ref = phase * special.lpmv(m, n, np.cos(theta))
        bound = UNNORMALISED_TOL / _schmidt_factor(n, m)
        np.testing.assert_array_less(np.abs(table_c[:, n, m] - ref * np.cos(m * phi)), bound)
        np.testing.assert_array_less(np.abs(table_s[:, n, m] - ref * np.sin(m * phi)), bound)


def _pairs(degree: int):
    return [(n, m) for n in range(degree + 1) for m in range(n + 1)]


#: Ferrers functions without the Condon-Shortley phase,
#: P_n^m(x) = (1 - x^2)^(m/2) d^m P_n / dx^m, as printed in Abramowitz &
#: Stegun (1964) ch. 8 and Table 22.9 (from memory; each is also checked
#: against scipy's lpmv in the test, so a slip of memory shows up there).
HANDBOOK_FERRERS = {
    (0, 0): lambda x, s: np.ones_like(x),
    (1, 0): lambda x, s: x,
    (2, 0): lambda x, s: (3 * x**2 - 1) / 2,
    (3, 0): lambda x, s: (5 * x**3 - 3 * x) / 2,
    (4, 0): lambda x, s: (35 * x**4 - 30 * x**2 + 3) / 8,
    (5, 0): lambda x, s: (63 * x**5 - 70 * x**3 + 15 * x) / 8,
    (1, 1): lambda x, s: s,
    (2, 1): lambda x, s: 3 * x * s,
    (2, 2): lambda x, s: 3 * s**2,
    (3, 1): lambda x, s: 1.5 * (5 * x**2 - 1) * s,
    (3, 2): lambda x, s: 15 * x * s**2,
    (3, 3): lambda x, s: 15 * s**3,
    (4, 1): lambda x, s: 2.5 * (7 * x**3 - 3 * x) * s,
    (4, 2): lambda x, s: 7.5 * (7 * x**2 - 1) * s**2,
    (4, 3): lambda x, s: 105 * x * s**3,
    (4, 4): lambda x, s: 105 * s**4,
}


def test_handbook_closed_forms_of_ferrers_functions():
    theta = np.linspace(0.0, np.pi, 37)
    x, s = np.cos(theta), np.sin(theta)
    unit = np.stack([s, np.zeros_like(s), x], axis=-1)  # phi = 0: C is the Ferrers function
    table_c, _ = harmonic_table(unit, 5, basis=Basis("unnormalised", False))
    for (n, m), closed in HANDBOOK_FERRERS.items():
        expected = closed(x, s)
        # Source check of the recalled form: scipy.special.lpmv, phase removed.
        np.testing.assert_allclose(expected, (-1) ** m * special.lpmv(m, n, x),
                                   rtol=CLOSED_FORM_TOL, atol=CLOSED_FORM_TOL)
        np.testing.assert_allclose(table_c[:, n, m], expected, rtol=CLOSED_FORM_TOL,
                                   atol=CLOSED_FORM_TOL, err_msg=f"n={n} m={m}")


def _rodrigues_derivative_at(n: int, k: int, x: Fraction) -> Fraction:
    """d^k P_n / dx^k at x, exactly: Rodrigues' formula (A&S 22.11.5) expanded by the binomial theorem."""
    # (x^2 - 1)^n = sum_j C(n, j) (-1)^(n-j) x^(2j); differentiate n + k times.
    total = Fraction(0)
    for j in range(n + 1):
        power = 2 * j
        order = n + k
        if power < order:
            continue
        falling = factorial(power) // factorial(power - order)
        total += comb(n, j) * (-1) ** (n - j) * falling * x ** (power - order)
    return total / (2**n * factorial(n))


def test_rodrigues_reference_reproduces_known_rationals():
    # Hand computation from the closed forms above at x = 1/2.
    half = Fraction(1, 2)
    assert _rodrigues_derivative_at(2, 0, half) == Fraction(-1, 8)
    assert _rodrigues_derivative_at(3, 0, half) == Fraction(-7, 16)
    assert _rodrigues_derivative_at(4, 0, half) == Fraction(-37, 128)
    assert _rodrigues_derivative_at(5, 0, half) == Fraction(23, 256)
    assert _rodrigues_derivative_at(4, 2, half) == Fraction(15, 2) * (7 * half**2 - 1)


@pytest.mark.parametrize("degree", [16])
def test_exact_rational_values_at_half(degree):
    # P_n^m(1/2) = (3/4)^(m/2) d^m P_n/dx^m (1/2): rational for even m,
    # sqrt(3)/2 times a rational for odd m. Source: Rodrigues' formula,
    # exact arithmetic with fractions.
    half = Fraction(1, 2)
    point = np.array([[sqrt(3) / 2, 0.0, 0.5]])  # unit sphere, cos(theta) = 1/2, phi = 0
    table_c, _ = harmonic_table(point, degree, basis=Basis("unnormalised", False))
    for n, m in _pairs(degree):
        exact = Fraction(3, 4) ** (m // 2) * _rodrigues_derivative_at(n, m, half)
        expected = float(exact) * (sqrt(3) / 2 if m % 2 else 1.0)
        assert table_c[0, n, m] == pytest.approx(expected, rel=CLOSED_FORM_TOL, abs=CLOSED_FORM_TOL), (n, m)


def _cartesian_forms(x, y, z):
    """Schmidt solid harmonics up to degree 3 in Cartesian form.

    Derived here by hand from the definition of CONVENTIONS.md section 2
    (rho^n sqrt((2 - delta) (n-m)!/(n+m)!) P_n^m(cos theta) cos/sin(m phi))
    with the Ferrers functions above, e.g. C_2^2 = sqrt(1/12) * 3 (x^2 - y^2).
    """
    r2 = x * x + y * y + z * z
    return {
        ("C", 0, 0): np.ones_like(x),
        ("C", 1, 0): z,
        ("C", 1, 1): x,
        ("S", 1, 1): y,
        ("C", 2, 0): (3 * z * z - r2) / 2,
        ("C", 2, 1): sqrt(3) * x * z,
        ("S", 2, 1): sqrt(3) * y * z,
        ("C", 2, 2): sqrt(3) / 2 * (x * x - y * y),
        ("S", 2, 2): sqrt(3) * x * y,
        ("C", 3, 0): (5 * z**3 - 3 * z * r2) / 2,
        ("C", 3, 1): sqrt(6) / 4 * x * (5 * z * z - r2),
        ("S", 3, 1): sqrt(6) / 4 * y * (5 * z * z - r2),
        ("C", 3, 2): sqrt(15) / 2 * z * (x * x - y * y),
        ("S", 3, 2): sqrt(15) * x * y * z,
        ("C", 3, 3): sqrt(10) / 4 * (x**3 - 3 * x * y * y),
        ("S", 3, 3): sqrt(10) / 4 * (3 * x * x * y - y**3),
    }


def test_low_degree_cartesian_forms(rng):
    pts, _ = _test_points(rng)
    table_c, table_s = harmonic_table(pts, 3)
    forms = _cartesian_forms(pts[:, 0], pts[:, 1], pts[:, 2])
    for (kind, n, m), expected in forms.items():
        got = (table_c if kind == "C" else table_s)[:, n, m]
        np.testing.assert_allclose(got, expected, rtol=CLOSED_FORM_TOL, atol=CLOSED_FORM_TOL,
                                   err_msg=f"{kind}_{n}^{m}")
    # Terms that vanish identically: sines of order 0.
    assert not np.any(table_s[:, :, 0])


def _gradient_points(rng):
    pts, _ = _test_points(rng, 120, max_radius=1.0)
    return pts


def _all_terms(points, degree, *, gradient):
    """Dict (n, m) -> (C, S, dC, dS) from iter_harmonics."""
    return {(n, m): (c.copy(), s.copy(), None if dc is None else dc.copy(), None if ds is None else ds.copy())
            for n, m, c, s, dc, ds in iter_harmonics(points, degree, gradient=gradient)}


def test_gradients_match_central_differences(rng):
    degree = 12
    pts = _gradient_points(rng)
    terms = _all_terms(pts, degree, gradient=True)
    assert set(terms) == set(_pairs(degree))
    for axis in range(3):
        step = np.zeros(3)
        step[axis] = FD_STEP
        plus = _all_terms(pts + step, degree, gradient=False)
        minus = _all_terms(pts - step, degree, gradient=False)
        for key, (_c, _s, dc, ds) in terms.items():
            fd_c = (plus[key][0] - minus[key][0]) / (2 * FD_STEP)
            fd_s = (plus[key][1] - minus[key][1]) / (2 * FD_STEP)
            np.testing.assert_allclose(dc[axis], fd_c, rtol=0, atol=FD_TOL, err_msg=f"{key} axis {axis}")
            np.testing.assert_allclose(ds[axis], fd_s, rtol=0, atol=FD_TOL, err_msg=f"{key} axis {axis}")


def test_gradients_at_origin_and_poles_closed_form():
    # At the origin only the degree-1 terms have a gradient: grad C_1^0 = e_z,
    # grad C_1^1 = e_x, grad S_1^1 = e_y (Cartesian forms above). On the z
    # axis, grad C_2^1 = sqrt(3) (z, 0, x) = (sqrt(3) z, 0, 0).
    pts = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, 0.8], [0.0, 0.0, -0.5]])
    terms = _all_terms(pts, 6, gradient=True)
    for (n, m), (_c, _s, dc, ds) in terms.items():
        if n != 1:
            assert np.all(dc[:, 0] == 0) and np.all(ds[:, 0] == 0), (n, m)
    np.testing.assert_array_equal(terms[(1, 0)][2][:, 0], [0, 0, 1])
    np.testing.assert_array_equal(terms[(1, 1)][2][:, 0], [1, 0, 0])
    np.testing.assert_array_equal(terms[(1, 1)][3][:, 0], [0, 1, 0])
    np.testing.assert_allclose(terms[(2, 1)][2][:, 1:], [[sqrt(3) * 0.8, -sqrt(3) * 0.5], [0, 0], [0, 0]],
                               atol=CLOSED_FORM_TOL)


def _fd_laplacian(point: np.ndarray, n: int, m: int, kind: int) -> tuple[float, float]:
    """Laplacian from central differences of the analytic gradient, and its scale."""
    lap, scale = 0.0, 0.0
    for axis in range(3):
        step = np.zeros(3)
        step[axis] = LAPLACE_STEP
        grads = []
        for sign in (1.0, -1.0):
            for nn, mm, _c, _s, dc, ds in iter_harmonics((point + sign * step)[None], n, gradient=True,
                                                       orders={m: n}):
                if (nn, mm) == (n, m):
                    grads.append((dc if kind == 0 else ds)[axis, 0])
        second = (grads[0] - grads[1]) / (2 * LAPLACE_STEP)
        lap += second
        scale += abs(second)
    return lap, scale


coordinate = st.floats(-0.6, 0.6, allow_nan=False)


@HYPOTHESIS
@given(n=st.integers(0, 16), m_frac=st.floats(0, 1), kind=st.integers(0, 1),
       point=st.tuples(coordinate, coordinate, coordinate))
def test_harmonics_satisfy_laplace_equation(n, m_frac, kind, point):
    # Source: every solid harmonic rho^n Y_n^m solves Laplace's equation.
    m = min(n, int(m_frac * (n + 1)))
    lap, scale = _fd_laplacian(np.array(point), n, m, kind)
    assert abs(lap) <= LAPLACE_TOL * max(scale, 1.0)


@pytest.mark.parametrize("source", ALL_BASES, ids=str)
@pytest.mark.parametrize("target", ALL_BASES, ids=str)
def test_coefficient_conversion_round_trip(source, target, rng):
    degree = 30
    alpha = np.tril(rng.normal(size=(degree + 1, degree + 1)))
    beta = np.tril(rng.normal(size=(degree + 1, degree + 1)))
    beta[:, 0] = 0.0
    there = convert_coefficients(alpha, beta, source=source, target=target)
    back = convert_coefficients(*there, source=target, target=source)
    np.testing.assert_allclose(back[0], alpha, rtol=ROUND_TRIP_TOL, atol=0)
    np.testing.assert_allclose(back[1], beta, rtol=ROUND_TRIP_TOL, atol=0)
    # Inputs are not modified.
    assert there[0] is not alpha


@pytest.mark.parametrize("basis", ALL_BASES, ids=str)
def test_converted_coefficients_describe_the_same_function(basis, rng):
    # sum a_basis Y_basis == sum a_schmidt Y_schmidt at every point: the
    # conversion and the tabulated basis agree with each other.
    degree = 10
    pts, _ = _test_points(rng, 100, max_radius=1.0)
    alpha = np.tril(rng.normal(size=(degree + 1, degree + 1)))
    beta = np.tril(rng.normal(size=(degree + 1, degree + 1)))
    beta[:, 0] = 0.0
    a_b, b_b = convert_coefficients(alpha, beta, source=Basis(), target=basis)
    ref_c, ref_s = harmonic_table(pts, degree)
    tab_c, tab_s = harmonic_table(pts, degree, basis=basis)
    value_schmidt = np.einsum("pnm,nm->p", ref_c, alpha) + np.einsum("pnm,nm->p", ref_s, beta)
    value_basis = np.einsum("pnm,nm->p", tab_c, a_b) + np.einsum("pnm,nm->p", tab_s, b_b)
    scale = np.einsum("pnm,nm->p", np.abs(ref_c), np.abs(alpha)) + np.einsum(
        "pnm,nm->p", np.abs(ref_s), np.abs(beta))
    np.testing.assert_array_less(np.abs(value_basis - value_schmidt), ROUND_TRIP_TOL * scale + 1e-300)


def test_basis_factor_against_definitions():
    # Schmidt -> unnormalised is 1 / sqrt((2 - delta)(n-m)!/(n+m)!) and
    # -> orthonormal is sqrt((2n + 1) / 4 pi) (CONVENTIONS.md section 2 and
    # the quadrature test below); the Condon-Shortley phase flips odd m.
    for n, m in _pairs(30):
        assert basis_factor(n, m, Basis()) == 1.0
        assert basis_factor(n, m, Basis("unnormalised")) == pytest.approx(1 / _schmidt_factor(n, m),
                                                                          rel=ROUND_TRIP_TOL)
        assert basis_factor(n, m, Basis("unnormalised", True)) == pytest.approx(
            (-1) ** m / _schmidt_factor(n, m), rel=ROUND_TRIP_TOL)
        assert basis_factor(n, m, Basis("orthonormal", True)) == pytest.approx(
            (-1) ** m * sqrt((2 * n + 1) / (4 * np.pi)), rel=ROUND_TRIP_TOL)
    with pytest.raises(ValueError, match="out of range"):
        basis_factor(2, 3, Basis())
    with pytest.raises(ValueError, match="unknown normalisation"):
        Basis("semi")


def _sphere_quadrature(degree: int):
    """Nodes on the unit sphere and weights, exact for products of degree-`degree` harmonics.

    Source: Gauss-Legendre in cos(theta) (scipy.special.roots_legendre, exact
    for polynomials of degree < 2 * nodes) times the trapezoidal rule in phi
    (exact for trigonometric polynomials of degree < nodes).
    """
    x, w = special.roots_legendre(degree + 2)
    phi = np.arange(4 * degree + 4) * (2 * np.pi / (4 * degree + 4))
    xx, pp = np.meshgrid(x, phi, indexing="ij")
    s = np.sqrt(1 - xx**2)
    points = np.stack([s * np.cos(pp), s * np.sin(pp), xx], axis=-1).reshape(-1, 3)
    weights = (w[:, None] * np.full(phi.shape, 2 * np.pi / phi.size)[None, :]).reshape(-1)
    return points, weights


def _gram(points, weights, degree, basis):
    table_c, table_s = harmonic_table(points, degree, basis=basis)
    columns, labels = [], []
    for n, m in _pairs(degree):
        columns.append(table_c[:, n, m])
        labels.append(n)
        if m:
            columns.append(table_s[:, n, m])
            labels.append(n)
    funcs = np.stack(columns, axis=1)
    return funcs.T @ (weights[:, None] * funcs), np.array(labels)


@pytest.mark.parametrize("condon_shortley", [False, True])
def test_orthonormal_harmonics_integrate_to_one(condon_shortley):
    degree = 10
    points, weights = _sphere_quadrature(degree)
    assert weights.sum() == pytest.approx(4 * np.pi, rel=QUADRATURE_TOL)
    gram, _ = _gram(points, weights, degree, Basis("orthonormal", condon_shortley))
    assert gram.shape == ((degree + 1) ** 2,) * 2
    np.testing.assert_allclose(gram, np.eye(gram.shape[0]), atol=QUADRATURE_TOL)


def test_schmidt_mean_square_over_sphere():
    # Schmidt semi-normalisation: the integral of (P_n^m cos m phi)^2 over the
    # sphere is 4 pi / (2n + 1) (Winch et al. 2005, from memory).
    degree = 10
    points, weights = _sphere_quadrature(degree)
    gram, labels = _gram(points, weights, degree, Basis())
    np.testing.assert_allclose(gram, np.diag(4 * np.pi / (2 * labels + 1)), atol=QUADRATURE_TOL)


def _table_sum(points, alpha, beta):
    """Reference: the expansion summed from the full table and the full gradients."""
    degree = alpha.shape[0] - 1
    value = np.zeros(points.shape[0])
    grad = np.zeros((3, points.shape[0]))
    for n, m, c, s, dc, ds in iter_harmonics(points, degree, gradient=True):
        value += alpha[n, m] * c + beta[n, m] * s
        grad += alpha[n, m] * dc + beta[n, m] * ds
    table_c, table_s = harmonic_table(points, degree)
    np.testing.assert_allclose(value, np.einsum("pnm,nm->p", table_c, alpha)
                               + np.einsum("pnm,nm->p", table_s, beta), rtol=SUM_TOL, atol=SUM_TOL)
    return value, grad


def _coefficients(rng, degree, density):
    alpha = np.tril(rng.normal(size=(degree + 1, degree + 1)))
    beta = np.tril(rng.normal(size=(degree + 1, degree + 1)))
    beta[:, 0] = 0.0
    alpha *= rng.uniform(size=alpha.shape) < density
    beta *= rng.uniform(size=beta.shape) < density
    return alpha, beta


@pytest.mark.parametrize("density", [1.0, 0.3, 0.05])
def test_expansion_equals_table_sum(rng, density):
    pts, _ = _test_points(rng, 100, max_radius=1.0)
    for degree in (0, 1, 5, 14):
        alpha, beta = _coefficients(rng, degree, density)
        value, grad = expansion(pts, alpha, beta, gradient=True)
        ref_value, ref_grad = _table_sum(pts, alpha, beta)
        np.testing.assert_allclose(value, ref_value, rtol=SUM_TOL, atol=SUM_TOL)
        np.testing.assert_allclose(grad, ref_grad, rtol=SUM_TOL, atol=SUM_TOL)
        value_only, none = expansion(pts, alpha, beta, gradient=False)
        assert none is None
        np.testing.assert_array_equal(value_only, value)


def test_expansion_of_single_high_order_terms(rng):
    # The streaming sum stops after the highest used order: a lone sectoral
    # term at the top order, or a lone zonal term, must still come out.
    pts, _ = _test_points(rng, 50, max_radius=1.0)
    degree = 9
    table_c, table_s = harmonic_table(pts, degree)
    for n, m, kind in [(9, 9, "sin"), (9, 0, "cos"), (4, 2, "cos"), (7, 7, "cos")]:
        alpha, beta = np.zeros((degree + 1, degree + 1)), np.zeros((degree + 1, degree + 1))
        (alpha if kind == "cos" else beta)[n, m] = 2.5
        value, _ = expansion(pts, alpha, beta, gradient=False)
        expected = 2.5 * (table_c if kind == "cos" else table_s)[:, n, m]
        np.testing.assert_allclose(value, expected, rtol=SUM_TOL, atol=SUM_TOL)
    value, grad = expansion(pts, np.zeros((4, 4)), np.zeros((4, 4)))
    assert not np.any(value) and not np.any(grad)


LINEARITY_POINTS = np.array([[0.1, -0.5, 0.3], [0.0, 0.0, 0.9], [0.0, 0.0, 0.0], [-0.7, 0.2, -0.1],
                             [1e-7, 0.0, -1e-7]])
coef = st.floats(-2.0, 2.0, allow_nan=False)


@HYPOTHESIS
@given(terms_a=st.dictionaries(st.tuples(st.integers(0, 6), st.integers(0, 6), st.booleans()), coef,
                               max_size=12),
       terms_b=st.dictionaries(st.tuples(st.integers(0, 6), st.integers(0, 6), st.booleans()), coef,
                               max_size=12),
       scale=coef)
def test_expansion_is_linear_in_the_coefficients(terms_a, terms_b, scale):
    def arrays(terms):
        alpha, beta = np.zeros((7, 7)), np.zeros((7, 7))
        for (n, m, is_sin), value in terms.items():
            n, m = max(n, m), min(n, m)
            if is_sin and m > 0:
                beta[n, m] += value
            else:
                alpha[n, m] += value
        return alpha, beta

    a1, b1 = arrays(terms_a)
    a2, b2 = arrays(terms_b)
    v1, g1 = expansion(LINEARITY_POINTS, a1, b1)
    v2, g2 = expansion(LINEARITY_POINTS, a2, b2)
    v, g = expansion(LINEARITY_POINTS, a1 + scale * a2, b1 + scale * b2)
    size = 1.0 + np.abs(a1).sum() + np.abs(b1).sum() + abs(scale) * (np.abs(a2).sum() + np.abs(b2).sum())
    np.testing.assert_allclose(v, v1 + scale * v2, rtol=0, atol=SUM_TOL * 10 * size)
    np.testing.assert_allclose(g, g1 + scale * g2, rtol=0, atol=SUM_TOL * 100 * size)


@HYPOTHESIS
@given(n=st.integers(0, HIGH_DEGREE), point=st.tuples(coordinate, coordinate, coordinate),
       angle=st.floats(-np.pi, np.pi))
def test_zonal_terms_are_symmetric_about_z(n, point, angle):
    # m = 0 terms depend on rho and theta only (CONVENTIONS.md section 2).
    p = np.array([point])
    c, s = np.cos(angle), np.sin(angle)
    rotated = p @ np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]]).T
    (c0, s0), (c1, s1) = [harmonic_table(q, n) for q in (p, rotated)]
    rho = np.linalg.norm(p)
    assert abs(c1[0, n, 0] - c0[0, n, 0]) <= SCIPY_TOL * max(rho**n, 1e-300) * 10
    assert not s0[0, :, 0].any() and not s1[0, :, 0].any()


def test_schmidt_addition_theorem_bounds_values(rng):
    # Schmidt semi-normalised functions satisfy sum_m (P_n^m)^2 = 1 on the unit
    # sphere (Winch et al. 2005, from memory), which is why rho^n is the error
    # scale used above; checked here against the table itself at degree 32.
    pts, _ = _test_points(rng, 200)
    rho, _, _ = _polar(pts)
    keep = rho > 0
    unit = pts[keep] / rho[keep, None]
    table_c, table_s = harmonic_table(unit, HIGH_DEGREE)
    total = (table_c**2 + table_s**2).sum(axis=2)
    np.testing.assert_allclose(total, 1.0, rtol=0, atol=SCIPY_TOL)
