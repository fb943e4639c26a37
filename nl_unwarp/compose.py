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
* :class:`FactorStep` -- does not move the point: it multiplies the chain's
  intensity factor by a map sampled (trilinearly) where the step sits. Our
  correction's Jacobian determinant enters a chain this way, just before the
  correction: ``[W, A, FactorStep(det J), G]`` gives
  :math:`I(\\mathbf p) = I_{raw}(G(\\mathbf q))\\,\\det J(\\mathbf q)` with
  :math:`\\mathbf q = A(W(\\mathbf p))` the corrected-space point, which is
  what correcting first (:math:`I_c = I_{raw} \\circ G \\cdot \\det J`) and
  registering the corrected image afterwards gives.

:func:`compose_chain` stores the folded field (to write it for other tools);
:func:`resample_chain` follows the chain from every target voxel and samples
the raw image at its end in the same compiled pass, storing no field.

Pure math: numpy and numba (:mod:`nl_unwarp._kernels`), no files.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .resample import ORDERS, prefilter, resample_volume

__all__ = [
    "AffineStep",
    "ComposedField",
    "CoverageError",
    "FIELD_MARGIN_MM",
    "FactorStep",
    "FieldStep",
    "ResampledChain",
    "affine_pull_points",
    "compose_chain",
    "empty_interleaved",
    "flat_buffer",
    "grid_with_margin",
    "interleaved_block",
    "margin_slices",
    "resample_chain",
    "sample_factor",
    "sample_field",
]

log = logging.getLogger("nl_unwarp")

#: What to do when target points meet a field outside its grid.
ON_OUTSIDE = ("raise", "warn", "ignore")
#: Margin (mm) by which every field we write extends beyond the raw field of
#: view on every side (re-exported as ``nl_unwarp.api.FIELD_MARGIN_MM``): ITK
#: applies identity outside a field's grid without a warning (CONVENTIONS.md
#: 4), and registration moves points there. Larger than the displacement of a
#: gradient system inside its valid radius.
FIELD_MARGIN_MM = 20.0
#: Orders that the one-pass kernel samples (the others fold, then resample).
_FUSED_ORDERS = (0, 1, 3)


class CoverageError(ValueError):
    """A target grid reaches outside a displacement field's grid."""


def _grid_affine(affine, what: str) -> np.ndarray:
    affine = np.asarray(affine, dtype=float)
    if affine.shape != (4, 4) or abs(np.linalg.det(affine[:3, :3])) < 1e-12:
        raise ValueError(f"{what} needs a non-degenerate (4, 4) grid affine")
    return affine


def _x_fastest(values, dims: int, what: str) -> np.ndarray:
    """float32 with voxels in NIfTI's memory order (x fastest): no copy for a float32 array that
    the chain kernels read in place (:func:`flat_buffer`: Fortran-ordered, or a voxel-interleaved
    warp); others are copied to Fortran order once, here."""
    arr = np.asarray(values)
    if arr.ndim != dims:
        raise ValueError(what)
    if _steps(arr) is not None:
        return arr
    return np.asfortranarray(arr, dtype=np.float32)


def empty_interleaved(shape: Sequence[int]) -> np.ndarray:
    """An uninitialised float32 (X, Y, Z, 4) array, a voxel's four channels side by side and
    voxels x fastest: the layout of a warp from :func:`nl_unwarp.warp.compute_warp`, in
    which ``[..., :3]`` (a displacement) is read by :func:`interleaved_block`."""
    nx, ny, nz = (int(n) for n in shape)
    return np.empty((nz, ny, nx, 4), np.float32).transpose(2, 1, 0, 3)


