"""Fold a chain of affines and displacement fields into one displacement field.

A *chain* is a list of transforms in **application order**: the first item is
applied first to a point ``p`` of the target (output) grid, the last one lands
in the raw (input) image,

.. math::

    \\mathbf q = T_{n-1}( \\cdots T_1(T_0(\\mathbf p)) \\cdots ), \\qquad
    \\mathbf d(\\mathbf p) = \\mathbf q - \\mathbf p .

This is the order of antspyx ``apply_transforms(transformlist=...)`` and of
nitransforms ``TransformChain``, and the reverse of ITK ``CompositeTransform``
(CONVENTIONS.md section 4, verified; the project's tests re-check it with all
three). For a raw image corrected by our field ``G``, then registered to a
template by an affine ``A`` and a warp ``W`` (template -> ... -> raw), the
chain is ``[W, A, G]``.

Every transform is a *pull* map in world RAS+ mm: it takes a point on the
output side to the point on the input side where the image is sampled.

* :class:`AffineStep` -- ``q = M[:3, :3] p + M[:3, 3]``;
* :class:`FieldStep` -- ``q = p + d(p)``, with ``d`` interpolated trilinearly
  between its grid points, as ITK's ``DisplacementFieldTransform`` does, and
  zero (identity) outside its grid (continuous index beyond ``[-0.5, n - 0.5]``),
  as ITK and nitransforms do silently. Here a target point that meets a field
  outside its grid is *counted* and reported (see :func:`compose_chain`).

Pure math: numpy and numba, no files.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass

import numba
import numpy as np

__all__ = [
    "AffineStep",
    "ComposedField",
    "CoverageError",
    "FieldStep",
    "affine_pull_points",
    "compose_chain",
    "grid_with_margin",
    "sample_field",
]

log = logging.getLogger("nl_unwarp")

#: What to do when target points meet a field outside its grid.
ON_OUTSIDE = ("raise", "warn", "ignore")


class CoverageError(ValueError):
    """A target grid reaches outside a displacement field's grid."""


@dataclass(frozen=True)
class AffineStep:
    """An affine pull map, RAS mm: ``q = matrix_ras[:3, :3] @ p + matrix_ras[:3, 3]``.

    Parameters
    ----------
    matrix_ras : (4, 4) ndarray
        Takes an output-side point to the input-side point, world RAS mm.
    """

    matrix_ras: np.ndarray

    def __post_init__(self) -> None:
        m = np.asarray(self.matrix_ras, dtype=float)
        if m.shape != (4, 4) or not np.allclose(m[3], [0, 0, 0, 1]) or not np.all(np.isfinite(m)):
            raise ValueError(f"an affine step needs a finite (4, 4) matrix with last row 0 0 0 1, "
                             f"got shape {m.shape}")
        object.__setattr__(self, "matrix_ras", m)


@dataclass(frozen=True)
class FieldStep:
    """A displacement field pull map: ``q = p + d(p)``, RAS mm.

    Parameters
    ----------
    disp_ras_mm : (X, Y, Z, 3) ndarray
        Displacement at the grid points, world RAS mm.
    affine : (4, 4) ndarray
        Grid affine, voxel index -> RAS mm.
    jacobian : (X, Y, Z) ndarray, optional
        An intensity factor carried with the field (our correction's Jacobian
        determinant); composed factors multiply.
    """

    disp_ras_mm: np.ndarray
    affine: np.ndarray
    jacobian: np.ndarray | None = None

    def __post_init__(self) -> None:
        disp = np.ascontiguousarray(self.disp_ras_mm, dtype=np.float32)
        if disp.ndim != 4 or disp.shape[3] != 3:
            raise ValueError(f"a field step needs an (X, Y, Z, 3) displacement, got {disp.shape}")
        affine = np.asarray(self.affine, dtype=float)
        if affine.shape != (4, 4) or abs(np.linalg.det(affine[:3, :3])) < 1e-12:
            raise ValueError("a field step needs a non-degenerate (4, 4) grid affine")
        object.__setattr__(self, "disp_ras_mm", disp)
        object.__setattr__(self, "affine", affine)
        if self.jacobian is not None:
            jac = np.ascontiguousarray(self.jacobian, dtype=np.float32)
            if jac.shape != disp.shape[:3]:
                raise ValueError(f"jacobian shape {jac.shape} differs from the field grid {disp.shape[:3]}")
            object.__setattr__(self, "jacobian", jac)

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(self.disp_ras_mm.shape[:3])


