"""Least-squares fits of harmonic coil models to encoded-position samples.

The model of :mod:`nl_unwarp.coil` is linear in its coefficients, so a fit is
one linear least-squares solve per gradient axis. Samples are encoded positions
``u_c`` (mm) at known device positions; samples of the field a coil makes
convert to them by dividing by the coil's gradient at the isocenter
(:func:`encoded_from_field`). This module is pure math: it takes arrays and
returns coil models, fit figures and structured warnings (never prints).

Linear algebra
--------------
Terms are ordered by degree (:func:`fit_terms`), the design's columns are
normalised to unit length (equilibration), and the design is factorised once
by a Householder QR, ``A = Q R``. Because a QR's leading ``k`` columns of ``Q``
and ``k x k`` block of ``R`` are those of the first ``k`` columns of ``A``
alone, that one factorisation holds the fit of *every* lower degree: the
coefficients of degree ``d`` solve ``R[:k, :k] c = (Q^T b)[:k]``, and their
leave-one-out residuals follow from the leverages ``h_i = sum_j<k Q_ij^2`` by
the PRESS identity ``e_(i) = e_i / (1 - h_i)`` (Allen, Technometrics 16, 1974;
any regression text). Cross-validated degree choice and the comparison fit of
degree ``d + 2`` therefore cost no extra factorisation. ``Q`` itself is never
formed: the QR of ``[A | b]`` gives ``R`` and ``Q^T b``, and the columns of ``Q``
the leverages need are ``A R^{-1}``. Axes sampled at the same positions with the
same terms share one factorisation (a right-hand side each), and the design is
built column-major straight from the harmonic recurrences.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import asdict, dataclass, field, replace

import numpy as np
from scipy.linalg import qr, solve_triangular

from .coil import AXES, AxisExpansion, CoilModel
from .harmonics import expansion, iter_harmonics

__all__ = [
    "DEFAULT_MAX_DEGREE",
    "SYMMETRIES",
    "AxisFit",
    "ErrorAtRadius",
    "FitSummary",
    "FitWarning",
    "design_matrix",
    "encoded_from_field",
    "fit_axis",
    "fit_coil",
    "fit_provenance",
    "fit_samples",
    "fit_terms",
    "term_allowed",
    "valid_radius_from_samples",
]

#: Symmetry constraints a fit can impose (see :func:`term_allowed`).
SYMMETRIES = ("none", "mirror", "axial")
#: Highest degree tried when the degree is chosen by cross-validation.
DEFAULT_MAX_DEGREE = 15
#: Degree step of the comparison fit that estimates the model error: +2 keeps the
#: parity of the degree, so with a symmetry (odd degrees only) it is the next
#: fitted degree, and without one it adds one even and one odd degree.
COMPARISON_STEP = 2
#: Condition number of the column-normalised design above which a warning is
#: returned: measurement noise can then be amplified ~1e4-fold in the coefficients
#: (the fitted values at the samples are not affected, extrapolation is). Samples on a
#: sphere or in a ball about the isocenter give < 3 even at degree 15 (solid harmonics of
#: different degree or order are orthogonal on every sphere about the origin); one-sided
#: sampling does not: measured 1e4 for a hemisphere at degree 6, 7e7 at degree 11, 4e7 for
#: one octant at degree 6.
CONDITION_WARN = 1e4
#: Direction bins (a Fibonacci lattice) in which samples are looked for, for the
#: coverage check and the valid radius: one bin per this many samples, at least
#: 32 (~36 degrees apart, so that a few hundred random samples fill all) and at most
#: 512 (~9 degrees; the bin width biases the valid radius of a box's samples up by
#: 1/cos(half-width), 0.3 % at 512 bins).
SAMPLES_PER_BIN = 20
DIRECTION_BINS = (32, 512)
#: A fitted linear coefficient further than this from 1 means the stated nominal
#: gradient is not the coil's gradient at the isocenter (common practice, no source).
LINEAR_WARN = 0.05
#: Fewer samples than this many per fitted term make leave-one-out scores noisy
#: (common practice, no source).
SAMPLES_PER_TERM_WARN = 3.0
#: Radii (in units of the valid radius) of the error-versus-radius table.
ERROR_RADII = tuple(np.round(np.arange(0.1, 1.51, 0.05), 2))
#: Directions per radius of the error-versus-radius table.
ERROR_DIRECTIONS = 300


@dataclass(frozen=True)
class FitWarning:
    """A structured warning of a fit (the caller decides how to show it).

    Attributes
    ----------
    code : str
        ``ill-conditioned``, ``coverage``, ``few-samples``, ``degree-at-limit``,
        ``linear-term``, ``beyond-samples`` or ``no-error-estimate``.
    axis : str or None
        Gradient axis concerned (None: all).
    message : str
        One sentence saying what it means and what to do.
    """

    code: str
    axis: str | None
    message: str


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
    degree : int
        Degree fitted.
    cv_rms_mm : float
        Leave-one-out (held-out) RMS residual at that degree, mm.
    cv_scores : tuple of (degree, rms_mm, se_mm2)
        Leave-one-out RMS residual and the standard error of its mean square
        for each candidate degree (one entry when the degree was given).
    comparison_degree : int or None
        Degree of the comparison fit (``degree + 2``), None if it could not be
        determined from the samples.
    predicted_error_rms_mm, predicted_error_max_mm : float
        This axis's part of the predicted error inside the valid radius
        (difference to the comparison fit, see :class:`FitSummary`), mm.
    sampled_radius_mm : float
        Radius this axis's samples cover in every direction, mm.
    """

    residual_rms_mm: float
    residual_max_mm: float
    condition_number: float
    samples: int
    terms: int
    degree: int = 0
    cv_rms_mm: float = math.nan
    cv_scores: tuple = ()
    comparison_degree: int | None = None
    predicted_error_rms_mm: float = math.nan
    predicted_error_max_mm: float = math.nan
    sampled_radius_mm: float = math.nan


