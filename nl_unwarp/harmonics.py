"""Real solid spherical harmonics: values and Cartesian gradients.

The harmonics are evaluated directly in Cartesian coordinates by three-term
recurrences, so there is no division by ``sin(theta)`` or by the radius: the
poles and the origin are ordinary points, and no factorial is ever formed.

Our default basis is Schmidt semi-normalised without the Condon-Shortley phase:

.. math::

    C_n^m(\\mathbf r) = \\rho^n \\bar P_n^m(\\cos\\theta)\\cos m\\phi, \\qquad
    S_n^m(\\mathbf r) = \\rho^n \\bar P_n^m(\\cos\\theta)\\sin m\\phi,

    \\bar P_n^m = \\sqrt{(2-\\delta_{m0})\\frac{(n-m)!}{(n+m)!}}\\, P_n^m .

Other normalisations are conversions of coefficient sets at the edge
(:func:`basis_factor`, :func:`convert_coefficients`).

References
----------
.. [1] Winch, D. E. et al. (2005). Geomagnetism and Schmidt quasi-normalization.
   Geophys. J. Int. 160, 487-504 (Schmidt normalisation and recurrences).
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from math import lgamma, pi, sqrt

import numpy as np

__all__ = [
    "NORMALISATIONS",
    "Basis",
    "basis_factor",
    "convert_coefficients",
    "expansion",
    "harmonic_table",
    "iter_harmonics",
]

#: Names of the supported normalisations of the associated Legendre functions.
NORMALISATIONS = ("schmidt", "unnormalised", "orthonormal")


@dataclass(frozen=True)
class Basis:
    """A normalisation of the real harmonics.

    Parameters
    ----------
    normalisation : {"schmidt", "unnormalised", "orthonormal"}
        ``schmidt``: semi-normalised as above; ``unnormalised``: plain
        :math:`P_n^m`; ``orthonormal``: unit mean square over the sphere times
        :math:`4\\pi`, i.e. :math:`\\int Y^2 d\\Omega = 1`.
    condon_shortley : bool
        Whether the factor :math:`(-1)^m` is included in :math:`P_n^m`.
    """

    normalisation: str = "schmidt"
    condon_shortley: bool = False

    def __post_init__(self) -> None:
        if self.normalisation not in NORMALISATIONS:
            raise ValueError(
                f"unknown normalisation {self.normalisation!r}; "
                f"expected one of {', '.join(NORMALISATIONS)}"
            )


SCHMIDT = Basis("schmidt", False)


def basis_factor(n: int, m: int, basis: Basis) -> float:
    """Ratio of a harmonic in ``basis`` to the same harmonic in our Schmidt basis.

    Parameters
    ----------
    n, m : int
        Degree and order, ``0 <= m <= n``.
    basis : Basis
        The other basis.

    Returns
    -------
    float
        ``k`` such that :math:`Y^{basis}_{nm} = k\\, Y^{schmidt}_{nm}`. A
        coefficient converts the other way: ``a_schmidt = k * a_basis``.

    Notes
    -----
    Log-gamma keeps the factorial ratio finite at any degree.
    """
    if not 0 <= m <= n:
        raise ValueError(f"order m={m} out of range for degree n={n}")
    if basis.normalisation == "schmidt":
        k = 1.0
    elif basis.normalisation == "unnormalised":
        delta = 1.0 if m == 0 else 0.0
        k = 1.0 / sqrt((2.0 - delta) * np.exp(lgamma(n - m + 1) - lgamma(n + m + 1)))
    else:
        k = sqrt((2 * n + 1) / (4 * pi))
    if basis.condon_shortley and m % 2:
        k = -k
    return k


def convert_coefficients(
    alpha: np.ndarray, beta: np.ndarray, *, source: Basis, target: Basis
) -> tuple[np.ndarray, np.ndarray]:
    """Convert cosine/sine coefficient arrays from one basis to another.

    Parameters
    ----------
    alpha, beta : (N+1, N+1) ndarray
        Coefficients of the cosine and sine harmonics, indexed ``[n, m]``.
    source, target : Basis
        Basis the coefficients are given in, and basis wanted.

    Returns
    -------
    alpha, beta : (N+1, N+1) ndarray
        New arrays; the inputs are not modified.
    """
    alpha = np.array(alpha, dtype=float)
    beta = np.array(beta, dtype=float)
    for n in range(alpha.shape[0]):
        for m in range(n + 1):
            ratio = basis_factor(n, m, source) / basis_factor(n, m, target)
            alpha[n, m] *= ratio
            beta[n, m] *= ratio
    return alpha, beta


def iter_harmonics(
    points: np.ndarray, degree: int, *, gradient: bool = False, orders: dict[int, int] | None = None
) -> Iterator[tuple[int, int, np.ndarray, np.ndarray, np.ndarray | None, np.ndarray | None]]:
    """Yield Schmidt solid harmonics term by term, order-major.

    Parameters
    ----------
    points : (..., 3) ndarray
        Cartesian positions, in units of the reference radius (dimensionless).
    degree : int
        Highest degree ``N``.
    gradient : bool
        Also yield the Cartesian gradients.
    orders : dict of int to int, optional
        If given, only orders ``m`` that are keys are yielded, up to degree
        ``orders[m]`` (the sectoral chain is still run through every order).

    Yields
    ------
    n, m : int
        Degree and order, for ``m`` in ``0..N`` and ``n`` in ``m..N``.
    C, S : (...) ndarray
        :math:`C_n^m` and :math:`S_n^m` at the points.
    dC, dS : (3, ...) ndarray or None
        Their gradients with respect to the point coordinates.

    Notes
    -----
    Sectoral terms: :math:`C_m^m + iS_m^m = f_m (x + iy)(C_{m-1}^{m-1} + i S_{m-1}^{m-1})`
    with :math:`f_1 = 1`, :math:`f_m = \\sqrt{(2m-1)/(2m)}`. Along the degree:

    .. math::

        T_n^m = \\frac{(2n-1)\\,z\\,T_{n-1}^m - \\sqrt{(n-1)^2 - m^2}\\; r^2\\, T_{n-2}^m}
                      {\\sqrt{n^2 - m^2}} .

    Both are the Schmidt recurrences of [1]_ multiplied through by :math:`r^n`,
    so every quantity stays of the size of :math:`r^n`. Gradients are carried
    along the same recurrences (forward differentiation), not approximated.
    """
    pts = np.asarray(points, dtype=float)
    x, y, z = pts[..., 0], pts[..., 1], pts[..., 2]
    r2 = x * x + y * y + z * z
    one = np.ones_like(x)
    zero = np.zeros_like(x)
    # Sectoral seed (m = 0): C = 1, S = 0.
    sc, ss = one, zero
    dsc = np.zeros((3,) + x.shape) if gradient else None
    dss = np.zeros((3,) + x.shape) if gradient else None
    for m in range(degree + 1):
        if m >= 1:
            f = 1.0 if m == 1 else sqrt((2 * m - 1) / (2 * m))
            nc = f * (x * sc - y * ss)
            ns = f * (x * ss + y * sc)
            if gradient:
                ndc = f * (x * dsc - y * dss)
                nds = f * (x * dss + y * dsc)
                ndc[0] += f * sc
                ndc[1] -= f * ss
                nds[0] += f * ss
                nds[1] += f * sc
                dsc, dss = ndc, nds
            sc, ss = nc, ns
        if orders is None:
            yield from _along_degree(m, degree, x, y, z, r2, sc, ss, dsc, dss)
        elif m in orders:
            yield from _along_degree(m, orders[m], x, y, z, r2, sc, ss, dsc, dss)
        if orders is not None and m >= max(orders, default=-1):
            return


def _along_degree(m, degree, x, y, z, r2, sc, ss, dsc, dss):
    """Run the degree recurrence for fixed order ``m`` from the sectoral term."""
    gradient = dsc is not None
    prev_c, prev_s = np.zeros_like(sc), np.zeros_like(ss)
    prev_dc = np.zeros_like(dsc) if gradient else None
    prev_ds = np.zeros_like(dss) if gradient else None
    cur_c, cur_s, cur_dc, cur_ds = sc, ss, dsc, dss
    yield m, m, cur_c, cur_s, cur_dc, cur_ds
    for n in range(m + 1, degree + 1):
        a = (2 * n - 1) / sqrt(n * n - m * m)
        b = sqrt((n - 1) ** 2 - m * m) / sqrt(n * n - m * m)
        new_c = a * z * cur_c - b * r2 * prev_c
        new_s = a * z * cur_s - b * r2 * prev_s
        if gradient:
            new_dc = a * z * cur_dc - b * r2 * prev_dc
            new_ds = a * z * cur_ds - b * r2 * prev_ds
            new_dc[2] += a * cur_c
            new_ds[2] += a * cur_s
            for axis, coord in enumerate((x, y, z)):
                new_dc[axis] -= 2.0 * b * coord * prev_c
                new_ds[axis] -= 2.0 * b * coord * prev_s
            prev_dc, prev_ds, cur_dc, cur_ds = cur_dc, cur_ds, new_dc, new_ds
        prev_c, prev_s, cur_c, cur_s = cur_c, cur_s, new_c, new_s
        yield n, m, cur_c, cur_s, cur_dc, cur_ds


def harmonic_table(
    points: np.ndarray, degree: int, *, basis: Basis = SCHMIDT
) -> tuple[np.ndarray, np.ndarray]:
    """Tabulate all cosine and sine solid harmonics at the points.

    Parameters
    ----------
    points : (..., 3) ndarray
        Positions in units of the reference radius.
    degree : int
        Highest degree ``N``.
    basis : Basis
        Normalisation of the returned harmonics.

    Returns
    -------
    C, S : (..., N+1, N+1) ndarray
        ``C[..., n, m]`` and ``S[..., n, m]``; entries with ``m > n`` are zero.
    """
    pts = np.asarray(points, dtype=float)
    shape = pts.shape[:-1] + (degree + 1, degree + 1)
    table_c, table_s = np.zeros(shape), np.zeros(shape)
    for n, m, c, s, _, _ in iter_harmonics(pts, degree):
        k = basis_factor(n, m, basis)
        table_c[..., n, m] = k * c
        table_s[..., n, m] = k * s
    return table_c, table_s


def expansion(
    points: np.ndarray, alpha: np.ndarray, beta: np.ndarray, *, gradient: bool = True
) -> tuple[np.ndarray, np.ndarray | None]:
    """Sum a Schmidt harmonic expansion and, optionally, its gradient.

    Parameters
    ----------
    points : (..., 3) ndarray
        Positions in units of the reference radius.
    alpha, beta : (N+1, N+1) ndarray
        Schmidt coefficients of the cosine and sine terms, indexed ``[n, m]``.
    gradient : bool
        Also return the gradient.

    Returns
    -------
    value : (...) ndarray
        :math:`\\sum_{nm} \\alpha_{nm} C_n^m + \\beta_{nm} S_n^m`.
    grad : (3, ...) ndarray or None
        Its gradient with respect to the (dimensionless) coordinates.

    Notes
    -----
    Terms are accumulated as the recurrence runs, so memory stays a few
    arrays of the size of ``points`` whatever the degree.
    """
    alpha = np.asarray(alpha, dtype=float)
    beta = np.asarray(beta, dtype=float)
    degree = alpha.shape[0] - 1
    pts = np.asarray(points, dtype=float)
    value = np.zeros(pts.shape[:-1])
    grad = np.zeros((3,) + pts.shape[:-1]) if gradient else None
    # Skip orders without coefficients (gradient coils use few of them).
    used = np.nonzero((alpha != 0) | (beta != 0))
    orders: dict[int, int] = {}
    for n, m in zip(*used, strict=True):
        orders[int(m)] = max(orders.get(int(m), 0), int(n))
    for n, m, c, s, dc, ds in iter_harmonics(pts, degree, gradient=gradient, orders=orders):
        a, b = alpha[n, m], beta[n, m]
        if a:
            value += a * c
            if gradient:
                grad += a * dc
        if b:
            value += b * s
            if gradient:
                grad += b * ds
    return value, grad
