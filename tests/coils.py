"""Biot-Savart gradient coils for the tests, built with magpylib.

magpylib 5 works in SI units: positions in metres, currents in amperes, fields in
tesla (checked in ``test_fit.py`` against the closed-form field at the centre of a
loop). Everything else in the project is in millimetres; the conversions live here.

* z gradient: a Maxwell pair, two loops of radius ``a`` with opposed currents at
  :math:`z = \\pm(\\sqrt 3 / 2)\\, a`, the spacing at which the third-order term of the
  on-axis field vanishes (Maxwell, *A Treatise on Electricity and Magnetism*, 1873, §715).
* x and y gradients: Golay double-saddle coils, four saddles each made of two
  120° arcs at :math:`|z| = 0.389\\,a` and :math:`2.57\\,a` joined by straight wires
  along z (classic Golay proportions, from memory). Arcs are polygons of
  :data:`ARC_SEGMENTS` straight pieces; the field is that of the polygonal coil,
  computed exactly.

The encoded position of coil ``c`` is :math:`u_c(\\mathbf r) = B_{z,c}(\\mathbf r) / G_c`
with :math:`G_c = \\partial B_{z,c}/\\partial c` at the isocenter, from a finite difference.
"""

from __future__ import annotations

from dataclasses import dataclass

import magpylib as magpy
import numpy as np
from scipy.interpolate import RegularGridInterpolator

#: Coil radius, m: with it encoded positions 10-15 cm from the isocenter are off
#: by about a millimetre (a compact, head-size gradient set).
COIL_RADIUS_M = 0.35
#: Maxwell pair half-spacing in units of the radius (Maxwell 1873, §715).
MAXWELL_HALF_SPACING = np.sqrt(3.0) / 2.0
#: Golay saddle arcs: |z| of the inner and outer arcs (units of the radius) and
#: their angular extent (from memory, classic Golay proportions).
GOLAY_ARC_Z = (0.389, 2.57)
GOLAY_ARC_DEG = 120.0
#: Straight pieces per arc (5° each at 120°): the polygonal coil is the truth, and
#: the cost of a field evaluation grows with the number of pieces.
ARC_SEGMENTS = 24
#: Radius of the y saddles relative to the x saddles. Nested coils differ in radius
#: (common practice, no source); it also makes x and y distort differently, so that
#: a patient position that swaps them is not a symmetry of the coil set.
Y_RADIUS_FACTOR = 1.08
#: Step of the five-point derivative that gives the isocenter gradient, m. Its
#: error is O(step^4 / a^4) ~ 4e-11 relative: negligible.
GRADIENT_STEP_M = 1e-3

AXES = ("x", "y", "z")


def loop_pair(radius_m: float, half_spacing_m: float, *, current_a: float = 1.0) -> magpy.Collection:
    """Two coaxial loops on the z axis at ``z = +-half_spacing_m``, current ``+I`` at ``+z``."""
    return magpy.Collection(
        magpy.current.Circle(position=(0.0, 0.0, half_spacing_m), diameter=2 * radius_m,
                             current=current_a),
        magpy.current.Circle(position=(0.0, 0.0, -half_spacing_m), diameter=2 * radius_m,
                             current=-current_a),
    )


def maxwell_pair(radius_m: float = COIL_RADIUS_M) -> magpy.Collection:
    """z gradient coil: a loop pair at Maxwell's spacing."""
    return loop_pair(radius_m, MAXWELL_HALF_SPACING * radius_m)


def _saddle_vertices(radius_m: float, z_inner_m: float, z_outer_m: float, arc_deg: float,
                     segments: int) -> np.ndarray:
    """Closed saddle centred on +x: inner arc, wire to the outer arc, outer arc back, wire back."""
    phi = np.radians(np.linspace(-arc_deg / 2, arc_deg / 2, segments + 1))
    inner = np.stack([radius_m * np.cos(phi), radius_m * np.sin(phi), np.full_like(phi, z_inner_m)], -1)
    outer = np.stack([radius_m * np.cos(phi[::-1]), radius_m * np.sin(phi[::-1]),
                      np.full_like(phi, z_outer_m)], -1)
    return np.concatenate([inner, outer, inner[:1]])


def golay_coil(axis: str, radius_m: float = COIL_RADIUS_M, *, segments: int = ARC_SEGMENTS
               ) -> magpy.Collection:
    """x or y gradient coil: four Golay saddles.

    The saddle centred on +x at z > 0 is mirrored in x and in z (mirrored
    vertex order, so the current is mirrored too): mirroring in x flips the
    sign of :math:`B_z` (a pseudovector), giving a field odd in x and even in z.
    The y coil is the x coil turned by 90° about z.
    """
    if axis not in ("x", "y"):
        raise ValueError(f"Golay saddles make x or y gradients, not {axis!r}")
    z_in, z_out = (f * radius_m for f in GOLAY_ARC_Z)
    base = _saddle_vertices(radius_m, z_in, z_out, GOLAY_ARC_DEG, segments)
    coil = magpy.Collection(*[magpy.current.Polyline(vertices=base * [sx, 1.0, sz], current=1.0)
                              for sx in (1.0, -1.0) for sz in (1.0, -1.0)])
    if axis == "y":
        coil.rotate_from_angax(90.0, "z", anchor=(0.0, 0.0, 0.0))
    return coil


