"""Coil model from phantom scans: joint fit of the phantom's pose and the coil coefficients.

Model. A marker at ``q`` (phantom frame, mm) sits in world RAS at
``p = R q + t`` (the phantom's rigid pose, one for all scans: the phantom lies
on the table and world coordinates move with the table). In scan ``s`` its
device position is ``r = M p + o_s`` (:class:`~nl_unwarp.frames.DeviceFrame`:
``M`` the device-from-RAS rotation, ``o_s`` the scan's isocenter offset, plus an
optional common correction ``delta``). A linear-gradient reconstruction shows it
at the encoded position ``u(r) = r + d(r)``, i.e. in world at

.. math::

    \\hat{\\mathbf c} = M^T (\\mathbf u(\\mathbf r) - \\mathbf o_s)
                     = \\mathbf p + M^T \\mathbf d(\\mathbf r),

    d_c(\\mathbf r) = \\sum_{n \\ge 2} R_0 [\\alpha^c_{nm} C_n^m + \\beta^c_{nm} S_n^m](\\mathbf r / R_0).

The detected centroids are fitted by ``scipy.optimize.least_squares`` (trust
region reflective, analytic Jacobian, a robust loss) over the 6 pose
parameters, the free coefficients and, optionally, ``delta``.

Fixed terms, and why:

* degree 0 (a constant shift of each axis): exactly degenerate with the
  phantom's translation; it is 0 by the definition of the isocenter.
* degree 1: the antisymmetric part of the linear terms is exactly degenerate
  with the phantom's rotation; the symmetric part is the gradient calibration
  (scale and shear), which the coil model file fixes by definition: encoded
  positions are in units of each coil's own gradient at the isocenter, so the
  nominal terms are 1 and the others 0 (``docs/coil-model-format.md``).
  Calibration belongs to scanner QA, not to the nonlinearity model.

With those fixed, no remaining term is degenerate with the pose (the known
marker layout pins the rotation through the linear part). The isocenter
correction ``delta`` is different: re-centring the expansion by ``e`` and
moving ``delta`` by ``-e`` changes no prediction except through the fixed
degree-0 and degree-1 terms, which for a coil of mirror-symmetric design change
only at third order in ``e``; several table positions do not change that (the
same shifted model explains them all: measured standard errors of 4-14 mm with
three scans). ``delta`` is therefore fitted only when
the symmetry of the design is imposed (``symmetry="mirror"`` or ``"axial"``: a shift
makes terms of the wrong parity: about 0.1 mm from one scan of 464 markers),
and several scans at different table positions then sample the coil over a
longer stretch of z and tighten it (about 0.04 mm from three).

Uncertainty. At the solution, with robust weights :math:`w_i = \\rho'(z_i)` of
the loss (1 for the linear loss), the covariance is
:math:`s^2 (J_w^T J_w)^{-1}` with :math:`J_w = \\sqrt{w} J` and
:math:`s^2 = \\sum w_i r_i^2 / (m - p)`: the Gauss-Newton estimate, as
``scipy.optimize.curve_fit`` computes for the linear loss.

This module is pure math: arrays in, a coil model and tables out.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import least_squares
from scipy.spatial.transform import Rotation

from .coil import AXES, AxisExpansion, CoilModel, ideal_axis
from .fit import SYMMETRIES, fit_terms
from .frames import DeviceFrame
from .harmonics import iter_harmonics
from .markers import RigidPose, kabsch

__all__ = [
    "DEFAULT_LOSS",
    "AUTO_SCALE_SIGMAS",
    "MAX_DEGREE",
    "PhantomFit",
    "PhantomScan",
    "coverage_radius_mm",
    "fit_phantom",
    "free_terms",
]

#: Highest degree a phantom fit accepts: a few hundred markers determine about
#: 3 ((N + 1)^2 - 4) coefficients well only for low degrees.
MAX_DEGREE = 9
#: Robust loss of ``least_squares``: ``soft_l1`` behaves like least squares for
#: residuals below the scale and like an L1 fit beyond it (scipy documentation).
DEFAULT_LOSS = "soft_l1"
#: Residual scale of the robust loss when none is given: this many robust
#: standard deviations (1.4826 MAD) of the residuals of a first, plain
#: least-squares fit. Residuals within it are treated as in least squares;
#: wrong markers, far beyond, weigh as in an L1 fit.
AUTO_SCALE_SIGMAS = 3.0
#: Least automatic scale, mm (exact synthetic data would otherwise give zero).
LOSS_SCALE_FLOOR_MM = 0.005
#: Robust fits at most, each with the scale re-estimated from the one before
#: (stops when the scale changes by less than 5 %).
AUTO_SCALE_ROUNDS = 3
#: Step of the central difference of ``R(theta) q`` in the rotation vector, rad
#: (the difference of a rotation of points ~200 mm: error ~ step^2 * 200 mm).
ROTATION_STEP_RAD = 1e-6
#: A marker whose residual norm exceeds this many robust scales is flagged
#: as an outlier in the residual table.
OUTLIER_SCALES = 5.0


@dataclass
class PhantomScan:
    """Matched markers of one scan.

    Attributes
    ----------
    definition_mm : (M, 3) ndarray
        Matched markers' centres in the phantom frame, mm.
    detected_ras_mm : (M, 3) ndarray
        Their detected centroids, world RAS mm.
    frame : DeviceFrame
        The scan's device frame (patient position, isocenter offset).
    marker_index : (M,) int ndarray
        Index of each marker in the phantom definition.
    label : str
        Name of the scan (file name) for the tables.
    """

    definition_mm: np.ndarray
    detected_ras_mm: np.ndarray
    frame: DeviceFrame
    marker_index: np.ndarray | None = None
    label: str = ""

    def __post_init__(self) -> None:
        self.definition_mm = np.asarray(self.definition_mm, float)
        self.detected_ras_mm = np.asarray(self.detected_ras_mm, float)
        if self.definition_mm.shape != self.detected_ras_mm.shape or self.definition_mm.ndim != 2 \
                or self.definition_mm.shape[1] != 3:
            raise ValueError(f"expected matching (M, 3) definition and detection arrays, got "
                             f"{self.definition_mm.shape} and {self.detected_ras_mm.shape}")
        if self.marker_index is None:
            self.marker_index = np.arange(len(self.definition_mm))
        self.marker_index = np.asarray(self.marker_index, int)


@dataclass
class PhantomFit:
    """Result of :func:`fit_phantom`.

    Attributes
    ----------
    coil : CoilModel
        The fitted model (ideal linear terms, fitted terms of degree 2..N).
    pose : RigidPose
        Phantom frame -> world RAS.
    pose_sigma : dict
        ``rotation_deg`` (3,): standard errors of the rotation vector
        components, degrees; ``translation_mm`` (3,), mm.
    isocenter_correction_mm, isocenter_correction_sigma_mm : (3,) ndarray or None
        The fitted common correction ``delta`` of the isocenter offsets (device
        frame, mm) and its standard errors, when it was fitted.
    coefficients : list of dict
        ``axis, kind, n, m, value, sigma`` of each fitted term (Schmidt,
        dimensionless).
    markers : list of dict
        Per matched marker and scan: ``scan, marker, definition_mm,
        detected_ras_mm, predicted_ras_mm, residual_ras_mm, residual_mm,
        rigid_residual_mm, weight, outlier``.
    residual_rms_mm, residual_max_mm : float
        Over all markers (norm of the 3-D residual).
    rigid_residual_rms_mm : float
        The same for the rigid fit alone (no coil terms): what the model explains.
    dof : int
        Residuals minus parameters.
    sigma_mm : float
        Robust-weighted residual standard deviation per coordinate, mm.
    condition_number : float
        Of the column-normalised weighted Jacobian.
    nfev : int
        Function evaluations of the solver, over all its runs.
    scans : list of dict
        Per scan: ``label, markers, residual_rms_mm, isocenter_offset_mm``.
    settings : dict
        Degree, symmetry, loss, loss scale, reference and valid radius.
    """

    coil: CoilModel
    pose: RigidPose
    pose_sigma: dict
    isocenter_correction_mm: np.ndarray | None
    isocenter_correction_sigma_mm: np.ndarray | None
    coefficients: list
    markers: list
    residual_rms_mm: float
    residual_max_mm: float
    rigid_residual_rms_mm: float
    dof: int
    sigma_mm: float
    condition_number: float
    nfev: int
    scans: list
    settings: dict = field(default_factory=dict)


def free_terms(degree: int, *, symmetry: str = "none") -> dict[str, list[tuple[str, int, int]]]:
    """The terms a phantom fit solves for, per axis: degree 2..N (see the module notes).

    Parameters
    ----------
    degree : int
        Highest degree, 2 to :data:`MAX_DEGREE`.
    symmetry : {"none", "mirror", "axial"}
        Keep only the terms a symmetric design allows
        (:func:`nl_unwarp.fit.term_allowed`, which derives them from the
        parities of the harmonics).
    """
    if not 2 <= degree <= MAX_DEGREE:
        raise ValueError(f"a phantom fit takes degree 2 to {MAX_DEGREE}, got {degree}")
    if symmetry not in SYMMETRIES:
        raise ValueError(f"symmetry must be one of {', '.join(SYMMETRIES)}, got {symmetry!r}")
    return {axis: [t for t in fit_terms(degree, axis=axis, symmetry=symmetry) if t[1] >= 2] for axis in AXES}


def _table_and_gradient(points_device_mm: np.ndarray, terms: list[tuple[str, int, int]],
                        reference_radius_mm: float) -> tuple[np.ndarray, np.ndarray]:
    """Columns ``R0 T(r / R0)`` of the terms at the points, and their gradients in r.

    Returns ``(N, P)`` values (mm) and ``(N, 3, P)`` gradients (dimensionless).
    """
    pts = np.asarray(points_device_mm, float)
    degree = max(n for _, n, _ in terms)
    col = {t: j for j, t in enumerate(terms)}
    values = np.zeros((len(pts), len(terms)))
    grads = np.zeros((len(pts), 3, len(terms)))
    for n, m, c, s, dc, ds in iter_harmonics(pts / reference_radius_mm, degree, gradient=True):
        for kind, v, dv in (("cos", c, dc), ("sin", s, ds)):
            j = col.get((kind, n, m))
            if j is not None:
                values[:, j] = reference_radius_mm * v
                grads[:, :, j] = dv.T
    return values, grads


def coverage_radius_mm(points_device_mm: np.ndarray) -> float:
    """Radius about the isocenter that the points reach along every device axis, mm.

    The smallest of the six half-extents ``max(+-r_c)``; it is the valid
    radius of a phantom fit (the markers surround the isocenter that far).
    """
    pts = np.asarray(points_device_mm, float)
    return float(min(np.max(pts, axis=0).min(), np.max(-pts, axis=0).min()))


class _Problem:
    """Residuals and Jacobian of the joint fit (parameters: rotvec, t, [delta], coefficients)."""

    def __init__(self, scans: Sequence[PhantomScan], pose0: RigidPose, terms: dict, r0: float,
                 fit_delta: bool) -> None:
        self.scans = list(scans)
        self.pose0 = pose0
        self.terms = terms
        self.r0 = r0
        self.fit_delta = fit_delta
        self.n_pose = 9 if fit_delta else 6
        self.sizes = [len(terms[a]) for a in AXES]
        # One table of every term any axis uses; each axis takes its columns.
        self.all_terms = sorted({t for a in AXES for t in terms[a]}, key=lambda t: (t[1], t[2], t[0]))
        index = {t: j for j, t in enumerate(self.all_terms)}
        self.columns = [np.array([index[t] for t in terms[a]], int) for a in AXES]
        self.offsets = np.cumsum([self.n_pose] + self.sizes)
        self.n_params = int(self.offsets[-1])
        self.q = np.concatenate([s.definition_mm for s in self.scans])
        self.obs = np.concatenate([s.detected_ras_mm for s in self.scans])
        self.m = np.concatenate([np.broadcast_to(s.frame.device_from_ras, (len(s.definition_mm), 3, 3))
                                 for s in self.scans])
        self.o = np.concatenate([np.broadcast_to(s.frame.isocenter_offset_mm, (len(s.definition_mm), 3))
                                 for s in self.scans])
        self._cache_x = None

    def split(self, x: np.ndarray):
        theta, t = x[:3], x[3:6]
        delta = x[6:9] if self.fit_delta else np.zeros(3)
        coefs = [x[a:b] for a, b in zip(self.offsets[:-1], self.offsets[1:], strict=True)]
        return theta, t, delta, coefs

    def rotation(self, theta: np.ndarray) -> np.ndarray:
        return Rotation.from_rotvec(theta).as_matrix() @ self.pose0.rotation

    def _evaluate(self, x: np.ndarray):
        if self._cache_x is not None and np.array_equal(x, self._cache_x):
            return self._cache
        theta, t, delta, coefs = self.split(x)
        p = self.q @ self.rotation(theta).T + t
        r = np.einsum("kij,kj->ki", self.m, p) + self.o + delta
        d = np.zeros_like(r)
        jd = np.zeros(r.shape + (3,))
        tables = []
        all_vals, all_grads = _table_and_gradient(r, self.all_terms, self.r0)
        for c in range(3):
            vals, grads = all_vals[:, self.columns[c]], all_grads[:, :, self.columns[c]]
            d[:, c] = vals @ coefs[c]
            jd[:, c, :] = grads @ coefs[c]
            tables.append(vals)
        pred = p + np.einsum("kji,kj->ki", self.m, d)
        self._cache_x, self._cache = x.copy(), (p, r, d, jd, tables, pred)
        return self._cache

    def residuals(self, x: np.ndarray) -> np.ndarray:
        return (self._evaluate(x)[5] - self.obs).ravel()

    def jacobian(self, x: np.ndarray) -> np.ndarray:
        p, r, d, jd, tables, pred = self._evaluate(x)
        theta = x[:3]
        k = len(p)
        jac = np.zeros((k, 3, self.n_params))
        # d pred / d p = I + M^T Jd M ; d pred / d delta = M^T Jd.
        mt_jd = np.einsum("kji,kjl->kil", self.m, jd)
        dpred_dp = np.eye(3) + np.einsum("kil,klj->kij", mt_jd, self.m)
        for j in range(3):
            step = np.zeros(3)
            step[j] = ROTATION_STEP_RAD
            dp = (self.q @ (self.rotation(theta + step) - self.rotation(theta - step)).T) \
                / (2 * ROTATION_STEP_RAD)
            jac[:, :, j] = np.einsum("kij,kj->ki", dpred_dp, dp)
        jac[:, :, 3:6] = dpred_dp
        if self.fit_delta:
            jac[:, :, 6:9] = mt_jd
        for c in range(3):
            a, b = self.offsets[c], self.offsets[c + 1]
            # pred_i += M[c, i] * (A_c @ coef_c)
            jac[:, :, a:b] = self.m[:, c, :, None] * tables[c][:, None, :]
        return jac.reshape(3 * k, self.n_params)


def _auto_scale(residuals: np.ndarray) -> float:
    """:data:`AUTO_SCALE_SIGMAS` robust standard deviations (1.4826 MAD about 0) of residuals, mm."""
    return max(AUTO_SCALE_SIGMAS * 1.4826 * float(np.median(np.abs(residuals))), LOSS_SCALE_FLOOR_MM)


def _loss_weights(residuals: np.ndarray, loss: str, scale: float) -> np.ndarray:
    """``rho'(z)``, ``z = (f / scale)^2``, of scipy's robust losses (scipy documentation)."""
    z = (residuals / scale) ** 2
    if loss == "linear":
        return np.ones_like(z)
    if loss == "soft_l1":
        return 1.0 / np.sqrt(1.0 + z)
    if loss == "huber":
        return np.where(z <= 1.0, 1.0, 1.0 / np.sqrt(np.maximum(z, 1.0)))
    if loss == "cauchy":
        return 1.0 / (1.0 + z)
    if loss == "arctan":
        return 1.0 / (1.0 + z**2)
    raise ValueError(f"unknown loss {loss!r}")


def _covariance(jac: np.ndarray, residuals: np.ndarray, weights: np.ndarray
                ) -> tuple[np.ndarray, float, float, int]:
    """``s^2 (J_w^T J_w)^-1`` from column-normalised SVD; also ``s``, the condition number, dof."""
    sw = np.sqrt(weights)
    jw = jac * sw[:, None]
    norms = np.linalg.norm(jw, axis=0)
    norms[norms == 0] = 1.0
    _, sing, vt = np.linalg.svd(jw / norms, full_matrices=False)
    dof = max(jac.shape[0] - jac.shape[1], 1)
    s2 = float(np.sum(weights * residuals**2) / dof)
    inv = (vt.T / sing**2) @ vt
    cov = s2 * inv / np.outer(norms, norms)
    return cov, float(np.sqrt(s2)), float(sing[0] / sing[-1]), dof


def fit_phantom(
    scans: Sequence[PhantomScan],
    *,
    degree: int,
    initial_pose: RigidPose | None = None,
    reference_radius_mm: float | None = None,
    valid_radius_mm: float | None = None,
    symmetry: str = "none",
    fit_isocenter_offset: bool = False,
    loss: str = DEFAULT_LOSS,
    loss_scale_mm: float | None = None,
    label: str = "phantom fit",
    max_nfev: int | None = None,
) -> PhantomFit:
    """Fit the phantom's pose and a coil model to matched markers of one or more scans.

    Parameters
    ----------
    scans : sequence of PhantomScan
        Matched markers per scan; the phantom's world pose is the same in all.
    degree : int
        Highest harmonic degree of the model (2 to :data:`MAX_DEGREE`).
    initial_pose : RigidPose, optional
        Start of the pose (default: a rigid Kabsch fit of all pairs).
    reference_radius_mm : float, optional
        :math:`R_0` of the model (default: the valid radius).
    valid_radius_mm : float, optional
        Radius the model is trusted in (default: :func:`coverage_radius_mm`
        of the markers' device positions at the initial pose).
    symmetry : {"none", "mirror", "axial"}
        Restrict the terms to those of a symmetric design (:func:`free_terms`).
    fit_isocenter_offset : bool
        Also fit a correction common to all scans' isocenter offsets.
    loss : str
        Robust loss of ``scipy.optimize.least_squares`` (default soft L1).
    loss_scale_mm : float, optional
        Its residual scale, mm; by default :data:`AUTO_SCALE_SIGMAS` robust
        standard deviations of the residuals of a first least-squares fit (from
        which the robust fit then starts), re-estimated from the robust fit's
        residuals until it settles (at most :data:`AUTO_SCALE_ROUNDS` fits).
    label : str
        Label of the coil model.
    max_nfev : int, optional
        Passed to ``least_squares``.

    Returns
    -------
    PhantomFit

    Raises
    ------
    ValueError
        On too few markers for the parameters, markers that do not surround
        the isocenter, an isocenter fit without the mirror symmetry, or an
        unknown option.
    """
    scans = list(scans)
    if not scans:
        raise ValueError("no scans to fit")
    if fit_isocenter_offset and symmetry == "none":
        raise ValueError("the isocenter offset can be fitted only with a symmetry imposed: "
                         "without it a shifted expansion explains the scans as well (see "
                         "nl_unwarp.phantom_fit)")
    terms = free_terms(degree, symmetry=symmetry)
    q = np.concatenate([s.definition_mm for s in scans])
    obs = np.concatenate([s.detected_ras_mm for s in scans])
    pose0 = kabsch(q, obs) if initial_pose is None else initial_pose
    n_params = (9 if fit_isocenter_offset else 6) + sum(len(t) for t in terms.values())
    if 3 * len(q) <= n_params:
        raise ValueError(f"{len(q)} matched markers give {3 * len(q)} coordinates, not enough for "
                         f"{n_params} parameters of degree {degree}: lower the degree or add markers")
    dev0 = np.concatenate([s.frame.to_device(pose0.apply(s.definition_mm)) for s in scans])
    valid = coverage_radius_mm(dev0) if valid_radius_mm is None else float(valid_radius_mm)
    if not valid > 0:
        raise ValueError("the markers do not surround the isocenter (along some device axis all "
                         "lie on one side): the model would be extrapolated at the isocenter")
    r0 = valid if reference_radius_mm is None else float(reference_radius_mm)
    problem = _Problem(scans, pose0, terms, r0, fit_isocenter_offset)
    x0 = np.zeros(problem.n_params)
    x0[3:6] = pose0.translation_ras_mm
    auto = loss_scale_mm is None and loss != "linear"
    nfev = 0
    if loss_scale_mm is None:
        loss_scale_mm = 1.0
        if auto:
            first = least_squares(problem.residuals, x0, jac=problem.jacobian, method="trf", x_scale="jac",
                                  max_nfev=max_nfev)
            x0, nfev = first.x, int(first.nfev)
            loss_scale_mm = _auto_scale(problem.residuals(x0))
    elif not loss_scale_mm > 0:
        raise ValueError(f"the loss scale must be a positive number of mm, got {loss_scale_mm}")
    for _ in range(AUTO_SCALE_ROUNDS if auto else 1):
        result = least_squares(problem.residuals, x0, jac=problem.jacobian, method="trf", loss=loss,
                               f_scale=loss_scale_mm, x_scale="jac", max_nfev=max_nfev)
        x0, nfev = result.x, nfev + int(result.nfev)
        if auto:
            # Wrong markers inflate the first fit's residuals; re-estimate from the robust fit.
            new_scale = _auto_scale(problem.residuals(x0))
            if abs(new_scale - loss_scale_mm) <= 0.05 * loss_scale_mm:
                break
            loss_scale_mm = new_scale
    x = result.x
    res = problem.residuals(x)
    jac = problem.jacobian(x)
    weights = _loss_weights(res, loss, loss_scale_mm)
    cov, sigma, cond, dof = _covariance(jac, res, weights)
    std = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    theta, t, delta, coefs = problem.split(x)
    pose = RigidPose(problem.rotation(theta), t.copy())
    coil = _coil_from(coefs, terms, degree, r0, valid, label)
    coefficients = []
    for c, axis in enumerate(AXES):
        a = problem.offsets[c]
        for j, (kind, n, m) in enumerate(terms[axis]):
            coefficients.append({"axis": axis, "kind": kind, "n": n, "m": m,
                                 "value": float(coefs[c][j]), "sigma": float(std[a + j])})
    markers, scan_rows, norms, rigid_norms = _marker_rows(scans, problem, x, weights, loss_scale_mm, delta)
    return PhantomFit(
        coil=coil, pose=pose,
        pose_sigma={"rotation_deg": np.degrees(std[:3]), "translation_mm": std[3:6].copy()},
        isocenter_correction_mm=delta.copy() if fit_isocenter_offset else None,
        isocenter_correction_sigma_mm=std[6:9].copy() if fit_isocenter_offset else None,
        coefficients=coefficients, markers=markers,
        residual_rms_mm=float(np.sqrt(np.mean(norms**2))), residual_max_mm=float(norms.max()),
        rigid_residual_rms_mm=float(np.sqrt(np.mean(rigid_norms**2))),
        dof=dof, sigma_mm=sigma, condition_number=cond, nfev=nfev, scans=scan_rows,
        settings={"degree": int(degree), "symmetry": symmetry, "loss": loss,
                  "loss_scale_mm": float(loss_scale_mm), "reference_radius_mm": r0,
                  "valid_radius_mm": valid, "fit_isocenter_offset": bool(fit_isocenter_offset)},
    )


def _coil_from(coefs, terms, degree: int, r0: float, valid: float, label: str) -> CoilModel:
    axes = {}
    for c, axis in enumerate(AXES):
        ideal = ideal_axis(axis, reference_radius_mm=r0, valid_radius_mm=valid, degree=degree)
        alpha, beta = ideal.alpha.copy(), ideal.beta.copy()
        for (kind, n, m), value in zip(terms[axis], coefs[c], strict=True):
            (alpha if kind == "cos" else beta)[n, m] = value
        axes[axis] = AxisExpansion(alpha, beta, r0, valid)
    return CoilModel(axes, label=label, source={"kind": "fit"})


def _marker_rows(scans, problem: _Problem, x, weights, scale: float, delta):
    pred = problem._evaluate(x)[5]
    resid = pred - problem.obs
    norms = np.linalg.norm(resid, axis=1)
    rigid = kabsch(problem.q, problem.obs)
    rigid_norms = np.linalg.norm(rigid.apply(problem.q) - problem.obs, axis=1)
    w = weights.reshape(-1, 3).min(axis=1)
    rows, scan_rows, start = [], [], 0
    for s in scans:
        stop = start + len(s.definition_mm)
        for k in range(start, stop):
            rows.append({
                "scan": s.label, "marker": int(s.marker_index[k - start]),
                "definition_mm": problem.q[k].tolist(), "detected_ras_mm": problem.obs[k].tolist(),
                "predicted_ras_mm": pred[k].tolist(), "residual_ras_mm": resid[k].tolist(),
                "residual_mm": float(norms[k]), "rigid_residual_mm": float(rigid_norms[k]),
                "weight": float(w[k]), "outlier": bool(norms[k] > OUTLIER_SCALES * scale),
            })
        scan_rows.append({"label": s.label, "markers": int(stop - start),
                          "residual_rms_mm": float(np.sqrt(np.mean(norms[start:stop] ** 2))),
                          "isocenter_offset_mm": (s.frame.isocenter_offset_mm + delta).tolist()})
        start = stop
    return rows, scan_rows, norms, rigid_norms