@dataclass(frozen=True)
class ErrorAtRadius:
    """Predicted error of the encoded position on a sphere about the isocenter, mm."""

    radius_mm: float
    rms_mm: float
    max_mm: float


@dataclass(frozen=True)
class FitSummary:
    """What a fit of a coil model to samples found.

    Attributes
    ----------
    axes : dict of str to AxisFit
    degree_choice : {"given", "cross-validated"}
    symmetry : str
        One of :data:`SYMMETRIES`.
    reference_radius_mm, valid_radius_mm : float
        :math:`R_0` of the model, and the radius written as its valid radius.
    sampled_radius_mm : float
        Radius the samples cover in every direction (smallest over the axes).
    predicted_error_rms_mm, predicted_error_max_mm : float
        Predicted error of the encoded position vector inside the valid radius:
        the difference between the fitted model (degree ``d``) and the
        comparison fit (degree ``d + 2``) to the same samples. See Notes.
    error_vs_radius : tuple of ErrorAtRadius
        The same difference on spheres from 0.1 to 1.5 valid radii.
    growth_exponent : float
        ``k`` in error ~ r^k between 1 and 1.5 valid radii (log-log slope of
        the largest error): how fast the error grows outside the samples.
    warnings : tuple of FitWarning

    Notes
    -----
    Why the difference to a ``d + 2`` fit, not the cross-validated residual:
    the leave-one-out residual is measured *at* the samples and counts the
    measurement noise of the held-out sample as model error; it says nothing
    about points between samples (inside a sphere that was sampled only on
    its surface it cannot be measured at all). The model's error anywhere is
    dominated by the first unfitted degrees (harmonic coefficients at the
    sampled radius decay geometrically with the degree), and a fit that
    includes them differs from the model by about that much everywhere,
    between and outside the samples. The leave-one-out residual is reported
    beside it and chooses the degree.
    """

    axes: Mapping[str, AxisFit]
    degree_choice: str
    symmetry: str
    reference_radius_mm: float
    valid_radius_mm: float
    sampled_radius_mm: float
    predicted_error_rms_mm: float
    predicted_error_max_mm: float
    error_vs_radius: tuple = ()
    growth_exponent: float = math.nan
    warnings: tuple = field(default_factory=tuple)

    def as_dict(self) -> dict:
        """A JSON-ready dictionary (NaN becomes None)."""
        return _json_ready(asdict(self))


def _json_ready(value):
    if isinstance(value, dict):
        return {str(k): _json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_ready(v) for v in value]
    if isinstance(value, (float, np.floating)):
        return None if not math.isfinite(value) else float(value)
    if isinstance(value, np.integer):
        return int(value)
    return value


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


def term_allowed(axis: str, kind: str, n: int, m: int, symmetry: str = "none") -> bool:
    """Whether a symmetric coil design allows the term ``(kind, n, m)`` on ``axis``.

    Parameters
    ----------
    axis : {"x", "y", "z"}
    kind : {"cos", "sin"}
    n, m : int
    symmetry : {"none", "mirror", "axial"}
        ``mirror``: the coil of axis ``c`` is mirror-symmetric in the three
        planes x = 0, y = 0, z = 0, with :math:`B_z` odd in ``c`` and even in the
        other two coordinates (a linear gradient along ``c`` is). ``axial``:
        as ``mirror``, and the z coil is also axially symmetric (loops).

    Notes
    -----
    Derivation, from :math:`C_n^m, S_n^m = \\rho^n \\bar P_n^m(\\cos\\theta)(\\cos, \\sin)\\, m\\phi`:

    * z -> -z maps θ to π - θ, and :math:`P_n^m(-t) = (-1)^{n+m} P_n^m(t)`: both
      kinds have parity :math:`(-1)^{n+m}` in z.
    * y -> -y maps φ to -φ: cos terms are even in y, sin terms odd.
    * x -> -x maps φ to π - φ: :math:`\\cos m(\\pi - \\phi) = (-1)^m \\cos m\\phi`,
      :math:`\\sin m(\\pi - \\phi) = (-1)^{m+1} \\sin m\\phi`.

    Hence, for :math:`B_z` odd in its own axis and even in the others:

    * x coil (odd x, even y, even z): cos terms, m odd, n + m even, so n odd;
    * y coil (even x, odd y, even z): sin terms, m odd (sin parity in x is
      :math:`(-1)^{m+1} = 1`), n odd;
    * z coil (even x, even y, odd z): cos terms, m even, n + m odd, so n odd;
      with axial symmetry only m = 0 (the field does not depend on φ).

    The constant term (n = 0) is excluded by every symmetry: a symmetric coil
    makes no field at its centre.
    """
    if symmetry not in SYMMETRIES:
        raise ValueError(f"unknown symmetry {symmetry!r}; expected one of {', '.join(SYMMETRIES)}")
    if axis not in AXES:
        raise ValueError(f"unknown gradient axis {axis!r}; expected x, y or z")
    if symmetry == "none":
        return True
    z_parity_even = (n + m) % 2 == 0
    if axis == "x":
        allowed = kind == "cos" and m % 2 == 1 and z_parity_even
    elif axis == "y":
        allowed = kind == "sin" and m % 2 == 1 and z_parity_even
    else:
        allowed = kind == "cos" and m % 2 == 0 and not z_parity_even
        if symmetry == "axial":
            allowed = allowed and m == 0
    return allowed


