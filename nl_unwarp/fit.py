"""Least-squares fits of harmonic coil models to encoded-position samples.

The model of :mod:`nl_unwarp.coil` is linear in its coefficients, so a fit is
one linear least-squares solve per gradient axis. Samples are encoded positions
``u_c`` (mm) at known device positions; samples of the field a coil makes
convert to them by dividing by the coil's gradient at the isocenter
(:func:`encoded_from_field`). This module is pure math: it takes arrays and
returns coil models.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass

import numpy as np

from .coil import AXES, AxisExpansion, CoilModel
from .harmonics import harmonic_table

__all__ = ["AxisFit", "design_matrix", "encoded_from_field", "fit_axis", "fit_coil", "fit_terms"]


@dataclass(frozen=True)
class AxisFit:
    """Quality figures of one axis fit.

    Attributes
    ----------
    residual_rms_mm, residual_max_mm : float
        Root-mean-square and largest absolute residual of the encoded
        position over the samples, mm.
    condition_number : float
        2-norm condition number of the column-normalised design matrix: how
        well the sample positions separate the fitted terms (1 is ideal).
    samples, terms : int
        Number of samples and of fitted coefficients.
    """

    residual_rms_mm: float
    residual_max_mm: float
    condition_number: float
    samples: int
    terms: int


def encoded_from_field(bz_mT: np.ndarray, *, gradient_mT_per_m: float) -> np.ndarray:
    """Encoded position (mm) from samples of the z field of one gradient coil.

    Parameters
    ----------
    bz_mT : ndarray, mT
        :math:`B_z` made by coil ``c`` alone (the main field removed).
    gradient_mT_per_m : float
        :math:`G_c = \\partial B_{z,c} / \\partial c` at the isocenter, mT/m.

    Returns
    -------
    ndarray, mm
        :math:`u_c = B_{z,c} / G_c`: a reconstruction that assumes a linear
        gradient of strength :math:`G_c` places the signal there.
    """
    return 1e3 * np.asarray(bz_mT, dtype=float) / float(gradient_mT_per_m)


def fit_terms(degree: int, orders: Iterable[int] | None = None) -> list[tuple[str, int, int]]:
    """The terms a fit solves for, as ``(kind, n, m)`` with kind ``"cos"`` or ``"sin"``.

    Parameters
    ----------
    degree : int
        Highest degree ``N``.
    orders : iterable of int, optional
        Orders ``m`` to fit (all of ``0..N`` by default); the others stay zero.

    Notes
    -----
    :math:`S_n^0` vanishes identically and is never a term.
    """
    keep = set(range(degree + 1)) if orders is None else {int(m) for m in orders}
    terms = []
    for m in sorted(keep):
        if not 0 <= m <= degree:
            raise ValueError(f"order m={m} out of range for degree {degree}")
        terms += [("cos", n, m) for n in range(m, degree + 1)]
        if m > 0:
            terms += [("sin", n, m) for n in range(m, degree + 1)]
    return terms


def design_matrix(points_device_mm: np.ndarray, terms: list[tuple[str, int, int]], *,
                  reference_radius_mm: float) -> np.ndarray:
    """Harmonics at the points, one column per term, scaled as the model is.

    Parameters
    ----------
    points_device_mm : (N, 3) ndarray, mm
    terms : list of (kind, n, m)
        From :func:`fit_terms`.
    reference_radius_mm : float
        :math:`R_0`, mm.

    Returns
    -------
    (N, len(terms)) ndarray, mm
        Column ``(kind, n, m)`` holds :math:`R_0 C_n^m(\\mathbf r / R_0)` or
        :math:`R_0 S_n^m(\\mathbf r / R_0)`, so that ``A @ coefficients`` is
        the encoded position in mm.
    """
    pts = np.asarray(points_device_mm, dtype=float).reshape(-1, 3)
    degree = max((n for _, n, _ in terms), default=0)
    table_c, table_s = harmonic_table(pts / reference_radius_mm, degree)
    cols = [(table_c if kind == "cos" else table_s)[:, n, m] for kind, n, m in terms]
    return reference_radius_mm * np.stack(cols, axis=-1)


def fit_axis(
    points_device_mm: np.ndarray,
    encoded_mm: np.ndarray,
    *,
    degree: int,
    reference_radius_mm: float,
    valid_radius_mm: float,
    orders: Iterable[int] | None = None,
) -> tuple[AxisExpansion, AxisFit]:
    """Fit the harmonic expansion of one gradient axis to encoded positions.

    Parameters
    ----------
    points_device_mm : (N, 3) ndarray, mm
        True sample positions, device frame.
    encoded_mm : (N,) ndarray, mm
        Encoded position of this axis at each sample (for field samples see
        :func:`encoded_from_field`: :math:`u_c = B_{z,c} / G_c`).
    degree : int
        Highest degree fitted.
    reference_radius_mm : float
        :math:`R_0` of the returned expansion, mm.
    valid_radius_mm : float
        Radius inside which the result is to be trusted, mm (usually the
        radius the samples cover).
    orders : iterable of int, optional
        Orders ``m`` fitted; by default all.

    Returns
    -------
    AxisExpansion
        Schmidt coefficients ``alpha``, ``beta`` of shape ``(degree + 1, degree + 1)``.
    AxisFit
        Residuals and condition number.

    Raises
    ------
    ValueError
        On mismatched shapes, fewer samples than terms, or sample positions
        that cannot separate the terms (rank-deficient design).

    Notes
    -----
    Solves, in the least-squares sense,

    .. math::

        u_c(\\mathbf r_i) = R_0 \\sum_{nm} \\alpha_{nm} C_n^m(\\mathbf r_i/R_0)
                          + \\beta_{nm} S_n^m(\\mathbf r_i/R_0)

    with the columns normalised to unit length before the solve (equilibration:
    the condition number then reflects the sampling, not the choice of :math:`R_0`).
    """
    pts = np.asarray(points_device_mm, dtype=float)
    values = np.asarray(encoded_mm, dtype=float)
    if pts.ndim != 2 or pts.shape[1] != 3 or values.shape != (pts.shape[0],):
        raise ValueError(f"expected (N, 3) points and (N,) encoded positions, got {pts.shape} and "
                         f"{values.shape}")
    terms = fit_terms(degree, orders)
    if pts.shape[0] < len(terms):
        raise ValueError(f"{pts.shape[0]} samples cannot determine {len(terms)} terms of degree "
                         f"{degree}: add samples or lower the degree")
    design = design_matrix(pts, terms, reference_radius_mm=reference_radius_mm)
    norms = np.linalg.norm(design, axis=0)
    if np.any(norms == 0):
        raise ValueError("a harmonic term vanishes at every sample (e.g. all samples at the "
                         "origin or on the z axis): spread the samples over a sphere")
    scaled, _, rank, sing = np.linalg.lstsq(design / norms, values, rcond=None)
    if rank < len(terms):
        raise ValueError(f"the samples separate only {rank} of {len(terms)} terms: spread them over "
                         "a sphere or lower the degree")
    coef = scaled / norms
    residual = design @ coef - values
    alpha = np.zeros((degree + 1, degree + 1))
    beta = np.zeros_like(alpha)
    for (kind, n, m), value in zip(terms, coef, strict=True):
        (alpha if kind == "cos" else beta)[n, m] = value
    report = AxisFit(
        residual_rms_mm=float(np.sqrt(np.mean(residual**2))),
        residual_max_mm=float(np.max(np.abs(residual))),
        condition_number=float(sing[0] / sing[-1]),
        samples=int(pts.shape[0]),
        terms=len(terms),
    )
    return AxisExpansion(alpha, beta, float(reference_radius_mm), float(valid_radius_mm)), report


def fit_coil(
    samples_by_axis: Mapping[str, tuple[np.ndarray, np.ndarray]],
    *,
    degree: int,
    reference_radius_mm: float,
    valid_radius_mm: float,
    orders: Mapping[str, Iterable[int]] | None = None,
    label: str = "fitted",
    description: str = "",
    date: str | None = None,
) -> tuple[CoilModel, dict[str, AxisFit]]:
    """Fit a coil model, one axis at a time, to encoded-position samples.

    Parameters
    ----------
    samples_by_axis : mapping of str to (points_device_mm, encoded_mm)
        For each of ``"x"``, ``"y"``, ``"z"``: (N, 3) device positions (mm) and
        (N,) encoded positions (mm) of that axis. Field samples convert by
        :math:`u_c = B_{z,c} / G_c`, with :math:`G_c` the gradient of coil
        ``c`` at the isocenter (:func:`encoded_from_field`).
    degree, reference_radius_mm, valid_radius_mm
        As in :func:`fit_axis`, the same for every axis.
    orders : mapping of str to iterable of int, optional
        Per axis, the orders fitted (default: all orders for every axis).
    label, description, date : str
        Label and provenance of the model (``source.kind`` is ``"fit"``).

    Returns
    -------
    CoilModel
    dict of str to AxisFit
        The fit figures of each axis.
    """
    missing = [a for a in AXES if a not in samples_by_axis]
    if missing:
        raise ValueError(f"samples missing for gradient axis {', '.join(missing)}; expected x, y and z")
    axes, reports = {}, {}
    for name in AXES:
        points, encoded = samples_by_axis[name]
        axes[name], reports[name] = fit_axis(
            points, encoded, degree=degree, reference_radius_mm=reference_radius_mm,
            valid_radius_mm=valid_radius_mm, orders=None if orders is None else orders.get(name))
    worst = max(r.residual_max_mm for r in reports.values())
    source = {"kind": "fit", "description": description or (
        f"least-squares fit of degree {degree} to {sum(r.samples for r in reports.values())} "
        f"samples; largest residual {worst:.3g} mm")}
    if date is not None:
        source["date"] = date
    return CoilModel(axes, label=label, source=source), reports
