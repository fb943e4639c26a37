"""Compiled inner loops (numba): pull-back resampling through a displacement field.

Why numba: the fused loop (field -> raw voxel index -> B-spline sample ->
Jacobian factor) runs in parallel on all cores and never materialises the
(3, X, Y, Z) coordinate array that :func:`scipy.ndimage.map_coordinates`
needs; ``benchmarks/bench_correct.py`` measures what that buys against
SimpleITK and scipy. The tests check these kernels against scipy.ndimage.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["pull_resample"]


@numba.njit(inline="always", cache=True)
def _mirror(i, n):
    """scipy.ndimage 'mirror' boundary: reflect about the edge samples."""
    if n == 1:
        return 0
    period = 2 * (n - 1)
    i = abs(i) % period
    return period - i if i >= n else i


@numba.njit(inline="always", cache=True)
def _cubic_weights(t, w):
    s = 1.0 - t
    w[0] = s * s * s / 6.0
    w[1] = (4.0 - 6.0 * t * t + 3.0 * t * t * t) / 6.0
    w[2] = (1.0 + 3.0 * t + 3.0 * t * t - 3.0 * t * t * t) / 6.0
    w[3] = t * t * t / 6.0


@numba.njit(inline="always", cache=True)
def _inside(x, n):
    """A point is inside if it falls within a voxel's footprint (+-0.5 voxel)."""
    return n == 1 or (-0.5 <= x <= n - 0.5)


@numba.njit(inline="always", cache=True)
def _sample(coef, fx, fy, fz, order, wx, wy, wz):
    nx, ny, nz = coef.shape
    if order == 0:
        ix = _mirror(int(np.floor(fx + 0.5)), nx)
        iy = _mirror(int(np.floor(fy + 0.5)), ny)
        iz = _mirror(int(np.floor(fz + 0.5)), nz)
        return coef[ix, iy, iz]
    if order == 1:
        x0, y0, z0 = np.floor(fx), np.floor(fy), np.floor(fz)
        tx, ty, tz = fx - x0, fy - y0, fz - z0
        acc = 0.0
        for a in range(2):
            ia = _mirror(int(x0) + a, nx)
            wa = tx if a else 1.0 - tx
            for b in range(2):
                ib = _mirror(int(y0) + b, ny)
                wb = ty if b else 1.0 - ty
                for c in range(2):
                    ic = _mirror(int(z0) + c, nz)
                    wc = tz if c else 1.0 - tz
                    acc += wa * wb * wc * coef[ia, ib, ic]
        return acc
    x0, y0, z0 = int(np.floor(fx)), int(np.floor(fy)), int(np.floor(fz))
    _cubic_weights(fx - x0, wx)
    _cubic_weights(fy - y0, wy)
    _cubic_weights(fz - z0, wz)
    acc = 0.0
    if 1 <= x0 < nx - 2 and 1 <= y0 < ny - 2 and 1 <= z0 < nz - 2:
        # Interior: no boundary handling, contiguous taps along the last axis.
        z0m = z0 - 1
        wz0, wz1, wz2, wz3 = wz[0], wz[1], wz[2], wz[3]
        for a in range(4):
            ia = x0 - 1 + a
            inner = 0.0
            for b in range(4):
                ib = y0 - 1 + b
                inner += wy[b] * (wz0 * coef[ia, ib, z0m] + wz1 * coef[ia, ib, z0m + 1]
                                  + wz2 * coef[ia, ib, z0m + 2] + wz3 * coef[ia, ib, z0m + 3])
            acc += wx[a] * inner
        return acc
    for a in range(4):
        ia = _mirror(x0 - 1 + a, nx)
        for b in range(4):
            ib = _mirror(y0 - 1 + b, ny)
            wab = wx[a] * wy[b]
            for c in range(4):
                acc += wab * wz[c] * coef[ia, ib, _mirror(z0 - 1 + c, nz)]
    return acc