def bz_tesla(source: magpy.Collection, points_m: np.ndarray) -> np.ndarray:
    """z component of the field (T) at (..., 3) points (m)."""
    pts = np.asarray(points_m, dtype=float)
    # getB squeezes a single point to shape (3,): restore (N, 3).
    field = np.reshape(magpy.getB(source, pts.reshape(-1, 3)), (-1, 3))
    return field[:, 2].reshape(pts.shape[:-1])


def isocenter_gradient(source: magpy.Collection, axis: str, *, step_m: float = GRADIENT_STEP_M) -> float:
    """:math:`\\partial B_z / \\partial c` (T/m) at the origin, five-point central difference."""
    unit = np.eye(3)[AXES.index(axis)]
    f = bz_tesla(source, np.outer([2, 1, -1, -2], unit) * step_m)
    return float((-f[0] + 8 * f[1] - 8 * f[2] + f[3]) / (12 * step_m))


@dataclass
class GradientCoil:
    """One Biot-Savart gradient coil and its isocenter gradient."""

    source: magpy.Collection
    axis: str
    gradient_t_per_m: float

    @classmethod
    def build(cls, source: magpy.Collection, axis: str) -> GradientCoil:
        return cls(source, axis, isocenter_gradient(source, axis))

    def encoded_mm(self, points_device_mm: np.ndarray) -> np.ndarray:
        """Encoded position :math:`u_c = B_{z,c} / G_c` (mm) at device points (mm)."""
        return 1e3 * bz_tesla(self.source, 1e-3 * np.asarray(points_device_mm, float)) / self.gradient_t_per_m


def coil_set(radius_m: float = COIL_RADIUS_M, *, y_radius_factor: float = Y_RADIUS_FACTOR
             ) -> dict[str, GradientCoil]:
    """Golay x and y coils and a Maxwell z pair; the y saddles sit on a larger radius."""
    return {"x": GradientCoil.build(golay_coil("x", radius_m), "x"),
            "y": GradientCoil.build(golay_coil("y", y_radius_factor * radius_m), "y"),
            "z": GradientCoil.build(maxwell_pair(radius_m), "z")}


def encode_direct(coils: dict[str, GradientCoil], points_device_mm: np.ndarray) -> np.ndarray:
    """(N, 3) encoded device positions (mm) straight from Biot-Savart."""
    return np.stack([coils[a].encoded_mm(points_device_mm) for a in AXES], axis=-1)


class LatticeEncoder:
    """Biot-Savart encoding sampled on a lattice, interpolated by splines.

    A direct Biot-Savart evaluation costs about a microsecond per point and wire
    piece, too slow for every iteration of a forward simulation. The
    displacement :math:`u - r` (smooth, no linear part) is therefore tabulated
    on a regular device-frame lattice and interpolated with not-a-knot splines
    (``scipy.interpolate.RegularGridInterpolator``); points outside the lattice
    raise. Measure the interpolation error with :meth:`error_mm`.

    Parameters
    ----------
    coils : dict of str to GradientCoil
    lower_mm, upper_mm : (3,) array-like
        Corners of the lattice box, device mm.
    step_mm : float
        Lattice spacing, mm.
    method : {"cubic", "quintic"}
        Spline degree. Quintic reaches a given error on a coarser lattice
        (error ~ step^6 instead of step^4), i.e. with fewer field evaluations.
    """

    def __init__(self, coils: dict[str, GradientCoil], lower_mm, upper_mm, step_mm: float, *,
                 method: str = "quintic") -> None:
        self.coils = coils
        ticks = [np.arange(lo, hi + step_mm, step_mm) for lo, hi in zip(lower_mm, upper_mm, strict=True)]
        nodes = np.stack(np.meshgrid(*ticks, indexing="ij"), -1)
        disp = encode_direct(coils, nodes.reshape(-1, 3)) - nodes.reshape(-1, 3)
        self._interp = RegularGridInterpolator(tuple(ticks), disp.reshape(nodes.shape), method=method)

    def __call__(self, points_device_mm: np.ndarray) -> np.ndarray:
        pts = np.asarray(points_device_mm, dtype=float)
        return pts + self._interp(pts)

    def error_mm(self, points_device_mm: np.ndarray) -> np.ndarray:
        """Distance (mm) between interpolated and direct Biot-Savart encoding at (N, 3) points."""
        pts = np.asarray(points_device_mm, dtype=float)
        return np.linalg.norm(self(pts) - encode_direct(self.coils, pts), axis=-1)
