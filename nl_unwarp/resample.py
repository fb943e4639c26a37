"""Pull-back resampling of a raw image through a warp field.

.. math::

    I_c(\\mathbf p) = I_d(\\mathbf p + \\mathbf d(\\mathbf p)) \\cdot \\det J(\\mathbf p)

with :math:`\\mathbf d` the RAS displacement on the output grid (see
:mod:`nl_unwarp.warp`). B-spline interpolation of order 0-5 with scipy's
``mirror`` boundary for the spline coefficients; points further than half a
voxel outside the raw field of view get the fill value.
"""

from __future__ import annotations

from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from scipy import ndimage

from .warp import WarpField

__all__ = ["ORDERS", "correct_image", "resample_volume"]

#: Interpolation orders accepted (B-spline degree).
ORDERS = (0, 1, 2, 3, 4, 5)
#: Orders with a compiled fused kernel; the others go through scipy.ndimage.
_FAST_ORDERS = (0, 1, 3)


def _threads() -> int:
    import numba

    return max(1, int(numba.get_num_threads()))


def prefilter(volume: np.ndarray, order: int, *, memory_order: str = "K") -> np.ndarray:
    """B-spline coefficients (float32) of a real 3-D volume, mirror boundary.

    The separable recursive filter of each axis runs on slabs in threads
    (scipy.ndimage releases the GIL).

    Parameters
    ----------
    volume : (X, Y, Z) ndarray
        Real image (converted to float32 first).
    order : int
        B-spline order; 0 and 1 need no filter (a float32 copy is returned).
    memory_order : {"K", "C", "F"}
        Memory order of the result ("K": that of ``volume``). A change of
        order is made by the first filter pass, not by a separate transposed copy.

    Returns
    -------
    (X, Y, Z) float32 ndarray
    """
    volume = np.asarray(volume)
    src = volume if volume.dtype == np.float32 else volume.astype(np.float32)
    if order <= 1:
        return np.array(src, dtype=np.float32, order=memory_order, copy=True)
    out = np.empty_like(src, order=memory_order, subok=False)
    # scipy walks the lines of an axis in C order of the other axes: a Fortran-ordered
    # volume is filtered through its transpose (C-ordered, the same lines), x still first.
    flip = out.flags.f_contiguous and not out.flags.c_contiguous
    dst, src = (out.T, src.T) if flip else (out, src)
    threads = _threads()
    # Slabs along the slowest-varying axis are contiguous blocks.
    slow_first = sorted(range(3), key=lambda a: -dst.strides[a])
    with ThreadPoolExecutor(threads) as pool:
        for axis in (2, 1, 0) if flip else (0, 1, 2):
            if dst.shape[axis] == 1:
                continue
            split_axis = next(a for a in slow_first if a != axis)
            chunks = np.array_split(np.arange(dst.shape[split_axis]), threads)

            def run(idx, axis=axis, split_axis=split_axis, src=src):
                sl = [slice(None)] * 3
                sl[split_axis] = slice(idx[0], idx[-1] + 1)
                ndimage.spline_filter1d(src[tuple(sl)], order=order, axis=axis, mode="mirror",
                                        output=dst[tuple(sl)])

            list(pool.map(run, [c for c in chunks if c.size]))
            src = dst
    if src is not dst:  # no axis longer than 1: nothing to filter
        dst[...] = src
    return out


