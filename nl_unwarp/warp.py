"""Warp fields of a gradient system on an image grid.

For every voxel of an output grid (true positions) the warp gives the
displacement, in world RAS mm, to the position that the linear-gradient
reconstruction assigned to that signal, and the Jacobian determinant of that
mapping. The harmonic series is evaluated exactly on a coarse lattice aligned
with the voxel grid and upsampled with separable four-point (cubic Lagrange)
interpolation; the interpolation error is measured against direct evaluation
at sample voxels on every call and the lattice is refined until it is within
tolerance.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .coil import CoilModel
from .frames import DeviceFrame

__all__ = [
    "MODES",
    "WarpField",
    "compute_warp",
    "default_slice_axis",
    "index_to_ras",
    "lattice",
    "outside_valid_radius",
    "slice_normal_ras",
    "upsample_lattice",
]

#: Correction modes: all of the displacement, only the part in the slice
#: plane, or only the part normal to it.
MODES = ("full", "inplane", "throughplane")

#: Largest accepted warp interpolation error, mm (the foundation target).
DEFAULT_TOLERANCE_MM = 1e-3
#: Lattice spacing tried first, mm; refined by halving until within tolerance.
DEFAULT_LATTICE_MM = 8.0
#: Voxels at which the lattice is checked against direct evaluation.
CHECK_VOXELS = 4000


@dataclass
class WarpField:
    """A warp field sampled on an image grid.

    Attributes
    ----------
    affine : (4, 4) ndarray
        Grid affine, voxel index -> RAS mm.
    disp_ras_mm : (X, Y, Z, 3) float32 ndarray
        Encoded minus true position, RAS mm: the raw image is sampled at
        ``p + disp`` for output point ``p``.
    jacobian : (X, Y, Z) float32 ndarray
        Determinant of the encoding map (of its projected part in 2D modes).
    outside_valid : (X, Y, Z) bool ndarray
        Voxels farther from the isocenter than the model's valid radius.
    """

    affine: np.ndarray
    disp_ras_mm: np.ndarray
    jacobian: np.ndarray
    outside_valid: np.ndarray
    mode: str = "full"
    slice_axis: int | None = None
    isocenter_ras_mm: np.ndarray = field(default_factory=lambda: np.zeros(3))
    lattice_mm: float = 0.0
    interpolation_error_mm: float = 0.0
    jacobian_interpolation_error: float = 0.0

    @property
    def shape(self) -> tuple[int, int, int]:
        """Spatial shape of the grid."""
        return tuple(self.disp_ras_mm.shape[:3])

    @property
    def magnitude_mm(self) -> np.ndarray:
        """Displacement magnitude, mm, float32."""
        return np.sqrt(np.einsum("...i,...i->...", self.disp_ras_mm, self.disp_ras_mm))

    @property
    def outside_fraction(self) -> float:
        """Fraction of voxels outside the valid radius."""
        return float(self.outside_valid.mean()) if self.outside_valid.size else 0.0


def default_slice_axis(affine: np.ndarray) -> int:
    """Voxel axis with the largest spacing (the last one on ties)."""
    zooms = np.linalg.norm(np.asarray(affine)[:3, :3], axis=0)
    return int(np.flatnonzero(np.isclose(zooms, zooms.max(), rtol=1e-6))[-1])


def slice_normal_ras(affine: np.ndarray, slice_axis: int) -> np.ndarray:
    """Unit normal (RAS) to the plane spanned by the two in-plane voxel axes."""
    cols = np.asarray(affine, dtype=float)[:3, :3]
    inplane = [a for a in range(3) if a != slice_axis]
    normal = np.cross(cols[:, inplane[0]], cols[:, inplane[1]])
    normal /= np.linalg.norm(normal)
    if normal @ cols[:, slice_axis] < 0:
        normal = -normal
    return normal


def _projector(mode: str, affine: np.ndarray, slice_axis: int | None) -> np.ndarray:
    """RAS projector that keeps the part of a displacement the mode corrects."""
    if mode == "full":
        return np.eye(3)
    normal = slice_normal_ras(affine, slice_axis)
    through = np.outer(normal, normal)
    return through if mode == "throughplane" else np.eye(3) - through


def _evaluate(coil: CoilModel, frame: DeviceFrame, points_ras_mm: np.ndarray,
              projector: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Projected RAS displacement (mm) and Jacobian determinant at RAS points.

    Notes
    -----
    With :math:`Q` the RAS-from-device rotation, :math:`d_{ras} = Q (u - r)`
    and :math:`J_{ras} = Q J Q^T`. A mode keeps :math:`P d` and the matching
    Jacobian :math:`I + P (J_{ras} - I)`.
    """
    r_dev = frame.to_device(points_ras_mm)
    encoded, jac = coil.encode(r_dev)
    q = frame.ras_from_device
    disp = frame.vectors_to_ras(encoded - r_dev) @ projector.T
    jac_ras = q @ jac @ q.T
    eye = np.eye(3)
    det = np.linalg.det(eye + projector @ (jac_ras - eye))
    return disp, det