@numba.njit(inline="always", cache=True)
def _pull_point(coef, disp, m, r, jac, use_jac, fill, order, out, i, j, k, wx, wy, wz):
    """Resample one output voxel (see :func:`pull_resample`)."""
    rx, ry, rz = coef.shape
    d0 = disp[i, j, k, 0]
    d1 = disp[i, j, k, 1]
    d2 = disp[i, j, k, 2]
    f0 = m[0, 0] * i + m[0, 1] * j + m[0, 2] * k + m[0, 3] + r[0, 0] * d0 + r[0, 1] * d1 + r[0, 2] * d2
    f1 = m[1, 0] * i + m[1, 1] * j + m[1, 2] * k + m[1, 3] + r[1, 0] * d0 + r[1, 1] * d1 + r[1, 2] * d2
    f2 = m[2, 0] * i + m[2, 1] * j + m[2, 2] * k + m[2, 3] + r[2, 0] * d0 + r[2, 1] * d1 + r[2, 2] * d2
    if not (_inside(f0, rx) and _inside(f1, ry) and _inside(f2, rz)):
        out[i, j, k] = fill
        return
    value = _sample(coef, f0, f1, f2, order, wx, wy, wz)
    if use_jac:
        value *= jac[i, j, k]
    out[i, j, k] = value


@numba.njit(parallel=True, cache=True)
def pull_resample(coef, disp, index_map, ras_to_index, jac, use_jac, fill, order, out):
    """Resample ``coef`` at ``index_map @ [i, j, k, 1] + ras_to_index @ disp[i, j, k]``.

    Parameters
    ----------
    coef : (X', Y', Z') float32 ndarray
        Raw image, B-spline prefiltered (mirror boundary) when ``order == 3``.
    disp : (X, Y, Z, 3) float32 ndarray
        Displacement on the output grid, RAS mm.
    index_map : (3, 4) float64 ndarray
        Output voxel index -> raw voxel index (both grids' affines).
    ras_to_index : (3, 3) float64 ndarray
        RAS mm vector -> raw voxel index vector.
    jac : (X, Y, Z) float32 ndarray
        Jacobian determinant on the output grid (ignored unless ``use_jac``).
    fill : float
        Value outside the raw field of view.
    order : {0, 1, 3}
        Nearest, trilinear or cubic B-spline.
    out : (X, Y, Z) float32 ndarray
        Written in place.

    Notes
    -----
    Voxels are visited in the memory order of ``disp`` (the largest stream):
    x fastest for a Fortran-ordered field (NIfTI's order, as
    :func:`nl_unwarp.warp.compute_warp` makes it), z fastest otherwise. Each
    voxel's arithmetic is the same either way.
    """
    nx, ny, nz = out.shape
    if disp.strides[0] < disp.strides[2]:
        for k in numba.prange(nz):
            wx = np.empty(4)
            wy = np.empty(4)
            wz = np.empty(4)
            for j in range(ny):
                for i in range(nx):
                    _pull_point(coef, disp, index_map, ras_to_index, jac, use_jac, fill, order, out,
                                i, j, k, wx, wy, wz)
    else:
        for i in numba.prange(nx):
            wx = np.empty(4)
            wy = np.empty(4)
            wz = np.empty(4)
            for j in range(ny):
                for k in range(nz):
                    _pull_point(coef, disp, index_map, ras_to_index, jac, use_jac, fill, order, out,
                                i, j, k, wx, wy, wz)


@numba.njit(parallel=True, cache=True)
def upsample_last(src, step, weights, out):
    """Four-point upsampling along axis 2 of (A, B, M, C) lattice data into (A, B, n, C).

    ``out[a, b, i, c]`` comes from ``src[a, b, i // step + 0..3, c]`` with
    ``weights[i % step]``, the four Lagrange weights of fraction
    ``(i % step) / step`` (lattice nodes of ``src`` sit at ``(j - 1) * step``).
    """
    na, nb, n, nc = out.shape
    for a in numba.prange(na):
        for b in range(nb):
            for base in range(src.shape[2] - 3):
                for phase in range(step):
                    i = base * step + phase
                    if i >= n:
                        break
                    w0 = weights[phase, 0]
                    w1 = weights[phase, 1]
                    w2 = weights[phase, 2]
                    w3 = weights[phase, 3]
                    for c in range(nc):
                        out[a, b, i, c] = (w0 * src[a, b, base, c] + w1 * src[a, b, base + 1, c]
                                           + w2 * src[a, b, base + 2, c] + w3 * src[a, b, base + 3, c])


@numba.njit(parallel=True, cache=True)
def radius_squared_exceeds(linear, origin, radius_sq, out):
    """``out[i, j, k] = |linear @ (i, j, k) + origin|^2 > radius_sq``."""
    nx, ny, nz = out.shape
    for i in numba.prange(nx):
        for j in range(ny):
            for k in range(nz):
                acc = 0.0
                for c in range(3):
                    v = origin[c] + linear[c, 0] * i + linear[c, 1] * j + linear[c, 2] * k
                    acc += v * v
                out[i, j, k] = acc > radius_sq