def _index_maps(raw_affine: np.ndarray, out_affine: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Output index -> raw index (3 x 4), and RAS vector -> raw index vector (3 x 3)."""
    raw_inv = np.linalg.inv(raw_affine)
    return np.ascontiguousarray((raw_inv @ out_affine)[:3]), np.ascontiguousarray(raw_inv[:3, :3])


def _resample_scipy(coef, disp, index_map, ras_to_index, jac, fill, order):
    """Reference path for any order: explicit coordinates, scipy.ndimage."""
    shape = disp.shape[:3]
    ijk = np.stack(np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij"))
    coords = np.einsum("ab,b...->a...", index_map[:, :3], ijk) + index_map[:, 3, None, None, None]
    coords += np.einsum("ab,...b->a...", ras_to_index, disp.astype(float))
    inside = np.ones(shape, dtype=bool)
    for a, n in enumerate(coef.shape):
        if n == 1:
            coords[a] = 0.0
        else:
            inside &= (coords[a] >= -0.5) & (coords[a] <= n - 0.5)
    out = ndimage.map_coordinates(coef, coords, order=order, mode="mirror", prefilter=False)
    if jac is not None:
        out = out * jac
    return np.where(inside, out, fill).astype(np.float32)


def _x_fastest(array: np.ndarray) -> bool:
    """Whether x varies fastest in memory (Fortran order, as NIfTI stores voxels)."""
    return array.strides[0] < array.strides[2]


def resample_volume(volume: np.ndarray, raw_affine: np.ndarray, disp_ras_mm: np.ndarray,
                    out_affine: np.ndarray, *, jacobian: np.ndarray | None = None,
                    order: int = 3, fill: float = 0.0) -> np.ndarray:
    """Pull a real 3-D raw volume through a displacement field.

    Parameters
    ----------
    volume : (X', Y', Z') ndarray
        Raw (distorted) image.
    raw_affine : (4, 4) ndarray
        Its voxel -> RAS mm affine.
    disp_ras_mm : (X, Y, Z, 3) ndarray
        Displacement on the output grid, RAS mm (raw sampled at ``p + d``).
    out_affine : (4, 4) ndarray
        Output grid affine.
    jacobian : (X, Y, Z) ndarray, optional
        Factor applied to the sampled values (the Jacobian determinant).
    order : int
        B-spline order, 0-5.
    fill : float
        Value outside the raw field of view.

    Returns
    -------
    (X, Y, Z) float32 ndarray
    """
    if order not in ORDERS:
        raise ValueError(f"interpolation order must be one of {ORDERS}, got {order}")
    # Views (strided) are fine for the kernel: avoid copying a full-grid field.
    disp = np.asarray(disp_ras_mm, dtype=np.float32)
    # Coefficients in the field's memory order keep the kernel's reads local.
    coef = prefilter(volume, order, memory_order="F" if _x_fastest(disp) else "C")
    index_map, ras_to_index = _index_maps(np.asarray(raw_affine, float), np.asarray(out_affine, float))
    if order not in _FAST_ORDERS:
        return _resample_scipy(coef, disp, index_map, ras_to_index, jacobian, fill, order)
    from ._kernels import pull_resample

    # Match the field's memory order: the kernel then streams through both.
    out = np.empty(disp.shape[:3], dtype=np.float32, order="F" if _x_fastest(disp) else "C")
    jac = (np.asarray(jacobian, dtype=np.float32) if jacobian is not None
           else np.ones((1, 1, 1), dtype=np.float32))
    pull_resample(coef, disp, index_map, ras_to_index, jac, jacobian is not None,
                  float(fill), order, out)
    return out


def _cast(values: np.ndarray, dtype: np.dtype) -> np.ndarray:
    """Cast to an input dtype: integers are rounded and clipped to their range."""
    if np.issubdtype(dtype, np.integer):
        info = np.iinfo(dtype)
        return np.clip(np.rint(values), info.min, info.max).astype(dtype)
    return values.astype(dtype)


def correct_image(
    data: np.ndarray,
    raw_affine: np.ndarray,
    warp: WarpField,
    *,
    order: int = 3,
    jacobian: bool = True,
    fill: float = 0.0,
    keep_dtype: bool = False,
    progress: Callable[[int, int], None] | None = None,
) -> np.ndarray:
    """Correct a 3-D or 4-D image: :math:`I_c(p) = I_d(p + d(p))\\,\\det J(p)`.

    Parameters
    ----------
    data : (X', Y', Z'[, T]) ndarray
        Raw image, real or complex; a 4-D series uses one warp for all volumes.
    raw_affine : (4, 4) ndarray
        Voxel -> RAS mm affine of ``data``.
    warp : WarpField
        Warp on the output grid (usually the raw grid itself).
    order : int
        B-spline order, 0-5 (3: cubic).
    jacobian : bool
        Multiply by the Jacobian determinant (intensity preservation).
    fill : float
        Value outside the raw field of view.
    keep_dtype : bool
        Return the input dtype (integers rounded and clipped); else float32
        (complex64 for complex input).
    progress : callable, optional
        Called as ``progress(done, total)`` after each volume.

    Returns
    -------
    (X, Y, Z[, T]) ndarray
    """
    jac = warp.jacobian if jacobian else None
    volumes = data[..., None] if data.ndim == 3 else data
    is_complex = np.iscomplexobj(data)
    out_dtype = np.complex64 if is_complex else np.float32
    # Fortran order (NIfTI's): each volume is contiguous and writes without a transposed copy.
    out = np.empty(warp.shape + (volumes.shape[3],), dtype=out_dtype, order="F")
    for t in range(volumes.shape[3]):
        vol = volumes[..., t]
        parts = (vol.real, vol.imag) if is_complex else (vol,)
        res = [resample_volume(p, raw_affine, warp.disp_ras_mm, warp.affine, jacobian=jac,
                               order=order, fill=fill) for p in parts]
        out[..., t] = res[0] + 1j * res[1] if is_complex else res[0]
        if progress is not None:
            progress(t + 1, volumes.shape[3])
    if data.ndim == 3:
        out = out[..., 0]
    return _cast(out, data.dtype) if keep_dtype else out
