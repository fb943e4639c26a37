"""Gradient coil models: harmonic expansions of the three gradient axes.

A :class:`CoilModel` holds, for each gradient axis x, y, z of the device frame,
dimensionless Schmidt coefficients of the encoded position (see
:mod:`nl_unwarp.harmonics`):

.. math::

    u_c(\\mathbf r) = R_0 \\sum_{n=0}^{N}\\sum_{m=0}^{n}
        \\left[\\alpha^c_{nm} C_n^m(\\mathbf r / R_0) + \\beta^c_{nm} S_n^m(\\mathbf r / R_0)\\right]

An ideal coil set has only :math:`\\alpha^x_{11} = \\beta^y_{11} = \\alpha^z_{10} = 1`.
This module is pure math: it knows nothing of files (see :mod:`nl_unwarp.io.coilfile`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .harmonics import expansion

__all__ = ["AXES", "AxisExpansion", "CoilModel", "LINEAR_TERMS", "ideal_axis"]

#: Gradient axes of the device frame, in order.
AXES = ("x", "y", "z")

#: The term of each axis that carries the nominal linear gradient: (kind, n, m).
LINEAR_TERMS = {"x": ("cos", 1, 1), "y": ("sin", 1, 1), "z": ("cos", 1, 0)}


@dataclass
class AxisExpansion:
    """Harmonic expansion of one gradient axis.

    Parameters
    ----------
    alpha, beta : (N+1, N+1) ndarray
        Schmidt coefficients (no Condon-Shortley phase) of the cosine and
        sine terms, indexed ``[n, m]``; dimensionless.
    reference_radius_mm : float
        :math:`R_0`, mm.
    valid_radius_mm : float
        Radius around the isocenter inside which the expansion is trusted, mm.
    """

    alpha: np.ndarray
    beta: np.ndarray
    reference_radius_mm: float
    valid_radius_mm: float

    @property
    def degree(self) -> int:
        """Highest degree with a non-zero coefficient."""
        nonzero = np.nonzero(np.any(self.alpha != 0, axis=1) | np.any(self.beta != 0, axis=1))[0]
        return int(nonzero.max()) if nonzero.size else 0

    def linear_coefficient(self, axis: str) -> float:
        """The coefficient of the nominal linear term of ``axis``."""
        kind, n, m = LINEAR_TERMS[axis]
        table = self.alpha if kind == "cos" else self.beta
        return float(table[n, m]) if n < table.shape[0] else 0.0


def ideal_axis(axis: str, *, reference_radius_mm: float = 250.0, valid_radius_mm: float = 250.0,
               degree: int = 1) -> AxisExpansion:
    """A perfectly linear gradient axis (identity encoding)."""
    alpha = np.zeros((degree + 1, degree + 1))
    beta = np.zeros_like(alpha)
    kind, n, m = LINEAR_TERMS[axis]
    (alpha if kind == "cos" else beta)[n, m] = 1.0
    return AxisExpansion(alpha, beta, reference_radius_mm, valid_radius_mm)


@dataclass
class CoilModel:
    """Harmonic model of one gradient system.

    Parameters
    ----------
    axes : dict of str to AxisExpansion
        Keys ``"x"``, ``"y"``, ``"z"`` (device frame).
    label : str
        Scanner or gradient-system label.
    source : dict
        Provenance: ``kind`` (design, measurement, fit), ``description``, ``date``.
    """

    axes: dict[str, AxisExpansion]
    label: str = "unnamed"
    source: dict = field(default_factory=dict)

    @classmethod
    def ideal(cls, **kwargs) -> CoilModel:
        """A perfectly linear gradient system (the identity warp)."""
        return cls({a: ideal_axis(a, **kwargs) for a in AXES}, label="ideal linear")

    @property
    def degree(self) -> int:
        """Highest degree over the three axes."""
        return max(self.axes[a].degree for a in AXES)

    @property
    def valid_radius_mm(self) -> float:
        """Radius inside which all three axes are trusted, mm."""
        return min(self.axes[a].valid_radius_mm for a in AXES)

    def encode(self, points_device_mm: np.ndarray, *, jacobian: bool = True
               ) -> tuple[np.ndarray, np.ndarray | None]:
        """Encoded positions and their Jacobian at device points.

        Parameters
        ----------
        points_device_mm : (..., 3) ndarray
            True positions in the device frame, mm.
        jacobian : bool
            Also return :math:`J = \\partial u / \\partial r`.

        Returns
        -------
        encoded_device_mm : (..., 3) ndarray
            Where a linear-gradient reconstruction places the signal, mm.
        jac : (..., 3, 3) ndarray or None
            ``jac[..., c, k] = d u_c / d r_k`` (dimensionless), from the
            analytic harmonic gradients.
        """
        pts = np.asarray(points_device_mm, dtype=float)
        encoded = np.empty(pts.shape)
        jac = np.empty(pts.shape + (3,)) if jacobian else None
        for c, name in enumerate(AXES):
            ax = self.axes[name]
            r0 = ax.reference_radius_mm
            value, grad = expansion(pts / r0, ax.alpha, ax.beta, gradient=jacobian)
            encoded[..., c] = r0 * value
            if jacobian:
                # d(R0 f(r/R0))/dr = grad f: the radii cancel.
                jac[..., c, :] = np.moveaxis(grad, 0, -1)
        return encoded, jac

    def displacement(self, points_device_mm: np.ndarray) -> np.ndarray:
        """Displacement ``u(r) - r`` (mm) at device points."""
        encoded, _ = self.encode(points_device_mm, jacobian=False)
        return encoded - np.asarray(points_device_mm, dtype=float)