@dataclass
class ComposedField:
    """Result of :func:`compose_chain` on a target grid.

    Attributes
    ----------
    disp_ras_mm : (X, Y, Z, 3) float32 ndarray
        Target point -> raw sampling point minus the target point, RAS mm.
    affine : (4, 4) ndarray
        Target grid affine.
    factor : (X, Y, Z) float32 ndarray or None
        Product of the intensity factors of the field steps that carry one,
        each sampled where that step is applied; None if no step carries one.
    uncovered : (X, Y, Z) bool ndarray
        Target points that met a field outside its grid (and, when the raw
        grid is known, whose final point lies inside the raw field of view).
    """

    disp_ras_mm: np.ndarray
    affine: np.ndarray
    factor: np.ndarray | None
    uncovered: np.ndarray

    @property
    def uncovered_fraction(self) -> float:
        return float(self.uncovered.mean()) if self.uncovered.size else 0.0


def grid_with_margin(shape: Sequence[int], affine: np.ndarray, margin_mm: float
                     ) -> tuple[tuple[int, int, int], np.ndarray]:
    """The grid grown by at least ``margin_mm`` on every side (same axes, same spacing).

    Axes of length 1 (single slices) are grown too: a field must cover the
    points a registration moves off the slice.

    Returns
    -------
    shape : tuple of 3 int
    affine : (4, 4) ndarray
        Voxel ``(m, m, m)`` of the new grid is voxel ``(0, 0, 0)`` of the old one.
    """
    affine = np.asarray(affine, dtype=float)
    zooms = np.linalg.norm(affine[:3, :3], axis=0)
    pad = np.ceil(float(margin_mm) / zooms - 1e-9).astype(int) if margin_mm > 0 else np.zeros(3, int)
    new_shape = tuple(int(n + 2 * p) for n, p in zip(shape, pad, strict=True))
    new_affine = affine.copy()
    new_affine[:3, 3] = affine[:3, :3] @ (-pad.astype(float)) + affine[:3, 3]
    return new_shape, new_affine


@numba.njit(inline="always", cache=True)
def _clamp(i, n):
    return 0 if i < 0 else (n - 1 if i > n - 1 else i)


@numba.njit(inline="always", cache=True)
def _blend(c000, c001, c010, c011, c100, c101, c110, c111, ti, tj, tk):
    """Trilinear blend of the eight corner values (index order i, j, k)."""
    c00 = c000 + tk * (c001 - c000)
    c01 = c010 + tk * (c011 - c010)
    c10 = c100 + tk * (c101 - c100)
    c11 = c110 + tk * (c111 - c110)
    c0 = c00 + tj * (c01 - c00)
    c1 = c10 + tj * (c11 - c10)
    return c0 + ti * (c1 - c0)


@numba.njit(inline="always", cache=True)
def _clamp(i, n):
    return 0 if i < 0 else (n - 1 if i > n - 1 else i)


@numba.njit(inline="always", cache=True)
def _lerp8(v, i0, i1, j0, j1, k0, k1, c, ti, tj, tk):
    """Trilinear blend of channel ``c`` of ``v`` (4-D) or of ``v`` itself (3-D, ``c < 0``)."""
    if c >= 0:
        c00 = v[i0, j0, k0, c] + tk * (v[i0, j0, k1, c] - v[i0, j0, k0, c])
        c01 = v[i0, j1, k0, c] + tk * (v[i0, j1, k1, c] - v[i0, j1, k0, c])
        c10 = v[i1, j0, k0, c] + tk * (v[i1, j0, k1, c] - v[i1, j0, k0, c])
        c11 = v[i1, j1, k0, c] + tk * (v[i1, j1, k1, c] - v[i1, j1, k0, c])
    else:
        c00 = v[i0, j0, k0] + tk * (v[i0, j0, k1] - v[i0, j0, k0])
        c01 = v[i0, j1, k0] + tk * (v[i0, j1, k1] - v[i0, j1, k0])
        c10 = v[i1, j0, k0] + tk * (v[i1, j0, k1] - v[i1, j0, k0])
        c11 = v[i1, j1, k0] + tk * (v[i1, j1, k1] - v[i1, j1, k0])
    c0 = c00 + tj * (c01 - c00)
    c1 = c10 + tj * (c11 - c10)
    return c0 + ti * (c1 - c0)