def _lagrange_weights(t: np.ndarray) -> np.ndarray:
    """Four-point Lagrange weights for nodes -1, 0, 1, 2 at fractions ``t``."""
    return np.stack([
        -t * (t - 1) * (t - 2) / 6,
        (t + 1) * (t - 1) * (t - 2) / 2,
        -(t + 1) * t * (t - 2) / 2,
        (t + 1) * t * (t - 1) / 6,
    ])


def _upsample_axis(src: np.ndarray, n: int, step: int, dtype=np.float64) -> np.ndarray:
    """Upsample axis 2 of C-ordered (A, B, M, C) lattice data (nodes at (j - 1) * step) onto 0..n-1."""
    from ._kernels import upsample_last

    weights = _lagrange_weights(np.arange(step) / step).T.copy()
    out = np.empty(src.shape[:2] + (n, src.shape[3]), dtype=dtype)
    upsample_last(src, step, weights, out)
    return out


def lattice(shape, zooms, lattice_mm):
    """Per axis, the lattice step (voxels) and lattice node indices.

    Nodes sit at voxel indices ``(j - 1) * step`` for ``j = 0..M-1``, one node
    before the grid and two after it, as four-point upsampling needs.
    """
    steps = [max(1, int(lattice_mm // z)) if n > 1 else 1 for n, z in zip(shape, zooms, strict=True)]
    nodes = [(np.arange((n - 1) // s + 4) - 1) * s for n, s in zip(shape, steps, strict=True)]
    return steps, nodes


def index_to_ras(affine: np.ndarray, ijk: np.ndarray) -> np.ndarray:
    """RAS mm of (..., 3) voxel indices."""
    return ijk @ affine[:3, :3].T + affine[:3, 3]


def _check_voxels(shape, count: int, seed: int) -> np.ndarray:
    """Random voxel indices (seeded), plus the grid corners."""
    rng = np.random.default_rng(seed)
    pick = np.stack([rng.integers(0, n, count) for n in shape], axis=-1)
    corners = np.array(np.meshgrid(*[[0, n - 1] for n in shape], indexing="ij")).reshape(3, -1).T
    return np.concatenate([pick, corners])


def upsample_lattice(values: np.ndarray, shape, steps) -> np.ndarray:
    """Upsample (Mx, My, Mz, C) lattice values onto the full grid, float32 (X, Y, Z, C).

    The result is a view of one block in which the channels of a voxel lie
    side by side and voxels follow in NIfTI's order (x fastest): strides
    ``(4C, 4CX, 4CXY, 4)`` bytes. A warp's displacement and Jacobian
    determinant are then one 16-byte read per voxel, for the pull-back kernel
    and for the one-pass chain kernel, which blends all four channels of a
    cell at once (:func:`nl_unwarp.compose.interleaved_block`). Axes are
    upsampled x, then y, then z.
    """
    nx, ny, nz = (int(n) for n in shape)
    # Channel-last and C-ordered, (Mz, My, Mx, C): each pass upsamples axis 2
    # of an (A, B, M, rest) view without copying.
    cl = np.ascontiguousarray(np.transpose(values, (2, 1, 0, 3)), dtype=np.float64)
    mz, my, _, nc = cl.shape
    cl = _upsample_axis(cl, nx, steps[0])
    cl = _upsample_axis(cl.reshape(1, mz, my, nx * nc), ny, steps[1])
    # The last pass is over the full grid: write float32 directly.
    cl = _upsample_axis(cl.reshape(1, 1, mz, ny * nx * nc), nz, steps[2], dtype=np.float32)
    return cl.reshape(nz, ny, nx, nc).transpose(2, 1, 0, 3)


def _upsampled(coil, frame, affine, shape, projector, steps, nodes):
    """Evaluate on the lattice and upsample displacement and determinant.

    Returns one (X, Y, Z, 4) float32 array: displacement (RAS mm) in the
    first three channels, Jacobian determinant in the last.
    """
    grid = np.stack(np.meshgrid(*nodes, indexing="ij"), axis=-1).astype(float)
    disp, det = _evaluate(coil, frame, index_to_ras(affine, grid), projector)
    return upsample_lattice(np.concatenate([disp, det[..., None]], axis=-1), shape, steps)


def _outside(ijk: np.ndarray, affine, frame: DeviceFrame, radius_mm: float) -> np.ndarray:
    """Whether voxel indices (N, 3) lie beyond ``radius_mm`` from the isocenter."""
    r_dev = frame.to_device(index_to_ras(affine, ijk))
    return np.einsum("...i,...i->...", r_dev, r_dev) > radius_mm**2


def outside_valid_radius(affine, shape, frame: DeviceFrame, radius_mm: float) -> np.ndarray:
    """Boolean mask of voxels whose device position lies beyond ``radius_mm``."""
    from ._kernels import radius_squared_exceeds

    affine = np.asarray(affine, dtype=float)
    linear = frame.device_from_ras @ affine[:3, :3]
    origin = frame.device_from_ras @ affine[:3, 3] + frame.isocenter_offset_mm
    out = np.empty(tuple(shape), dtype=np.bool_)
    radius_squared_exceeds(linear, origin, float(radius_mm) ** 2, out)
    return out


def compute_warp(
    coil: CoilModel,
    shape: tuple[int, int, int],
    affine: np.ndarray,
    frame: DeviceFrame,
    *,
    mode: str = "full",
    slice_axis: int | None = None,
    tolerance_mm: float = DEFAULT_TOLERANCE_MM,
    lattice_mm: float = DEFAULT_LATTICE_MM,
    seed: int = 0,
) -> WarpField:
    """Compute the warp of a gradient system on an image grid.

    Parameters
    ----------
    coil : CoilModel
        Harmonic model of the gradient system (device frame).
    shape : tuple of 3 int
        Spatial grid shape (use 1 for a single slice).
    affine : (4, 4) ndarray
        Grid affine, voxel index -> RAS mm (oblique and anisotropic allowed).
    frame : DeviceFrame
        Patient position and isocenter offset.
    mode : {"full", "inplane", "throughplane"}
        Which part of the displacement to keep (2D acquisitions).
    slice_axis : int, optional
        Voxel axis normal to the slices; default: the axis of largest spacing.
    tolerance_mm : float
        Largest accepted interpolation error of the displacement, mm.
    lattice_mm : float
        First lattice spacing tried, mm.
    seed : int
        Seed of the check-voxel draw.

    Returns
    -------
    WarpField
        With the measured interpolation errors of displacement (mm) and of the
        Jacobian determinant.
    """
    if mode not in MODES:
        raise ValueError(f"unknown mode {mode!r}; expected one of {', '.join(MODES)}")
    affine = np.asarray(affine, dtype=float)
    shape = tuple(int(n) for n in shape)
    if mode != "full" and slice_axis is None:
        slice_axis = default_slice_axis(affine)
    projector = _projector(mode, affine, slice_axis)
    zooms = np.linalg.norm(affine[:3, :3], axis=0)
    check = _check_voxels(shape, CHECK_VOXELS, seed)
    # The series may diverge beyond the valid radius: hold the lattice to
    # tolerance only where the model is trusted.
    check = check[~_outside(check.astype(float), affine, frame, coil.valid_radius_mm)]
    ref_disp, ref_det = _evaluate(coil, frame, index_to_ras(affine, check.astype(float)), projector)
    step_mm = float(lattice_mm)
    while True:
        steps, nodes = lattice(shape, zooms, step_mm)
        fields = _upsampled(coil, frame, affine, shape, projector, steps, nodes)
        got = fields[tuple(check.T)][:, :3]
        err = float(np.max(np.linalg.norm(got - ref_disp, axis=-1), initial=0.0))
        if err <= tolerance_mm or max(steps) == 1:
            break
        step_mm /= 2.0
    det_err = float(np.max(np.abs(fields[tuple(check.T)][:, 3] - ref_det), initial=0.0))
    return WarpField(
        affine=affine,
        disp_ras_mm=fields[..., :3],
        jacobian=fields[..., 3],
        outside_valid=outside_valid_radius(affine, shape, frame, coil.valid_radius_mm),
        mode=mode,
        slice_axis=slice_axis,
        isocenter_ras_mm=frame.isocenter_ras_mm,
        lattice_mm=step_mm,
        interpolation_error_mm=err,
        jacobian_interpolation_error=det_err,
    )