def _owner_holds(values: np.ndarray, extent: int) -> bool:
    """Whether ``extent`` float32 items from ``values``' first item lie in the contiguous array
    that ``values`` is a view of (so a flat view of them reads nothing past its end)."""
    owner = values
    while isinstance(owner.base, np.ndarray):
        owner = owner.base
    if not (owner.flags.c_contiguous or owner.flags.f_contiguous):
        return False
    low = owner.__array_interface__["data"][0]
    start = values.__array_interface__["data"][0]
    return low <= start and start + 4 * extent <= low + owner.nbytes


def _steps(values: np.ndarray) -> tuple[int, int] | None:
    """Float32 items from a voxel to the next and from a channel to the next of (X, Y, Z[, C])
    float32 values whose voxels are evenly spaced and x fastest; None for other layouts."""
    nx, ny, nz = values.shape[:3]
    if values.dtype != np.float32 or not all(st % 4 == 0 and st > 0 for st in values.strides):
        return None
    node = values.strides[0] // 4
    # The y and z strides fix the addresses read; a length-1 x axis may carry any stride, and then
    # passes only if it is the one that makes them agree.
    regular = ((ny == 1 or values.strides[1] == 4 * node * nx)
               and (nz == 1 or values.strides[2] == 4 * node * nx * ny))
    return (node, values.strides[3] // 4 if values.ndim == 4 else 0) if regular else None


def flat_buffer(values: np.ndarray) -> tuple[np.ndarray, int, int]:
    """A flat float32 view of (X, Y, Z[, C]) values, with the step from a voxel to the next and
    from a channel to the next (in items), for the chain kernels.

    No copy when the voxels are evenly spaced and x fastest: Fortran order (steps ``1`` and
    ``X Y Z``), a voxel-interleaved warp or one channel of it (step ``4`` between voxels).
    Any other layout is copied to Fortran order first.
    """
    steps = _steps(values)
    size = values.shape[0] * values.shape[1] * values.shape[2]
    if steps is not None:
        nc = values.shape[3] if values.ndim == 4 else 1
        extent = (size - 1) * steps[0] + (nc - 1) * steps[1] + 1
        if _owner_holds(values, extent):
            return np.lib.stride_tricks.as_strided(values, shape=(extent,), strides=(4,)), *steps
    return np.asfortranarray(values, dtype=np.float32).ravel(order="F"), 1, size


def interleaved_block(disp_ras_mm: np.ndarray) -> np.ndarray | None:
    """The flat float32 block of ``4 X Y Z`` values behind a displacement whose voxels each hold
    four channels side by side (``dx, dy, dz`` and a fourth, the Jacobian determinant in a warp
    from :func:`nl_unwarp.warp.compute_warp`), voxels x fastest; None for any other layout.

    The one-pass kernel reads such a field four channels at a time. The block must lie
    inside the memory that ``disp_ras_mm`` is a view of (checked), so a slice such as
    ``warp[..., 1:4]`` of a wider array is refused rather than read past its end.
    """
    d = disp_ras_mm
    if d.ndim != 4 or d.shape[3] != 3 or _steps(d) != (4, 1):
        return None
    size = 4 * d.shape[0] * d.shape[1] * d.shape[2]
    if not _owner_holds(d, size):
        return None
    return np.lib.stride_tricks.as_strided(d, shape=(size,), strides=(4,))


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
class FactorStep:
    """An intensity factor map: multiplies the chain's factor, does not move the point.

    Parameters
    ----------
    values : (X, Y, Z) ndarray
        The factor at the grid points (e.g. our correction's Jacobian determinant).
    affine : (4, 4) ndarray
        Grid affine, voxel index -> RAS mm.

    Notes
    -----
    Sampled trilinearly where the step sits in the chain; beyond the grid the
    nearest edge value is used (a Jacobian map on the raw grid then serves
    corrected-space points up to a displacement beyond the raw field of view).
    Stored float32, x fastest (no copy for a Fortran-ordered float32 input).
    """

    values: np.ndarray
    affine: np.ndarray

    def __post_init__(self) -> None:
        vals = _x_fastest(self.values, 3, f"a factor step needs an (X, Y, Z) map, got "
                                          f"{np.shape(self.values)}")
        object.__setattr__(self, "values", vals)
        object.__setattr__(self, "affine", _grid_affine(self.affine, "a factor step"))


@dataclass(frozen=True)
class FieldStep:
    """A displacement field pull map: ``q = p + d(p)``, RAS mm.

    Parameters
    ----------
    disp_ras_mm : (X, Y, Z, 3) ndarray
        Displacement at the grid points, world RAS mm. Stored float32 with
        voxels x fastest: a Fortran-ordered input (NIfTI's order, that of
        fields read from files) or a warp from
        :func:`~nl_unwarp.warp.compute_warp` (a voxel's channels side by
        side) is kept without a copy.
    affine : (4, 4) ndarray
        Grid affine, voxel index -> RAS mm.
    jacobian : (X, Y, Z) ndarray, optional
        An intensity factor on the field's own grid (our correction's Jacobian
        determinant), applied where the field is applied: the same as a
        :class:`FactorStep` on this grid just before this step.
    """

    disp_ras_mm: np.ndarray
    affine: np.ndarray
    jacobian: np.ndarray | None = None

    def __post_init__(self) -> None:
        disp = _x_fastest(self.disp_ras_mm, 4, f"a field step needs an (X, Y, Z, 3) displacement, "
                                               f"got {np.shape(self.disp_ras_mm)}")
        if disp.shape[3] != 3:
            raise ValueError(f"a field step needs an (X, Y, Z, 3) displacement, got {disp.shape}")
        object.__setattr__(self, "disp_ras_mm", disp)
        object.__setattr__(self, "affine", _grid_affine(self.affine, "a field step"))
        if self.jacobian is not None:
            jac = _x_fastest(self.jacobian, 3, "jacobian must be an (X, Y, Z) map")
            if jac.shape != disp.shape[:3]:
                raise ValueError(f"jacobian shape {jac.shape} differs from the field grid {disp.shape[:3]}")
            object.__setattr__(self, "jacobian", jac)

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(self.disp_ras_mm.shape[:3])


Step = AffineStep | FieldStep | FactorStep


@dataclass
class ComposedField:
    """Result of :func:`compose_chain` on a target grid (arrays x fastest, as NIfTI stores them).

    Attributes
    ----------
    disp_ras_mm : (X, Y, Z, 3) float32 ndarray
        Target point -> raw sampling point minus the target point, RAS mm.
    affine : (4, 4) ndarray
        Target grid affine.
    factor : (X, Y, Z) float32 ndarray or None
        Product of the chain's factor maps (:class:`FactorStep`, or a
        :attr:`FieldStep.jacobian`), each sampled where it sits in the chain;
        None if the chain has none.
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


@dataclass
class ResampledChain:
    """Result of :func:`resample_chain`.

    Attributes
    ----------
    data : (X, Y, Z) float32 ndarray
        The raw image resampled once onto the target grid (times the chain's factor).
    uncovered : (X, Y, Z) bool ndarray
        Target points that met a field outside its grid and land inside the raw field of view.
    """

    data: np.ndarray
    uncovered: np.ndarray

    @property
    def uncovered_fraction(self) -> float:
        return float(self.uncovered.mean()) if self.uncovered.size else 0.0


def grid_with_margin(shape: Sequence[int], affine: np.ndarray, margin_mm: float,
                     spacing_mm: float | None = None) -> tuple[tuple[int, int, int], np.ndarray]:
    """The grid grown by at least ``margin_mm`` on every side (same axes).

    Axes of length 1 (single slices) are grown too: a field must cover the
    points a registration moves off the slice.

    Parameters
    ----------
    shape : sequence of 3 int
    affine : (4, 4) ndarray
        Voxel -> RAS mm.
    margin_mm : float
        Least distance, mm, from the old grid's outer voxel centres to the new
        grid's, on every side.
    spacing_mm : float, optional
        Voxel size of the new grid, mm, on every axis (the axes keep their
        directions); default: the old grid's voxel sizes, whole voxels added.

    Returns
    -------
    shape : tuple of 3 int
    affine : (4, 4) ndarray
        Without ``spacing_mm``, voxel ``(m, m, m)`` of the new grid is voxel
        ``(0, 0, 0)`` of the old one (:func:`margin_slices`); with it, the new
        grid is centred on the old one.
    """
    affine = np.asarray(affine, dtype=float)
    zooms = np.linalg.norm(affine[:3, :3], axis=0)
    if spacing_mm is not None:
        # Extent of the old voxel centres plus the margin, covered by whole new voxels.
        span = (np.asarray(shape, float) - 1) * zooms + 2 * float(margin_mm)
        new_shape = tuple(int(n) for n in np.ceil(span / spacing_mm - 1e-5).astype(int) + 1)
        axes = affine[:3, :3] / zooms
        centre = affine[:3, :3] @ ((np.asarray(shape, float) - 1) / 2) + affine[:3, 3]
        new_affine = np.eye(4)
        new_affine[:3, :3] = axes * float(spacing_mm)
        new_affine[:3, 3] = centre - new_affine[:3, :3] @ ((np.asarray(new_shape, float) - 1) / 2)
        return new_shape, new_affine
    # A margin that is a whole number of voxels stays one when the affine comes
    # from a NIfTI header (float32: voxel sizes off by ~1e-7 of themselves).
    pad = np.ceil(float(margin_mm) / zooms - 1e-5).astype(int) if margin_mm > 0 else np.zeros(3, int)
    new_shape = tuple(int(n + 2 * p) for n, p in zip(shape, pad, strict=True))
    new_affine = affine.copy()
    new_affine[:3, 3] = affine[:3, :3] @ (-pad.astype(float)) + affine[:3, 3]
    return new_shape, new_affine


def margin_slices(shape: Sequence[int], grown_shape: Sequence[int]) -> tuple[slice, slice, slice]:
    """Where the original grid sits inside the one :func:`grid_with_margin` made of it."""
    return tuple(slice((g - n) // 2, (g - n) // 2 + n) for n, g in zip(shape, grown_shape, strict=True))


def _as_step(step) -> Step:
    if isinstance(step, (AffineStep, FieldStep, FactorStep)):
        return step
    arr = np.asarray(step)
    if arr.shape == (4, 4):
        return AffineStep(arr)
    raise TypeError(f"a chain item must be an AffineStep, a FieldStep, a FactorStep or a (4, 4) "
                    f"matrix, got {type(step)}")


def _world_to_index(affine: np.ndarray) -> np.ndarray:
    return np.linalg.inv(affine)[:3]


#: Grids whose voxel centres coincide within this (voxels) over the whole grid
#: are treated as one lattice: a field is read at its nodes, or a factor map
#: shares a field's interpolation weights. Affines stored as float32 in NIfTI
#: headers place voxels ~1e-5 voxel apart; a trilinear weight of 1e-4 changes
#: a 1 mm field by less than 1e-4 of its change across one voxel.
LATTICE_TOL_VOXELS = 1e-4


def _lattice_offset(index_map: np.ndarray, shape: Sequence[int]) -> np.ndarray | None:
    """Integer offset ``o`` if ``index_map`` (3 x 4) sends voxel ``v`` of a grid of ``shape``
    to ``v + o`` (within :data:`LATTICE_TOL_VOXELS` at every corner), else None."""
    corners = np.array(np.meshgrid(*[[0, max(int(n) - 1, 0)] for n in shape], indexing="ij"),
                       float).reshape(3, -1)
    mapped = index_map[:, :3] @ corners + index_map[:, 3:]
    offset = np.rint(mapped[:, 0] - corners[:, 0])
    if np.abs(mapped - corners - offset[:, None]).max() > LATTICE_TOL_VOXELS:
        return None
    return offset.astype(np.int64)


class _Program:
    """The chain as kernel arguments (see :func:`nl_unwarp._kernels.fold_chain`).

    Buffers are flat x-fastest views of the steps' arrays (Fortran-ordered
    arrays are not copied); the object keeps them alive while a kernel runs.
    """

    def __init__(self, steps: Sequence[Step], target_shape, target_affine: np.ndarray) -> None:
        self.rows: list[tuple[int, ...]] = []
        self.affines: list[np.ndarray] = []
        self.buffers: list[np.ndarray] = []
        self.dims: list[tuple[int, int, int]] = []
        self.maps: list[np.ndarray] = []
        self.target_shape = tuple(target_shape)
        # While only affines were applied, points are ``linear @ [i, j, k, 1]``.
        self.linear: np.ndarray | None = np.asarray(target_affine, float)
        pending: FactorStep | None = None  # a factor map waiting to pair with the next field
        for step in steps:
            if isinstance(step, FieldStep):
                if step.jacobian is not None:
                    self._flush(pending)
                    pending = FactorStep(step.jacobian, step.affine)
                self._field(step, pending)
            else:
                self._flush(pending)
                if isinstance(step, AffineStep):
                    self._affine(step)
            pending = step if isinstance(step, FactorStep) else None
        self._flush(pending)

    def _buffer(self, values: np.ndarray, affine: np.ndarray) -> int:
        flat, node_step, channel_step = flat_buffer(values)
        self.buffers.append(flat)
        self.dims.append((*values.shape[:3], node_step, channel_step))
        self.maps.append(_world_to_index(affine))
        return len(self.buffers) - 1

    def _nodes(self, affine: np.ndarray) -> np.ndarray | None:
        if self.linear is None:
            return None
        return _lattice_offset((np.linalg.inv(affine) @ self.linear)[:3], self.target_shape)

    def _affine(self, step: AffineStep) -> None:
        from ._kernels import STEP_AFFINE

        self.rows.append((STEP_AFFINE, len(self.affines), 0, 0, 0, 0))
        self.affines.append(step.matrix_ras[:3])
        if self.linear is not None:
            self.linear = step.matrix_ras @ self.linear

    def _flush(self, factor: FactorStep | None) -> None:
        """Emit a factor step that no field took."""
        from ._kernels import STEP_FACTOR, STEP_FACTOR_NODES

        if factor is None:
            return
        nodes = self._nodes(factor.affine)
        index = self._buffer(factor.values, factor.affine)
        if nodes is not None:
            self.rows.append((STEP_FACTOR_NODES, index, 0, *nodes))
        else:
            self.rows.append((STEP_FACTOR, index, 0, 0, 0, 0))

    def _field(self, step: FieldStep, factor: FactorStep | None) -> None:
        from ._kernels import STEP_FIELD, STEP_FIELD_FACTOR, STEP_FIELD_NODES

        nodes = self._nodes(step.affine)
        shared = None
        if factor is not None and nodes is None:
            # A factor map on the field's lattice shares its interpolation weights.
            shared = _lattice_offset((np.linalg.inv(factor.affine) @ step.affine)[:3], step.shape)
        if factor is not None and shared is None:
            self._flush(factor)
        index = self._buffer(step.disp_ras_mm, step.affine)
        if nodes is not None:
            self.rows.append((STEP_FIELD_NODES, index, 0, *nodes))
        elif shared is not None:
            self.rows.append((STEP_FIELD_FACTOR, index, self._buffer(factor.values, factor.affine), *shared))
        else:
            self.rows.append((STEP_FIELD, index, 0, 0, 0, 0))
        self.linear = None

    def arguments(self) -> tuple:
        """``program, affines, addresses, sizes, dims, maps`` for the kernels."""
        buffers = self.buffers if self.buffers else [_NO_BUFFER]
        return (np.asarray(self.rows, np.int64).reshape(-1, 6),
                np.ascontiguousarray(self.affines if self.affines else np.zeros((1, 3, 4)), dtype=float),
                np.array([b.ctypes.data for b in buffers], np.int64),
                np.array([b.size for b in buffers], np.int64),
                np.ascontiguousarray(self.dims if self.dims else np.ones((1, 5)), dtype=np.int64),
                np.ascontiguousarray(self.maps if self.maps else np.zeros((1, 3, 4)), dtype=float))


#: Typed stand-in for the kernels when a chain has no field and no factor map.
_NO_BUFFER = np.zeros(1, np.float32)


#: Stand-ins for an absent first or last field of :func:`_unrolled_arguments`.
_NO_FIELD = np.zeros((1, 1, 1, 3), np.float32, order="F")
_NO_FACTOR = np.ones((1, 1, 1), np.float32, order="F")


def _unrolled_arguments(steps: Sequence[Step], target_shape, target_affine: np.ndarray) -> tuple | None:
    """Arguments of :func:`nl_unwarp._kernels.field_affine_field_sample` if the chain has its shape.

    The shape is ``[W, A..., (J,) G]``, each part optional: ``W`` a field on the
    target lattice (read at its nodes), any run of affines (multiplied into one
    matrix), ``G`` a field anywhere with its Jacobian map, given with it or as a
    factor step just before it (our raw-grid Jacobian before the field on the
    grown grid, or on a coarser one, as ``compose --jacobian-map`` builds the
    chain).
    This covers the correction alone, motion then correction, and registration
    then correction. Other chains (other factor maps, fields elsewhere) return
    None and take the generic program.
    """
    rest = list(steps)
    first, offset = _NO_FIELD, np.zeros(3, np.int64)
    if rest and isinstance(rest[0], FieldStep) and rest[0].jacobian is None and len(rest) > 1:
        nodes = _lattice_offset((np.linalg.inv(rest[0].affine) @ target_affine)[:3], target_shape)
        if nodes is not None:
            first, offset = rest[0].disp_ras_mm, nodes
            rest = rest[1:]
    matrix = np.eye(4)
    while rest and isinstance(rest[0], AffineStep):
        matrix = rest.pop(0).matrix_ras @ matrix
    last, last_map = _NO_FIELD, np.zeros((3, 4))
    jac, jac_offset, jac_map = _NO_FACTOR, np.zeros(3, np.int64), np.zeros((3, 4))
    if len(rest) == 2 and isinstance(rest[0], FactorStep) and isinstance(rest[1], FieldStep) \
            and rest[1].jacobian is None:
        factor, g = rest
        jac_offset = _lattice_offset((np.linalg.inv(factor.affine) @ g.affine)[:3], g.shape)
        jac_map = _world_to_index(factor.affine)
        jac, rest = factor.values, [g]
    block, jac_in_last = None, False
    if rest and isinstance(rest[0], FieldStep):
        g = rest.pop(0)
        last, last_map = g.disp_ras_mm, _world_to_index(g.affine)
        block = interleaved_block(last)
        if g.jacobian is not None:
            jac = g.jacobian
            jac_in_last = block is not None and _fourth_channel(jac, last)
    if rest:
        return None
    # Flat views that the kernel reads through cell offsets: no copies for a warp as
    # compute_warp makes it (voxel-interleaved) or Fortran-ordered fields and maps.
    flat_last = block if block is not None else last.reshape(-1, order="F")
    flat_jac, jac_step, _ = flat_buffer(_NO_FACTOR if jac_in_last else jac)
    flat_first, *first_steps = flat_buffer(first)
    return (flat_first, np.array([*first.shape[:3], *first_steps], np.int64), offset, first is not _NO_FIELD,
            np.ascontiguousarray(matrix[:3]),
            flat_last, np.array(last.shape[:3], np.int64), last_map, last is not _NO_FIELD, block is not None,
            flat_jac, np.array(jac.shape, np.int64), jac_step,
            np.zeros(3, np.int64) if jac_offset is None else jac_offset, jac_offset is not None, jac_map,
            jac is not _NO_FACTOR, jac_in_last)


def _fourth_channel(jac: np.ndarray, disp: np.ndarray) -> bool:
    """Whether ``jac`` is the channel after ``disp``'s three in a voxel-interleaved block."""
    return (jac.shape == disp.shape[:3] and jac.strides == disp.strides[:3]
            and jac.__array_interface__["data"][0] == disp.__array_interface__["data"][0] + 12)


def _check_on_outside(on_outside: str) -> None:
    if on_outside not in ON_OUTSIDE:
        raise ValueError(f"on_outside must be one of {ON_OUTSIDE}, got {on_outside!r}")


def _has_factor(steps: Sequence[Step]) -> bool:
    return any(isinstance(s, FactorStep) or (isinstance(s, FieldStep) and s.jacobian is not None)
               for s in steps)


def compose_chain(
    chain: Sequence[Step | np.ndarray],
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
    chain : sequence of AffineStep, FieldStep, FactorStep or (4, 4) ndarray
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
        Its arrays are Fortran-ordered (x fastest), as NIfTI stores them.

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
    ITK does). Factor maps are sampled trilinearly where they sit and multiplied.
    """
    from ._kernels import fold_chain

    _check_on_outside(on_outside)
    steps = [_as_step(s) for s in chain]
    shape = tuple(int(n) for n in target_shape)
    target_affine = np.asarray(target_affine, dtype=float)
    disp = np.empty(shape + (3,), np.float32, order="F")
    factor = np.empty(shape, np.float32, order="F")
    missed = np.empty(shape, np.bool_, order="F")
    use_raw = raw_shape is not None and raw_affine is not None
    raw_map = _world_to_index(np.asarray(raw_affine, float)) if use_raw else np.zeros((3, 4))
    raw_dims = np.asarray(raw_shape if use_raw else (1, 1, 1), np.int64)
    program = _Program(steps, shape, target_affine)
    fold_chain(np.ascontiguousarray(target_affine[:3]), raw_map, raw_dims, use_raw, *program.arguments(),
               disp, factor, missed)
    result = ComposedField(disp, target_affine, factor if _has_factor(steps) else None, missed)
    _report_coverage(result.uncovered_fraction, on_outside)
    return result


def resample_chain(
    volume: np.ndarray,
    raw_affine: np.ndarray,
    chain: Sequence[Step | np.ndarray],
    target_shape: Sequence[int],
    target_affine: np.ndarray,
    *,
    order: int = 3,
    fill: float = 0.0,
    on_outside: str = "warn",
    unroll: bool = True,
) -> ResampledChain:
    """Resample a raw 3-D volume once through a chain onto a target grid.

    .. math:: I(\\mathbf p) = I_{raw}(T_{n-1}(\\cdots T_0(\\mathbf p)))\\; \\prod f

    with :math:`\\prod f` the chain's factor maps, each sampled where it sits
    (:class:`FactorStep`). The chain is followed from every target voxel and
    the raw image sampled at the end in the same compiled pass (orders 0, 1
    and 3): no composed field is stored. Other orders fold the field first
    (:func:`compose_chain`) and resample through it.

    Parameters
    ----------
    volume : (X', Y', Z') ndarray
        Raw image (real).
    raw_affine : (4, 4) ndarray
        Its voxel -> RAS mm affine.
    chain : sequence of steps
        As for :func:`compose_chain` (application order).
    target_shape, target_affine
        Output grid.
    order : int
        B-spline order, 0-5 (3: cubic; mirror boundary as :mod:`nl_unwarp.resample`).
    fill : float
        Value outside the raw field of view.
    on_outside : {"warn", "raise", "ignore"}
        As for :func:`compose_chain`; only target points landing inside the
        raw field of view count.
    unroll : bool
        Let chains of the common shape ``[W, A..., G]`` take the unrolled
        kernel (same arithmetic, faster); False forces the generic program
        (for tests and benchmarks).

    Returns
    -------
    ResampledChain
        Data Fortran-ordered (x fastest), float32.
    """
    from ._kernels import field_affine_field_sample, fold_chain_and_sample

    if order not in ORDERS:
        raise ValueError(f"interpolation order must be one of {ORDERS}, got {order}")
    _check_on_outside(on_outside)
    steps = [_as_step(s) for s in chain]
    shape = tuple(int(n) for n in target_shape)
    target_affine = np.asarray(target_affine, dtype=float)
    raw_affine = np.asarray(raw_affine, dtype=float)
    volume = np.asarray(volume)
    if order not in _FUSED_ORDERS:
        composed = compose_chain(steps, shape, target_affine, raw_shape=volume.shape,
                                 raw_affine=raw_affine, on_outside=on_outside)
        data = resample_volume(volume, raw_affine, composed.disp_ras_mm, target_affine,
                               jacobian=composed.factor, order=order, fill=fill)
        return ResampledChain(data, composed.uncovered)
    coef = prefilter(volume, order, memory_order="F")
    out = np.empty(shape, np.float32, order="F")
    missed = np.empty(shape, np.bool_, order="F")
    target_map, raw_map = np.ascontiguousarray(target_affine[:3]), _world_to_index(raw_affine)
    unrolled = _unrolled_arguments(steps, shape, target_affine) if unroll else None
    if unrolled is not None:
        field_affine_field_sample(coef, order, float(fill), target_map, *unrolled, raw_map, out, missed)
    else:
        program = _Program(steps, shape, target_affine)
        fold_chain_and_sample(coef, order, float(fill), target_map, raw_map, *program.arguments(),
                              out, missed)
    result = ResampledChain(out, missed)
    _report_coverage(result.uncovered_fraction, on_outside)
    return result


def _report_coverage(frac: float, on_outside: str) -> None:
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


def _trilinear(values: np.ndarray, affine: np.ndarray, points_ras_mm: np.ndarray):
    """Plain numpy trilinear sampling with neighbours held at the edge; and the continuous index."""
    pts = np.asarray(points_ras_mm, dtype=float).reshape(-1, 3)
    inv = np.linalg.inv(affine)
    idx = pts @ inv[:3, :3].T + inv[:3, 3]
    dims = np.array(values.shape[:3])
    clipped = np.clip(idx, -1.0, dims)
    base = np.floor(clipped).astype(int)
    frac = clipped - base
    out = np.zeros((len(pts),) + values.shape[3:])
    for corner in np.ndindex(2, 2, 2):
        c = np.array(corner)
        w = np.prod(np.where(c, frac, 1 - frac), axis=1)
        nb = np.clip(base + c, 0, dims - 1)
        out += w.reshape((-1,) + (1,) * (values.ndim - 3)) * values[nb[:, 0], nb[:, 1], nb[:, 2]]
    return out, idx


def sample_field(step: FieldStep, points_ras_mm: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Trilinear displacement of a field at (N, 3) RAS points, and whether each was inside.

    Plain numpy, written independently of the kernel (the tests compare both).
    """
    out, idx = _trilinear(step.disp_ras_mm, step.affine, points_ras_mm)
    inside = np.all((idx >= -0.5) & (idx <= np.array(step.shape) - 0.5), axis=1)
    out[~inside] = 0.0
    return out, inside


def sample_factor(step: FactorStep, points_ras_mm: np.ndarray) -> np.ndarray:
    """Trilinear factor at (N, 3) RAS points, edge values beyond the grid (plain numpy reference)."""
    return _trilinear(step.values, step.affine, points_ras_mm)[0]