@numba.njit(inline="always", cache=True)
def _clamp(i, n):
    return 0 if i < 0 else (n - 1 if i > n - 1 else i)


@numba.njit(inline="always", cache=True)
def _point(m, i, j, k):
    return (m[0, 0] * i + m[0, 1] * j + m[0, 2] * k + m[0, 3],
            m[1, 0] * i + m[1, 1] * j + m[1, 2] * k + m[1, 3],
            m[2, 0] * i + m[2, 1] * j + m[2, 2] * k + m[2, 3])


@numba.njit(parallel=True, cache=True)
def _chain_pass(target_map, program, affines, fields, jacs, use_jacs, field_maps, disp, factor, missed):
    """Push every target voxel through the whole chain in one pass.

    ``program[s] = (kind, index)``: kind 0 is ``affines[index]`` (3 x 4 pull
    matrix), kind 1 is ``fields[index]`` with ``field_maps[index]`` (world ->
    voxel index). ``fields`` and ``jacs`` are tuples of arrays (one compiled
    variant per chain length). A field's ``d`` is trilinear between grid
    points, as ITK's ``VectorLinearInterpolateImageFunction``: a point is
    inside when its continuous index lies within [-0.5, n - 0.5] on every
    axis, neighbours beyond the edge are clamped; outside, ``d = 0``
    (identity) and the voxel is flagged in ``missed``.
    """
    nx, ny, nz = disp.shape[0], disp.shape[1], disp.shape[2]
    for i in numba.prange(nx):
        for j in range(ny):
            for k in range(nz):
                px, py, pz = _point(target_map, i, j, k)
                x, y, z = px, py, pz
                f = 1.0
                miss = False
                for s in range(program.shape[0]):
                    idx = program[s, 1]
                    if program[s, 0] == 0:
                        x, y, z = _point(affines[idx], x, y, z)
                        continue
                    field = fields[idx]
                    fx, fy, fz = field.shape[0], field.shape[1], field.shape[2]
                    gi, gj, gk = _point(field_maps[idx], x, y, z)
                    if not (-0.5 <= gi <= fx - 0.5 and -0.5 <= gj <= fy - 0.5 and -0.5 <= gk <= fz - 0.5):
                        miss = True
                        continue
                    # Indices >= -0.5 here: truncating index + 1 is the floor.
                    bi, bj, bk = int(gi + 1.0) - 1, int(gj + 1.0) - 1, int(gk + 1.0) - 1
                    ti, tj, tk = gi - bi, gj - bj, gk - bk
                    if 0 <= bi < fx - 1 and 0 <= bj < fy - 1 and 0 <= bk < fz - 1:
                        i0, i1, j0, j1, k0, k1 = bi, bi + 1, bj, bj + 1, bk, bk + 1
                    else:
                        i0, i1 = _clamp(bi, fx), _clamp(bi + 1, fx)
                        j0, j1 = _clamp(bj, fy), _clamp(bj + 1, fy)
                        k0, k1 = _clamp(bk, fz), _clamp(bk + 1, fz)
                    dx = _blend(field[i0, j0, k0, 0], field[i0, j0, k1, 0], field[i0, j1, k0, 0],
                                field[i0, j1, k1, 0], field[i1, j0, k0, 0], field[i1, j0, k1, 0],
                                field[i1, j1, k0, 0], field[i1, j1, k1, 0], ti, tj, tk)
                    dy = _blend(field[i0, j0, k0, 1], field[i0, j0, k1, 1], field[i0, j1, k0, 1],
                                field[i0, j1, k1, 1], field[i1, j0, k0, 1], field[i1, j0, k1, 1],
                                field[i1, j1, k0, 1], field[i1, j1, k1, 1], ti, tj, tk)
                    dz = _blend(field[i0, j0, k0, 2], field[i0, j0, k1, 2], field[i0, j1, k0, 2],
                                field[i0, j1, k1, 2], field[i1, j0, k0, 2], field[i1, j0, k1, 2],
                                field[i1, j1, k0, 2], field[i1, j1, k1, 2], ti, tj, tk)
                    if use_jacs[idx]:
                        jac = jacs[idx]
                        f *= _blend(jac[i0, j0, k0], jac[i0, j0, k1], jac[i0, j1, k0], jac[i0, j1, k1],
                                    jac[i1, j0, k0], jac[i1, j0, k1], jac[i1, j1, k0], jac[i1, j1, k1],
                                    ti, tj, tk)
                    x += dx
                    y += dy
                    z += dz
                disp[i, j, k, 0] = x - px
                disp[i, j, k, 1] = y - py
                disp[i, j, k, 2] = z - pz
                factor[i, j, k] = f
                missed[i, j, k] = miss