def fit_terms(degree: int, orders: Iterable[int] | None = None, *, axis: str | None = None,
              symmetry: str = "none") -> list[tuple[str, int, int]]:
    """The terms a fit solves for, as ``(kind, n, m)`` with kind ``"cos"`` or ``"sin"``.

    Parameters
    ----------
    degree : int
        Highest degree ``N``.
    orders : iterable of int, optional
        Orders ``m`` to fit (all of ``0..N`` by default); the others stay zero.
    axis : {"x", "y", "z"}, optional
        Gradient axis, needed with a symmetry.
    symmetry : {"none", "mirror", "axial"}
        Keep only the terms :func:`term_allowed` allows.

    Returns
    -------
    list of (kind, n, m)
        Degree-major (``n``, then ``m``, cos before sin): the terms of any lower
        degree are a leading part of the list, which the nested solve relies on.

    Notes
    -----
    :math:`S_n^0` vanishes identically and is never a term.
    """
    keep = set(range(degree + 1)) if orders is None else {int(m) for m in orders}
    for m in keep:
        if not 0 <= m <= degree:
            raise ValueError(f"order m={m} out of range for degree {degree}")
    if symmetry != "none" and axis is None:
        raise ValueError("a symmetry constraint needs the gradient axis")
    terms = []
    for n in range(degree + 1):
        for m in range(n + 1):
            if m not in keep:
                continue
            for kind in ("cos", "sin") if m else ("cos",):
                if symmetry == "none" or term_allowed(axis, kind, n, m, symmetry):
                    terms.append((kind, n, m))
    return terms


def _design(points_device_mm: np.ndarray, terms, reference_radius_mm: float, *, spare: int = 0
            ) -> np.ndarray:
    """Design columns straight from the recurrences, column-major (what LAPACK's QR works on).

    ``spare`` more columns are left uninitialised at the end (for right-hand sides).
    """
    index = {t: i for i, t in enumerate(terms)}
    orders: dict[int, int] = {}
    for _, n, m in terms:
        orders[m] = max(orders.get(m, 0), n)
    design = np.empty((points_device_mm.shape[0], len(terms) + spare), order="F")
    if not terms:
        return design
    scaled = points_device_mm / reference_radius_mm
    for n, m, c, s, _, _ in iter_harmonics(scaled, max(orders.values()), orders=orders):
        for kind, values in (("cos", c), ("sin", s)):
            i = index.get((kind, n, m))
            if i is not None:
                np.multiply(values, reference_radius_mm, out=design[:, i])
    return design


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
    return _design(pts, list(terms), float(reference_radius_mm))


# --- sampling geometry -----------------------------------------------------------------------


def _fibonacci_directions(count: int) -> np.ndarray:
    """(count, 3) unit vectors spread evenly over the sphere (Fibonacci lattice)."""
    i = np.arange(count) + 0.5
    z = 1.0 - 2.0 * i / count
    phi = np.pi * (1.0 + 5**0.5) * i
    rho = np.sqrt(1.0 - z * z)
    return np.stack([rho * np.cos(phi), rho * np.sin(phi), z], -1)


