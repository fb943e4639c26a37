"""Diffusion weighting under gradient nonlinearity: the coil tensor and effective b-tables.

A nonlinear gradient coil set applies, at position :math:`\\mathbf r`, not the
nominal diffusion gradient :math:`\\mathbf G` but :math:`L(\\mathbf r)\\mathbf G`,
where :math:`L` is the *coil tensor*. With :math:`B_c = G_c\\,u_c(\\mathbf r)` the
field of coil :math:`c` per unit nominal gradient (:mod:`nl_unwarp.coil`),

.. math::

    (L\\mathbf G)_k = \\frac{\\partial}{\\partial r_k}\\sum_c G_c\\,u_c(\\mathbf r)
    \\quad\\Rightarrow\\quad L_{kc} = \\frac{\\partial u_c}{\\partial r_k} = J_{ck},

the *transpose* of the encoding Jacobian :math:`J = \\partial u / \\partial r` that
:meth:`~nl_unwarp.coil.CoilModel.encode` returns (``jac[c, k]``). The b-matrix
transforms as :math:`\\mathbf b' = L\\,\\mathbf b\\,L^T` (Bammer et al. 2003, from
memory), so a volume of nominal b-value :math:`b` and unit direction
:math:`\\mathbf g` is in fact weighted by

.. math::

    b_{eff} = b\\,|L\\mathbf g|^2, \\qquad \\mathbf g_{eff} = L\\mathbf g / |L\\mathbf g| .

Frames. :math:`L` above is in the device frame. b-vectors are given in another
frame (BIDS: the image axes, :func:`nl_unwarp.io.bvals.ras_from_bvec_frame`).
With :math:`Q` the rotation from that frame to the device frame,
:math:`Q = R_{device\\leftarrow ras}\\,U F`, the tensor in the b-vector frame is

.. math::

    L_{img} = Q^T L_{dev}\\, Q = Q^T J^T Q .

Cross terms between the diffusion and imaging gradients are not modelled.
This module is pure math: arrays and affines in, arrays out.

References
----------
.. [1] Bammer, R. et al. (2003). Analysis and generalized correction of the
   effect of spatial gradient field distortions in diffusion-weighted imaging.
   Magn. Reson. Med. 50, 560-569 (from memory).
.. [2] Malyarenko, D. I. et al. (2014). Demonstration of nonlinearity bias in the
   measurement of the apparent diffusion coefficient in multicenter trials.
   Magn. Reson. Med. 71, 1312-1323 (magnitudes of the bias; from memory).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numba
import numpy as np

from .coil import CoilModel
from .frames import DeviceFrame
from .warp import index_to_ras, lattice, outside_valid_radius, upsample_lattice

__all__ = [
    "B0_THRESHOLD",
    "SHELL_TOLERANCE",
    "TENSOR_COMPONENTS",
    "CoilTensorField",
    "Shell",
    "apparent_md_ratio",
    "coil_tensor_at",
    "compute_coil_tensor",
    "device_from_bvec",
    "effective_volume",
    "effective_weighting",
    "mask_mean_table",
    "shell_deviation",
    "split_shells",
    "weighting_summary",
]

#: Order of the nine components of the tensor file: ``L[i, j]`` at index
#: ``3 * i + j`` (row-major, as NIfTI's GENMATRIX intent stores a matrix).
#: Letters name the axes of the b-vector frame: ``L[i, j]`` is the i-th
#: component of the applied gradient per unit nominal gradient along axis j.
TENSOR_COMPONENTS = tuple(f"{a}{b}" for a in "xyz" for b in "xyz")
#: b-values at or below this (s/mm^2) count as b = 0 (dipy's ``gradient_table`` default).
B0_THRESHOLD = 50.0
#: Largest gap (s/mm^2) between sorted b-values of one shell (common practice, no source).
SHELL_TOLERANCE = 50.0
#: Largest accepted interpolation error of a tensor component (dimensionless):
#: it bounds the b-value error by about twice that, far below the 1 % aims.
DEFAULT_TOLERANCE = 1e-4
#: Lattice spacing tried first, mm (halved until within tolerance).
DEFAULT_LATTICE_MM = 8.0
#: Voxels at which the lattice is checked against direct evaluation.
CHECK_VOXELS = 4000


def device_from_bvec(frame: DeviceFrame, ras_from_bvec: np.ndarray) -> np.ndarray:
    """Q (3 x 3): b-vector frame -> device frame."""
    return frame.device_from_ras @ np.asarray(ras_from_bvec, dtype=float)


def coil_tensor_at(coil: CoilModel, frame: DeviceFrame, points_ras_mm: np.ndarray,
                   ras_from_bvec: np.ndarray) -> np.ndarray:
    """Coil tensor :math:`L_{img} = Q^T J^T Q` at world points, in the b-vector frame.

    Parameters
    ----------
    coil : CoilModel
    frame : DeviceFrame
    points_ras_mm : (..., 3) ndarray
        True positions, RAS mm.
    ras_from_bvec : (3, 3) ndarray
        b-vector frame -> RAS (:func:`nl_unwarp.io.bvals.ras_from_bvec_frame`).

    Returns
    -------
    (..., 3, 3) ndarray
        ``L[..., i, j]``: applied gradient component i per unit nominal
        gradient along j (dimensionless).
    """
    q = device_from_bvec(frame, ras_from_bvec)
    _, jac = coil.encode(frame.to_device(points_ras_mm))
    return q.T @ np.swapaxes(jac, -1, -2) @ q


@dataclass
class CoilTensorField:
    """The coil tensor sampled on an image grid.

    Attributes
    ----------
    affine : (4, 4) ndarray
        Grid affine, voxel index -> RAS mm.
    tensor : (X, Y, Z, 9) float32 ndarray
        ``L[i, j]`` at channel ``3 i + j`` (:data:`TENSOR_COMPONENTS`), in
        the b-vector frame; a voxel's nine channels side by side, voxels x fastest
        (:func:`nl_unwarp.warp.upsample_lattice`).
    outside_valid : (X, Y, Z) bool ndarray
        Voxels beyond the coil model's valid radius.
    ras_from_bvec : (3, 3) ndarray
        The b-vector frame the tensor is expressed in.
    """

    affine: np.ndarray
    tensor: np.ndarray
    outside_valid: np.ndarray
    ras_from_bvec: np.ndarray
    lattice_mm: float = 0.0
    interpolation_error: float = 0.0
    isocenter_ras_mm: np.ndarray = field(default_factory=lambda: np.zeros(3))

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(self.tensor.shape[:3])

    def matrices(self, mask: np.ndarray | None = None) -> np.ndarray:
        """(N, 3, 3) float64 tensors of the voxels in ``mask`` (all voxels if None)."""
        if mask is None:  # voxels x fastest, as ravel(order="F") lists them
            flat = self.tensor.transpose(2, 1, 0, 3).reshape(-1, 9)
        else:
            flat = self.tensor[mask]
        return np.asarray(flat, dtype=float).reshape(-1, 3, 3)


def _tensor_values(coil, frame, affine, ijk, ras_from_bvec) -> np.ndarray:
    lmat = coil_tensor_at(coil, frame, index_to_ras(affine, ijk), ras_from_bvec)
    return lmat.reshape(lmat.shape[:-2] + (9,))


def _check_voxels(shape, count: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    pick = np.stack([rng.integers(0, n, count) for n in shape], axis=-1)
    corners = np.array(np.meshgrid(*[[0, n - 1] for n in shape], indexing="ij")).reshape(3, -1).T
    return np.concatenate([pick, corners])


def compute_coil_tensor(
    coil: CoilModel,
    shape: tuple[int, int, int],
    affine: np.ndarray,
    frame: DeviceFrame,
    *,
    ras_from_bvec: np.ndarray,
    tolerance: float = DEFAULT_TOLERANCE,
    lattice_mm: float = DEFAULT_LATTICE_MM,
    seed: int = 0,
) -> CoilTensorField:
    """The coil tensor on an image grid, in the b-vector frame.

    The series is evaluated exactly on a lattice aligned with the voxel grid
    and upsampled with the warp's four-point machinery
    (:func:`nl_unwarp.warp.upsample_lattice`); the result is checked against
    direct evaluation at seeded random voxels inside the valid radius and the
    lattice halved until the largest component error is within ``tolerance``.

    Parameters
    ----------
    coil, shape, affine, frame
        As :func:`nl_unwarp.warp.compute_warp` (the grid of true positions:
        the corrected DWI's grid).
    ras_from_bvec : (3, 3) ndarray
        b-vector frame -> RAS.
    tolerance : float
        Largest accepted interpolation error of a component (dimensionless).
    lattice_mm : float
        First lattice spacing tried, mm.
    seed : int
        Seed of the check-voxel draw.
    """
    affine = np.asarray(affine, dtype=float)
    shape = tuple(int(n) for n in shape)
    zooms = np.linalg.norm(affine[:3, :3], axis=0)
    outside = outside_valid_radius(affine, shape, frame, coil.valid_radius_mm)
    check = _check_voxels(shape, CHECK_VOXELS, seed)
    check = check[~outside[tuple(check.T)]]
    reference = _tensor_values(coil, frame, affine, check.astype(float), ras_from_bvec)
    step_mm = float(lattice_mm)
    while True:
        steps, nodes = lattice(shape, zooms, step_mm)
        grid = np.stack(np.meshgrid(*nodes, indexing="ij"), axis=-1).astype(float)
        tensor = upsample_lattice(_tensor_values(coil, frame, affine, grid, ras_from_bvec), shape, steps)
        err = float(np.max(np.abs(tensor[tuple(check.T)] - reference), initial=0.0))
        if err <= tolerance or max(steps) == 1:
            break
        step_mm /= 2.0
    return CoilTensorField(affine=affine, tensor=tensor, outside_valid=outside,
                           ras_from_bvec=np.asarray(ras_from_bvec, dtype=float), lattice_mm=step_mm,
                           interpolation_error=err, isocenter_ras_mm=frame.isocenter_ras_mm)


def _unit(bvecs: np.ndarray) -> np.ndarray:
    g = np.asarray(bvecs, dtype=float).reshape(-1, 3)
    norm = np.linalg.norm(g, axis=1, keepdims=True)
    return np.divide(g, norm, out=np.zeros_like(g), where=norm > 0)


def effective_weighting(tensor: np.ndarray, bvals: np.ndarray, bvecs: np.ndarray
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Per-voxel effective b-values and directions (Bammer et al. 2003).

    Parameters
    ----------
    tensor : (..., 3, 3) ndarray
        Coil tensors in the b-vector frame.
    bvals : (N,) ndarray, s/mm^2
    bvecs : (N, 3) ndarray
        Nominal directions in the same frame (normalised here; zero for b = 0).

    Returns
    -------
    bvals_eff : (..., N) ndarray
        :math:`b\\,|L\\mathbf g|^2`, s/mm^2.
    bvecs_eff : (..., N, 3) ndarray
        :math:`L\\mathbf g / |L\\mathbf g|` (zero where the nominal vector is zero).
    """
    g = _unit(bvecs)
    applied = np.einsum("...ij,nj->...ni", np.asarray(tensor, dtype=float), g)
    norm = np.linalg.norm(applied, axis=-1)
    bvals_eff = np.asarray(bvals, dtype=float) * norm**2
    bvecs_eff = np.divide(applied, norm[..., None], out=np.zeros_like(applied),
                          where=norm[..., None] > 0)
    return bvals_eff, bvecs_eff


def apparent_md_ratio(tensor: np.ndarray) -> np.ndarray:
    """Mean diffusivity an isotropic medium shows, fitted with the nominal table, over the truth.

    With signal :math:`S = S_0 \\exp(-b\\,\\mathbf g^T L^T D L \\mathbf g)` and
    :math:`D = d I`, a tensor fit with the nominal table sees exactly the
    tensor :math:`d\\,L^T L` (the log-signal is linear in its six elements), so
    its mean diffusivity is :math:`d\\,\\mathrm{tr}(L^T L)/3`.

    Parameters
    ----------
    tensor : (..., 3, 3) ndarray

    Returns
    -------
    (...) ndarray
        :math:`\\mathrm{tr}(L^T L)/3` (frame-independent).
    """
    t = np.asarray(tensor, dtype=float)
    return np.einsum("...ij,...ij->...", t, t) / 3.0


@dataclass(frozen=True)
class Shell:
    """Volumes of one nominal b-value."""

    bval: float
    volumes: tuple[int, ...]


def split_shells(bvals: np.ndarray, *, b0_threshold: float = B0_THRESHOLD,
                 tolerance: float = SHELL_TOLERANCE) -> list[Shell]:
    """Group diffusion-weighted volumes into shells (b = 0 volumes left out).

    Sorted b-values above ``b0_threshold`` start a new shell where the gap to
    the previous one exceeds ``tolerance``; a shell's b-value is its median.
    """
    bvals = np.asarray(bvals, dtype=float).ravel()
    weighted = np.flatnonzero(bvals > b0_threshold)
    order = weighted[np.argsort(bvals[weighted], kind="stable")]
    groups: list[list[int]] = []
    for index in order:
        if groups and bvals[index] - bvals[groups[-1][-1]] <= tolerance:
            groups[-1].append(int(index))
        else:
            groups.append([int(index)])
    return [Shell(float(np.median(bvals[g])), tuple(sorted(g))) for g in groups]


@numba.njit(parallel=True, cache=True)
def _shell_kernel(tensor, dirs, out_mean, out_min, out_max):
    nx, ny, nz = out_mean.shape
    nd = dirs.shape[0]
    for k in numba.prange(nz):
        for j in range(ny):
            for i in range(nx):
                # S = L^T L, symmetric: |L g|^2 = g^T S g.
                l00, l01, l02 = tensor[i, j, k, 0], tensor[i, j, k, 1], tensor[i, j, k, 2]
                l10, l11, l12 = tensor[i, j, k, 3], tensor[i, j, k, 4], tensor[i, j, k, 5]
                l20, l21, l22 = tensor[i, j, k, 6], tensor[i, j, k, 7], tensor[i, j, k, 8]
                s00 = l00 * l00 + l10 * l10 + l20 * l20
                s11 = l01 * l01 + l11 * l11 + l21 * l21
                s22 = l02 * l02 + l12 * l12 + l22 * l22
                s01 = 2.0 * (l00 * l01 + l10 * l11 + l20 * l21)
                s02 = 2.0 * (l00 * l02 + l10 * l12 + l20 * l22)
                s12 = 2.0 * (l01 * l02 + l11 * l12 + l21 * l22)
                total = 0.0
                lo = np.inf
                hi = -np.inf
                for n in range(nd):
                    gx, gy, gz = dirs[n, 0], dirs[n, 1], dirs[n, 2]
                    q = (s00 * gx * gx + s11 * gy * gy + s22 * gz * gz
                         + s01 * gx * gy + s02 * gx * gz + s12 * gy * gz) - 1.0
                    total += q
                    lo = min(lo, q)
                    hi = max(hi, q)
                out_mean[i, j, k] = total / nd
                out_min[i, j, k] = lo
                out_max[i, j, k] = hi


def shell_deviation(tensor: np.ndarray, bvecs: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Relative b-value deviation :math:`|L\\mathbf g|^2 - 1` over one shell's directions.

    Parameters
    ----------
    tensor : (X, Y, Z, 9) float32 ndarray
        :attr:`CoilTensorField.tensor`.
    bvecs : (N, 3) ndarray
        The shell's nominal directions (same frame).

    Returns
    -------
    mean, minimum, maximum : (X, Y, Z) float32 ndarray
        Per voxel, over the directions: :math:`b_{eff}/b - 1` (dimensionless).
    """
    dirs = np.ascontiguousarray(_unit(bvecs))
    shape = tensor.shape[:3]
    out = [np.empty(shape, dtype=np.float32, order="F") for _ in range(3)]
    _shell_kernel(tensor, dirs, *out)
    return out[0], out[1], out[2]


@numba.njit(parallel=True, cache=True)
def _volume_kernel(tensor, g, out_scale, out_dir):
    nx, ny, nz = out_scale.shape
    for k in numba.prange(nz):
        for j in range(ny):
            for i in range(nx):
                v0 = tensor[i, j, k, 0] * g[0] + tensor[i, j, k, 1] * g[1] + tensor[i, j, k, 2] * g[2]
                v1 = tensor[i, j, k, 3] * g[0] + tensor[i, j, k, 4] * g[1] + tensor[i, j, k, 5] * g[2]
                v2 = tensor[i, j, k, 6] * g[0] + tensor[i, j, k, 7] * g[1] + tensor[i, j, k, 8] * g[2]
                sq = v0 * v0 + v1 * v1 + v2 * v2
                out_scale[i, j, k] = sq
                norm = np.sqrt(sq)
                if norm > 0.0:
                    out_dir[i, j, k, 0] = v0 / norm
                    out_dir[i, j, k, 1] = v1 / norm
                    out_dir[i, j, k, 2] = v2 / norm
                else:
                    out_dir[i, j, k, 0] = 0.0
                    out_dir[i, j, k, 1] = 0.0
                    out_dir[i, j, k, 2] = 0.0


def effective_volume(tensor: np.ndarray, bvec: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """One volume's per-voxel weighting factor and direction on the grid.

    Parameters
    ----------
    tensor : (X, Y, Z, 9) float32 ndarray
    bvec : (3,) ndarray
        Nominal direction (normalised here; zero for b = 0).

    Returns
    -------
    scale : (X, Y, Z) float32 ndarray
        :math:`|L\\mathbf g|^2` (multiply by the nominal b-value).
    direction : (X, Y, Z, 3) float32 ndarray, Fortran-ordered
        :math:`L\\mathbf g / |L\\mathbf g|`.
    """
    g = _unit(bvec)[0]
    shape = tensor.shape[:3]
    scale = np.empty(shape, dtype=np.float32, order="F")
    direction = np.empty(shape + (3,), dtype=np.float32, order="F")
    _volume_kernel(tensor, g, scale, direction)
    return scale, direction


def mask_mean_table(field: CoilTensorField, mask: np.ndarray, bvals: np.ndarray, bvecs: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
    """One b-table for a region: the nominal table through the mask's mean tensor.

    To first order in :math:`L - I` this equals the mean of the per-voxel
    b-matrices; for tools that take a single table per series.

    Returns
    -------
    bvals : (N,) ndarray, s/mm^2
    bvecs : (N, 3) ndarray
        In the b-vector frame; zero rows for b = 0 volumes.
    """
    if not np.any(mask):
        raise ValueError("the mask is empty: no voxel to average the coil tensor over")
    mean = field.matrices(mask).mean(axis=0)
    return effective_weighting(mean, bvals, bvecs)


def _shell_record(field: CoilTensorField, shell: Shell, bvecs: np.ndarray, mask: np.ndarray,
                  voxel_ras) -> tuple[dict, np.ndarray]:
    mean, lo, hi = shell_deviation(field.tensor, bvecs[list(shell.volumes)])
    where_lo = np.unravel_index(np.argmin(np.where(mask, lo, np.inf)), mask.shape)
    where_hi = np.unravel_index(np.argmax(np.where(mask, hi, -np.inf)), mask.shape)
    return {
        "bval": shell.bval,
        "volumes": list(shell.volumes),
        "median_deviation": float(np.median(mean[mask])),
        "min_deviation": float(lo[where_lo]),
        "max_deviation": float(hi[where_hi]),
        "min_at_ras_mm": [round(float(v), 2) for v in voxel_ras(where_lo)],
        "max_at_ras_mm": [round(float(v), 2) for v in voxel_ras(where_hi)],
    }, mean


def weighting_summary(field: CoilTensorField, bvals: np.ndarray, bvecs: np.ndarray,
                      mask: np.ndarray, *, shells: list[Shell] | None = None
                      ) -> tuple[dict, np.ndarray]:
    """Per-shell deviation maps and their figures inside a mask.

    Parameters
    ----------
    field : CoilTensorField
    bvals, bvecs : (N,), (N, 3) ndarray
        Nominal table (b-vector frame).
    mask : (X, Y, Z) bool ndarray
        Voxels the figures are taken over (a brain mask); must not be empty.
    shells : list of Shell, optional
        Default: :func:`split_shells`.

    Returns
    -------
    summary : dict
        JSON-ready: per shell, the median over the mask of the voxels' mean
        deviation :math:`b_{eff}/b - 1` and its extremes over voxels and
        directions (with their RAS positions); the mask size; the largest
        :math:`\\|L - I\\|_F` and the apparent-MD ratio range in the mask.
    maps : (X, Y, Z, S) float32 ndarray
        Per shell, the voxels' mean deviation over its directions.
    """
    mask = np.asarray(mask, dtype=bool)
    if not mask.any():
        raise ValueError("the mask is empty: no voxel to summarise")
    shells = split_shells(bvals) if shells is None else shells
    bvecs = np.asarray(bvecs, dtype=float).reshape(-1, 3)

    def voxel_ras(ijk):
        return index_to_ras(field.affine, np.asarray(ijk, dtype=float))

    records, maps = [], []
    for shell in shells:
        record, mean = _shell_record(field, shell, bvecs, mask, voxel_ras)
        records.append(record)
        maps.append(mean)
    inside = field.matrices(mask)
    ratio = apparent_md_ratio(inside)
    summary = {
        "mask_voxels": int(mask.sum()),
        "shells": records,
        "max_tensor_deviation": float(np.sqrt(np.max(np.sum((inside - np.eye(3)) ** 2, axis=(1, 2))))),
        "apparent_md_ratio_min": float(ratio.min()),
        "apparent_md_ratio_max": float(ratio.max()),
        "lattice_mm": field.lattice_mm,
        "interpolation_error": field.interpolation_error,
    }
    stack = np.stack(maps, axis=-1) if maps else np.zeros(field.shape + (0,), np.float32)
    return summary, np.asfortranarray(stack, dtype=np.float32)