@numba.njit(parallel=True, cache=True)
def _keep_inside_raw(target_map, raw_map, raw_shape, disp, missed):
    """Clear the miss flag of target points whose final point falls outside the raw grid."""
    nx, ny, nz = disp.shape[0], disp.shape[1], disp.shape[2]
    for i in numba.prange(nx):
        for j in range(ny):
            for k in range(nz):
                if not missed[i, j, k]:
                    continue
                px, py, pz = _point(target_map, i, j, k)
                ri, rj, rk = _point(raw_map, px + disp[i, j, k, 0], py + disp[i, j, k, 1],
                                    pz + disp[i, j, k, 2])
                missed[i, j, k] = (-0.5 <= ri <= raw_shape[0] - 0.5 and -0.5 <= rj <= raw_shape[1] - 0.5
                                   and -0.5 <= rk <= raw_shape[2] - 0.5)


def _as_step(step) -> AffineStep | FieldStep:
    if isinstance(step, (AffineStep, FieldStep)):
        return step
    arr = np.asarray(step)
    if arr.shape == (4, 4):
        return AffineStep(arr)
    raise TypeError(f"a chain item must be an AffineStep, a FieldStep or a (4, 4) matrix, got {type(step)}")


_NO_JACOBIAN = np.ones((1, 1, 1), np.float32)
_NO_FIELD = np.zeros((1, 1, 1, 3), np.float32)


def _pack(steps: Sequence[AffineStep | FieldStep]):
    """The chain as kernel arguments: (S, 2) program, stacked affines, tuples of fields."""
    program, affines, fields, jacs, use_jacs, maps = [], [], [], [], [], []
    for step in steps:
        if isinstance(step, AffineStep):
            program.append((0, len(affines)))
            affines.append(step.matrix_ras[:3])
            continue
        program.append((1, len(fields)))
        fields.append(step.disp_ras_mm)
        jacs.append(_NO_JACOBIAN if step.jacobian is None else step.jacobian)
        use_jacs.append(step.jacobian is not None)
        maps.append(np.linalg.inv(step.affine)[:3])
    if not fields:  # the kernel needs typed (unused) entries
        fields, jacs, use_jacs, maps = [_NO_FIELD], [_NO_JACOBIAN], [False], [np.zeros((3, 4))]
    return (np.asarray(program, np.int64).reshape(-1, 2),
            np.ascontiguousarray(affines if affines else np.zeros((1, 3, 4)), dtype=float),
            tuple(fields), tuple(jacs), np.asarray(use_jacs, np.bool_),
            np.ascontiguousarray(maps, dtype=float))