def valid_radius_from_samples(points_device_mm: np.ndarray, *, bins: int | None = None
                              ) -> tuple[float, float]:
    """Radius about the isocenter that the samples cover in every direction.

    Parameters
    ----------
    points_device_mm : (N, 3) ndarray, mm
    bins : int, optional
        Number of direction bins (nearest of a Fibonacci lattice of directions);
        default: one per :data:`SAMPLES_PER_BIN` samples within :data:`DIRECTION_BINS`.

    Returns
    -------
    radius_mm : float
        The smallest, over the direction bins holding samples, of the largest
        sample radius in the bin: for samples on or in a sphere of radius R it
        is R, for a cube of half-width h about h (the inscribed sphere). A
        harmonic series is determined inside a closed surface by its values on
        it, and extrapolates poorly beyond it.
    empty_fraction : float
        Fraction of the direction bins without any sample (0 for full coverage).
    """
    pts = np.asarray(points_device_mm, dtype=float).reshape(-1, 3)
    radius = np.linalg.norm(pts, axis=1)
    off_centre = radius > 0
    if not np.any(off_centre):
        return 0.0, 1.0
    if bins is None:
        low, high = DIRECTION_BINS
        bins = int(np.clip(pts.shape[0] // SAMPLES_PER_BIN, low, high))
    dirs = _fibonacci_directions(bins)
    nearest = np.argmax((pts[off_centre] / radius[off_centre, None]) @ dirs.T, axis=1)
    reach = np.zeros(bins)
    # Largest radius per bin: sort by (bin, radius) and keep the last of each bin.
    order = np.lexsort((radius[off_centre], nearest))
    last = np.r_[np.nonzero(np.diff(nearest[order]))[0], order.size - 1]
    reach[nearest[order][last]] = radius[off_centre][order][last]
    filled = reach > 0
    return float(reach[filled].min()), float(1.0 - filled.mean())


# --- the nested solve ------------------------------------------------------------------------


class _Factors:
    """Householder QR of a degree-ordered, column-normalised design with its right-hand sides.

    The Householder QR of ``[A | B]`` gives ``R`` and ``Q^T B`` (the top-right block) without
    forming ``Q``, which costs as much again. The leading columns of ``Q`` that the
    leave-one-out leverages and the fitted values need are ``A R^{-1}`` (one triangular
    solve), formed only as far as asked and only once.
    """

    def __init__(self, point_set: _PointSet, terms: list, values: np.ndarray) -> None:
        self.point_set, self.terms = point_set, terms
        k = len(terms)
        augmented = point_set.columns(terms, spare=values.shape[1])
        # Column by column (the design is column-major): contiguous reductions, in place.
        self.norms = np.sqrt(np.array([column @ column for column in augmented.T[:k]]))
        for column, norm in zip(augmented.T[:k], self.norms, strict=True):
            if norm > 0:
                column /= norm
        augmented[:, k:] = values
        # mode "raw": R from the leading rows only (mode "r" forms triu of the whole N x k array).
        _, r_aug = qr(augmented, mode="raw", overwrite_a=True, check_finite=False)
        self.r = np.array(r_aug[:k, :k])
        self.qtb = np.array(r_aug[:k, k:])
        self._basis = np.empty((values.shape[0], 0))

    def basis(self, k: int) -> np.ndarray:
        """The first ``k`` columns of ``Q`` (N, k), from ``A R^{-1}``."""
        if self._basis.shape[1] < k:
            design = self.point_set.columns(self.terms[:k])
            design /= np.where(self.norms[:k] > 0, self.norms[:k], 1.0)
            # Q^T = R^{-T} A^T: one triangular solve on the transposed design.
            self._basis = solve_triangular(self.r[:k, :k], design.T, trans="T", check_finite=False).T
        return self._basis[:, :k]


@dataclass
class _NestedFit:
    """One axis's view of shared factors: its right-hand side and what follows from it."""

    factors: _Factors
    column: int
    values: np.ndarray

    @property
    def terms(self) -> list:
        return self.factors.terms

    @property
    def norms(self) -> np.ndarray:
        return self.factors.norms

    @property
    def r(self) -> np.ndarray:
        return self.factors.r

    @property
    def qtb(self) -> np.ndarray:
        return self.factors.qtb[:, self.column]

    def basis(self, k: int) -> np.ndarray:
        return self.factors.basis(k)

    def singular_values(self, k: int) -> np.ndarray:
        return np.linalg.svd(self.r[:k, :k], compute_uv=False)

    def coefficients(self, k: int) -> np.ndarray:
        return solve_triangular(self.r[:k, :k], self.qtb[:k], check_finite=False) / self.norms[:k]


def _expansion(terms, coef, degree: int, r0: float, valid: float) -> AxisExpansion:
    alpha = np.zeros((degree + 1, degree + 1))
    beta = np.zeros_like(alpha)
    for (kind, n, m), value in zip(terms, coef, strict=True):
        (alpha if kind == "cos" else beta)[n, m] = value
    return AxisExpansion(alpha, beta, float(r0), float(valid))


@dataclass
class _AxisResult:
    expansion: AxisExpansion
    comparison: AxisExpansion | None
    report: AxisFit
    warnings: list


def _determinable(nested: _NestedFit, k: int, samples: int) -> tuple[bool, int]:
    """Whether the leading ``k`` terms are separated by the samples, and the numerical rank."""
    if k > samples or k > nested.r.shape[0] or np.any(nested.norms[:k] == 0):
        return False, 0
    sing = nested.singular_values(k)
    rank = int(np.sum(sing > sing[0] * np.finfo(float).eps * max(samples, k)))
    return rank == k, rank


def _loo_scores(nested: _NestedFit, counts: list[int]) -> list[tuple[float, float]]:
    """Leave-one-out mean square residual and its standard error for each leading count."""
    fitted = np.zeros_like(nested.values)
    leverage = np.zeros_like(nested.values)
    basis = nested.basis(max(counts))
    done, out = 0, []
    for k in counts:
        block = basis[:, done:k]
        fitted += block @ nested.qtb[done:k]
        leverage += np.einsum("ij,ij->i", block, block)
        done = k
        free = 1.0 - leverage
        if np.any(free <= 1e-12):
            out.append((math.inf, math.inf))
            continue
        loo_sq = ((nested.values - fitted) / free) ** 2
        se = float(loo_sq.std(ddof=1) / math.sqrt(loo_sq.size)) if loo_sq.size > 1 else math.inf
        out.append((float(loo_sq.mean()), se))
    return out


@dataclass
class _Plan:
    """The terms an axis fit factorises, and the degrees it may choose from."""

    terms: list
    counts: dict
    wanted: list
    qr_degree: int


def _axis_plan(axis: str | None, samples: int, *, degree: int | None, max_degree: int, symmetry: str,
               orders) -> _Plan:
    """Terms up to the comparison degree (as many as the samples carry) and the candidate degrees."""
    top = (degree if degree is not None else max_degree) + COMPARISON_STEP
    all_terms = fit_terms(top, orders, axis=axis, symmetry=symmetry)
    counts = {d: sum(1 for _, n, _ in all_terms if n <= d) for d in range(top + 1)}
    wanted = [degree] if degree is not None else [
        d for d in range(1, max_degree + 1) if counts[d] > counts[d - 1]]
    if degree is not None and counts[degree] == 0:
        raise ValueError(f"no terms to fit up to degree {degree} with symmetry {symmetry!r}: raise "
                         "the degree")
    if degree is not None and samples < counts[degree]:
        raise ValueError(f"{samples} samples cannot determine {counts[degree]} terms of degree "
                         f"{degree}: add samples or lower the degree")
    qr_degree = max(d for d in range(top + 1) if counts[d] <= samples) if counts[0] <= samples else 0
    return _Plan(all_terms[: counts[qr_degree]], counts, wanted, qr_degree)


def _fit_one(axis: str | None, point_set: _PointSet, plan: _Plan, values: np.ndarray, *,
             degree: int | None, max_degree: int, r0: float, valid: float) -> _AxisResult:
    """Fit one axis: a given degree, or the cross-validated one up to ``max_degree``."""
    samples = point_set.points.shape[0]
    terms, counts, wanted, qr_degree = plan.terms, plan.counts, plan.wanted, plan.qr_degree
    nested = point_set.factorised(terms, axis, values)
    requested = counts[degree] if degree is not None else None
    if requested is not None:
        if np.any(nested.norms[:requested] == 0):
            raise ValueError("a harmonic term vanishes at every sample (e.g. all samples at the origin "
                             "or on the z axis): spread the samples over a sphere")
        ok, rank = _determinable(nested, requested, samples)
        if not ok:
            raise ValueError(f"the samples separate only {rank} of {requested} terms: spread them over "
                             "a sphere or lower the degree")
    candidates = [d for d in wanted if _determinable(nested, counts[d], samples)[0]]
    if not candidates:
        raise ValueError(f"the {samples} samples cannot determine even a degree-1 fit: spread them "
                         "over a sphere")
    scores = _loo_scores(nested, [counts[d] for d in candidates])
    if degree is None:
        best = int(np.argmin([s[0] for s in scores]))
        threshold = scores[best][0] + scores[best][1]
        # One-standard-error rule (Breiman et al. 1984; Hastie, Tibshirani & Friedman, The
        # Elements of Statistical Learning, 2nd ed., 7.10, from memory): the smallest degree whose
        # held-out error is within one standard error of the best.
        chosen = next(d for d, s in zip(candidates, scores, strict=True) if s[0] <= threshold)
    else:
        chosen = degree
    k = counts[chosen]
    coef = nested.coefficients(k)
    residual = nested.basis(k) @ nested.qtb[:k] - values
    comparison_degree = next((d for d in range(chosen + COMPARISON_STEP, chosen, -1)
                              if d <= qr_degree and counts[d] > k
                              and _determinable(nested, counts[d], samples)[0]), None)
    comparison = None
    if comparison_degree is not None:
        kc = counts[comparison_degree]
        comparison = _expansion(terms[:kc], nested.coefficients(kc), comparison_degree, r0, valid)
    sing = nested.singular_values(k)
    loo = dict(zip(candidates, scores, strict=True))
    sampled, empty = point_set.coverage
    report = AxisFit(
        residual_rms_mm=float(np.sqrt(np.mean(residual**2))),
        residual_max_mm=float(np.max(np.abs(residual))),
        condition_number=float(sing[0] / sing[-1]),
        samples=int(samples),
        terms=int(k),
        degree=int(chosen),
        cv_rms_mm=float(math.sqrt(loo[chosen][0])),
        cv_scores=tuple((int(d), float(math.sqrt(s[0])), float(s[1])) for d, s in loo.items()),
        comparison_degree=comparison_degree,
        sampled_radius_mm=sampled,
    )
    fitted = _expansion(terms[:k], coef, chosen, r0, valid)
    warnings = _axis_warnings(axis, report, fitted, degree is None and chosen == candidates[-1]
                              and candidates[-1] == wanted[-1], empty, max_degree)
    return _AxisResult(fitted, comparison, report, warnings)


def _axis_warnings(axis, report: AxisFit, expansion: AxisExpansion, at_limit: bool, empty: float,
                   max_degree: int) -> list[FitWarning]:
    out = []
    if report.condition_number > CONDITION_WARN:
        out.append(FitWarning("ill-conditioned", axis, (
            f"condition number {report.condition_number:.3g} of the normalised design: the samples "
            "separate the terms poorly and noise is amplified in the coefficients; sample the surface "
            "of a sphere (not only its inside) or lower the degree")))
    if empty > 0:
        out.append(FitWarning("coverage", axis, (
            f"{100 * empty:.0f} % of the directions from the isocenter hold no sample: the model is "
            "extrapolated there; sample the whole sphere")))
    if report.samples < SAMPLES_PER_TERM_WARN * report.terms:
        out.append(FitWarning("few-samples", axis, (
            f"{report.samples} samples for {report.terms} terms (fewer than "
            f"{SAMPLES_PER_TERM_WARN:g} per term): held-out scores are noisy; add samples")))
    if at_limit:
        out.append(FitWarning("degree-at-limit", axis, (
            f"cross-validation chose the highest degree tried ({max_degree}): the samples support "
            "more terms; raise the maximum degree if the samples allow")))
    if axis is not None:
        linear = expansion.linear_coefficient(axis)
        if abs(linear - 1.0) > LINEAR_WARN:
            out.append(FitWarning("linear-term", axis, (
                f"fitted linear coefficient {linear:.4g} (expected about 1): the stated nominal "
                "gradient is not this coil's gradient at the isocenter, or the field is in other "
                "units")))
    if report.comparison_degree is None:
        out.append(FitWarning("no-error-estimate", axis, (
            f"no degree-{report.degree + COMPARISON_STEP} comparison fit is possible with these "
            "samples, so the predicted error is unknown; add samples")))
    return out


# --- predicted error -------------------------------------------------------------------------


def _error_points(radius_mm: float) -> tuple[np.ndarray, np.ndarray]:
    """(R, D, 3) points on spheres at :data:`ERROR_RADII` valid radii, and the radii (mm)."""
    dirs = _fibonacci_directions(ERROR_DIRECTIONS)
    radii = np.asarray(ERROR_RADII, dtype=float) * radius_mm
    return radii[:, None, None] * dirs[None], radii


def _difference_mm(results: Mapping[str, _AxisResult], points: np.ndarray) -> np.ndarray | None:
    """(..., 3) difference between the fitted models and their comparison fits at device points."""
    if any(res.comparison is None for res in results.values()):
        return None
    diff = np.zeros(points.shape[:-1] + (len(results),))
    for c, res in enumerate(results.values()):
        for ax, sign in ((res.expansion, 1.0), (res.comparison, -1.0)):
            r0 = ax.reference_radius_mm
            diff[..., c] += sign * r0 * expansion(points / r0, ax.alpha, ax.beta, gradient=False)[0]
    return diff


def _error_summary(results: Mapping[str, _AxisResult], valid_mm: float):
    points, radii = _error_points(valid_mm)
    diff = _difference_mm(results, points)
    if diff is None:
        return (), math.nan, math.nan, math.nan, {}
    mag = np.linalg.norm(diff, axis=-1)
    table = tuple(ErrorAtRadius(float(r), float(np.sqrt(np.mean(m**2))), float(m.max()))
                  for r, m in zip(radii, mag, strict=True))
    inside = radii <= valid_mm * (1 + 1e-9)
    # Volume-weighted RMS over the ball (shells weighted by r^2 dr).
    w = radii[inside] ** 2
    rms_in = float(np.sqrt(np.sum(w * np.mean(mag[inside] ** 2, axis=1)) / np.sum(w)))
    max_in = float(mag[inside].max())
    per_axis = {}
    for c, name in enumerate(results):
        a = np.abs(diff[inside][..., c])
        per_axis[name] = (float(np.sqrt(np.sum(w * np.mean(a**2, axis=1)) / np.sum(w))), float(a.max()))
    at_edge = float(mag[np.argmin(np.abs(radii - valid_mm))].max())
    at_out = float(mag[-1].max())
    growth = (math.log(at_out / at_edge) / math.log(radii[-1] / valid_mm)
              if at_edge > 0 and at_out > 0 else math.nan)
    return table, rms_in, max_in, growth, per_axis


# --- public entry points ---------------------------------------------------------------------


class _PointSet:
    """One set of sample positions, its coverage and QR factorisations, shared by the axes.

    Axes sampled at the same positions with the same terms (no symmetry) share one
    factorisation: one QR, a right-hand side per axis.
    """

    def __init__(self, points: np.ndarray, r0: float) -> None:
        self.points, self.r0 = points, r0
        self._factors: dict = {}
        self._pending: dict = {}
        self._coverage: tuple[float, float] | None = None

    @property
    def coverage(self) -> tuple[float, float]:
        """:func:`valid_radius_from_samples` of the positions (computed once)."""
        if self._coverage is None:
            self._coverage = valid_radius_from_samples(self.points)
        return self._coverage

    def columns(self, terms: list, *, spare: int = 0) -> np.ndarray:
        """A fresh column-major design for ``terms`` (the QR overwrites it; building it from the
        recurrences is cheaper than copying columns out of a stored one)."""
        return _design(self.points, terms, self.r0, spare=spare)

    def register(self, terms: list, axis: str | None, values: np.ndarray) -> None:
        """Announce an axis's right-hand side, so that axes with the same terms share one QR."""
        self._pending.setdefault(tuple(terms), []).append((axis, values))

    def factorised(self, terms: list, axis: str | None, values: np.ndarray) -> _NestedFit:
        """The factors of ``terms`` (with every registered right-hand side), for ``axis``."""
        key = tuple(terms)
        if key not in self._factors:
            pending = self._pending.pop(key, None) or [(axis, values)]
            columns = np.stack([v for _, v in pending], axis=1)
            self._factors[key] = (_Factors(self, list(terms), columns), [a for a, _ in pending])
        factors, axes = self._factors[key]
        return _NestedFit(factors, axes.index(axis), values)


def _check_samples(name, points, values) -> tuple[np.ndarray, np.ndarray]:
    pts = np.asarray(points, dtype=float)
    vals = np.asarray(values, dtype=float)
    if pts.ndim != 2 or pts.shape[1] != 3 or vals.shape != (pts.shape[0],):
        raise ValueError(f"expected (N, 3) points and (N,) encoded positions, got {pts.shape} and "
                         f"{vals.shape}" + (f" for axis {name}" if name else ""))
    if not (np.all(np.isfinite(pts)) and np.all(np.isfinite(vals))):
        raise ValueError("sample positions and values must be finite"
                         + (f" (axis {name})" if name else ""))
    return pts, vals


def fit_axis(
    points_device_mm: np.ndarray,
    encoded_mm: np.ndarray,
    *,
    degree: int,
    reference_radius_mm: float,
    valid_radius_mm: float,
    orders: Iterable[int] | None = None,
    axis: str | None = None,
    symmetry: str = "none",
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
        radius the samples cover, :func:`valid_radius_from_samples`).
    orders : iterable of int, optional
        Orders ``m`` fitted; by default all.
    axis : {"x", "y", "z"}, optional
        The gradient axis (needed with a symmetry).
    symmetry : {"none", "mirror", "axial"}
        Terms kept (:func:`term_allowed`).

    Returns
    -------
    AxisExpansion
        Schmidt coefficients ``alpha``, ``beta`` of shape ``(degree + 1, degree + 1)``.
    AxisFit
        Residuals, condition number, leave-one-out residual.

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
    the condition number then reflects the sampling, not the choice of :math:`R_0`),
    by a QR factorisation (see the module notes).
    """
    pts, values = _check_samples(axis, points_device_mm, encoded_mm)
    plan = _axis_plan(axis, pts.shape[0], degree=int(degree), max_degree=int(degree), symmetry=symmetry,
                      orders=orders)
    result = _fit_one(axis, _PointSet(pts, float(reference_radius_mm)), plan, values, degree=int(degree),
                      max_degree=int(degree), r0=float(reference_radius_mm), valid=float(valid_radius_mm))
    return result.expansion, result.report


def fit_provenance(*, method: str, samples: int, degree: int, residual_rms_mm: float,
                   residual_max_mm: float, description: str = "", date: str | None = None) -> dict:
    """The ``source`` object of a fitted coil model (coil model format, source kind ``fit``).

    Parameters
    ----------
    method : str
        How the samples were taken: ``"field-samples"`` (field maps) or ``"phantom"``.
    samples : int
        Number of samples (field samples over all axes, or phantom markers).
    degree : int
        Highest degree fitted.
    residual_rms_mm, residual_max_mm : float
        Residuals of the fit over all samples, mm.
    description : str
        Free text; a default one is made from the figures.
    date : str, optional
        ISO 8601 date.
    """
    source = {"kind": "fit", "method": str(method), "samples": int(samples), "degree": int(degree),
              "residual_rms_mm": float(residual_rms_mm), "residual_max_mm": float(residual_max_mm),
              "description": description or (
                  f"least-squares fit of degree {degree} to {samples} samples ({method}); residual "
                  f"rms {residual_rms_mm:.3g} mm, max {residual_max_mm:.3g} mm")}
    if date is not None:
        source["date"] = str(date)
    return source


def fit_samples(
    samples_by_axis: Mapping[str, tuple[np.ndarray, np.ndarray]],
    *,
    degree: int | None = None,
    max_degree: int = DEFAULT_MAX_DEGREE,
    symmetry: str = "none",
    reference_radius_mm: float | None = None,
    valid_radius_mm: float | None = None,
    label: str = "fitted",
    description: str = "",
    date: str | None = None,
    method: str = "field-samples",
) -> tuple[CoilModel, FitSummary]:
    """Fit a coil model to encoded-position samples of the three axes, with a fit summary.

    Parameters
    ----------
    samples_by_axis : mapping of str to (points_device_mm, encoded_mm)
        For each of ``"x"``, ``"y"``, ``"z"``: (N, 3) device positions (mm) and
        (N,) encoded positions (mm). Axes whose points are the same array (or
        equal) and whose terms are the same share one QR factorisation.
    degree : int, optional
        Degree fitted to every axis; None: chosen per axis by leave-one-out
        cross-validation (one-standard-error rule) up to ``max_degree``.
    max_degree : int
        Highest degree tried when ``degree`` is None.
    symmetry : {"none", "mirror", "axial"}
        Terms a symmetric coil design forbids are left out (:func:`term_allowed`).
    reference_radius_mm : float, optional
        :math:`R_0` of the model (default: the sampled radius, rounded up to 1 mm).
    valid_radius_mm : float, optional
        Valid radius written to the model (default: the radius the samples of
        all axes cover, :func:`valid_radius_from_samples`). A larger value is
        kept, with a ``beyond-samples`` warning.
    label, description, date, method : str
        Label and provenance (:func:`fit_provenance`).

    Returns
    -------
    CoilModel
    FitSummary
    """
    missing = [a for a in AXES if a not in samples_by_axis]
    if missing:
        raise ValueError(f"samples missing for gradient axis {', '.join(missing)}; expected x, y and z")
    if symmetry not in SYMMETRIES:
        raise ValueError(f"unknown symmetry {symmetry!r}; expected one of {', '.join(SYMMETRIES)}")
    checked = {a: _check_samples(a, *samples_by_axis[a]) for a in AXES}
    point_sets: dict[str, _PointSet] = {}
    for name in AXES:
        pts = checked[name][0]
        point_sets[name] = next((ps for ps in point_sets.values() if ps.points is pts or (
            ps.points.shape == pts.shape and np.array_equal(ps.points, pts))), None) or _PointSet(pts, 1.0)
    sampled = min(point_sets[a].coverage[0] for a in AXES)
    if not sampled > 0:
        raise ValueError("all samples are at the isocenter: spread them over a sphere")
    valid = float(valid_radius_mm) if valid_radius_mm is not None else sampled
    r0 = float(reference_radius_mm) if reference_radius_mm is not None else float(math.ceil(sampled))
    for ps in point_sets.values():
        ps.r0 = r0
    results: dict[str, _AxisResult] = {}
    plans: dict[str, _Plan] = {}
    try:
        for name in AXES:
            plans[name] = _axis_plan(name, checked[name][0].shape[0], degree=degree, max_degree=max_degree,
                                     symmetry=symmetry, orders=None)
            point_sets[name].register(plans[name].terms, name, checked[name][1])
        for name in AXES:
            results[name] = _fit_one(name, point_sets[name], plans[name], checked[name][1], degree=degree,
                                     max_degree=max_degree, r0=r0, valid=valid)
    except ValueError as exc:
        raise ValueError(f"axis {name}: {exc}") from None
    table, rms_in, max_in, growth, per_axis = _error_summary(results, valid)
    axes = {}
    for name, res in results.items():
        rms_a, max_a = per_axis.get(name, (math.nan, math.nan))
        axes[name] = replace(res.report, predicted_error_rms_mm=rms_a, predicted_error_max_mm=max_a)
    warnings = [w for a in AXES for w in results[a].warnings]
    if valid > sampled * (1 + 1e-9):
        warnings.append(FitWarning("beyond-samples", None, (
            f"valid radius {valid:g} mm exceeds the {sampled:.1f} mm the samples cover in every "
            "direction: the model is extrapolated there (see the error-versus-radius table)")))
    summary = FitSummary(axes=axes, degree_choice="given" if degree is not None else "cross-validated",
                         symmetry=symmetry, reference_radius_mm=r0, valid_radius_mm=valid,
                         sampled_radius_mm=sampled, predicted_error_rms_mm=rms_in,
                         predicted_error_max_mm=max_in, error_vs_radius=table, growth_exponent=growth,
                         warnings=tuple(warnings))
    total = sum(a.samples for a in axes.values())
    rms_all = math.sqrt(sum(a.samples * a.residual_rms_mm**2 for a in axes.values()) / total)
    source = fit_provenance(method=method, samples=total, degree=max(a.degree for a in axes.values()),
                            residual_rms_mm=rms_all,
                            residual_max_mm=max(a.residual_max_mm for a in axes.values()),
                            description=description, date=date)
    model = CoilModel({a: results[a].expansion for a in AXES}, label=label, source=source)
    return model, summary


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

    See Also
    --------
    fit_samples : degree by cross-validation, symmetry, warnings and the predicted error.
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