def compose_chain(
    chain: Sequence[AffineStep | FieldStep | np.ndarray],
    target_shape: Sequence[int],
    target_affine: np.ndarray,
    *,
    raw_shape: Sequence[int] | None = None,
    raw_affine: np.ndarray | None = None,
    on_outside: str = "warn",
) -> ComposedField:
    """Fold a chain of pull maps into one displacement field on a target grid.

    Parameters
    ----------
    chain : sequence of AffineStep, FieldStep or (4, 4) ndarray
        In application order: ``chain[0]`` is applied first to a target point
        (antspyx ``transformlist`` / nitransforms ``TransformChain`` order; the
        reverse of ITK ``CompositeTransform``). A bare matrix is an affine step.
    target_shape : tuple of 3 int
        Output grid shape.
    target_affine : (4, 4) ndarray
        Output grid affine, voxel -> RAS mm.
    raw_shape, raw_affine : optional
        The raw image's grid: if given, only target points that land inside the
        raw field of view count as uncovered (others are filled anyway).
    on_outside : {"warn", "raise", "ignore"}
        What to do when target points meet a field outside its grid (where
        ITK and nitransforms would apply identity without a word).

    Returns
    -------
    ComposedField

    Raises
    ------
    CoverageError
        With ``on_outside="raise"``, if any target point is uncovered.

    Notes
    -----
    .. math::

        \\mathbf d(\\mathbf p) = T_{n-1}(\\cdots T_0(\\mathbf p)) - \\mathbf p,
        \\qquad T_s(\\mathbf x) = \\mathbf x + \\mathbf d_s(\\mathbf x)
        \\ \\text{or}\\ M_s \\mathbf x

    Field displacements are interpolated trilinearly between grid points (as
    ITK does). Intensity factors (:attr:`FieldStep.jacobian`) are sampled
    trilinearly at the point where their step is applied and multiplied.
    """
    if on_outside not in ON_OUTSIDE:
        raise ValueError(f"on_outside must be one of {ON_OUTSIDE}, got {on_outside!r}")
    steps = [_as_step(s) for s in chain]
    shape = tuple(int(n) for n in target_shape)
    target_affine = np.asarray(target_affine, dtype=float)
    target_map = np.ascontiguousarray(target_affine[:3])
    disp = np.empty(shape + (3,), np.float32)
    factor = np.empty(shape, np.float32)
    missed = np.empty(shape, np.bool_)
    program, affines, fields, jacs, use_jacs, maps = _pack(steps)
    _chain_pass(target_map, program, affines, fields, jacs, use_jacs, maps, disp, factor, missed)
    has_factor = bool(use_jacs.any())
    if raw_shape is not None and raw_affine is not None and missed.any():
        _keep_inside_raw(target_map, np.ascontiguousarray(np.linalg.inv(np.asarray(raw_affine, float))[:3]),
                         np.asarray(raw_shape, dtype=np.int64), disp, missed)
    result = ComposedField(disp, target_affine, factor if has_factor else None, missed)
    _report_coverage(result, on_outside)
    return result


def _report_coverage(result: ComposedField, on_outside: str) -> None:
    frac = result.uncovered_fraction
    if frac == 0 or on_outside == "ignore":
        return
    message = (f"{100 * frac:.2f} % of the target grid's points meet a displacement field outside "
               "its grid, where ITK-style tools apply identity: give fields that cover the raw "
               "field of view with a margin, or a smaller target grid")
    if on_outside == "raise":
        raise CoverageError(message)
    log.warning("%s", message)


def affine_pull_points(matrix_ras: np.ndarray, points_ras_mm: np.ndarray) -> np.ndarray:
    """Apply an affine pull map to (..., 3) RAS points (reference path for tests and callers)."""
    m = np.asarray(matrix_ras, dtype=float)
    return np.asarray(points_ras_mm, float) @ m[:3, :3].T + m[:3, 3]


def sample_field(step: FieldStep, points_ras_mm: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Trilinear displacement of a field at (N, 3) RAS points, and whether each was inside.

    Plain numpy, written independently of the kernel (the tests compare both).
    """
    pts = np.asarray(points_ras_mm, dtype=float).reshape(-1, 3)
    inv = np.linalg.inv(step.affine)
    idx = pts @ inv[:3, :3].T + inv[:3, 3]
    dims = np.array(step.shape)
    inside = np.all((idx >= -0.5) & (idx <= dims - 0.5), axis=1)
    base = np.floor(idx).astype(int)
    frac = idx - base
    out = np.zeros((len(pts), 3))
    for corner in np.ndindex(2, 2, 2):
        c = np.array(corner)
        w = np.prod(np.where(c, frac, 1 - frac), axis=1)
        nb = np.clip(base + c, 0, dims - 1)
        out += w[:, None] * step.disp_ras_mm[nb[:, 0], nb[:, 1], nb[:, 2]]
    out[~inside] = 0.0
    return out, inside
