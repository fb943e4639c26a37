"""Compiled inner loops (numba): pull-back resampling through a displacement field.

Why numba: the fused loop (field -> raw voxel index -> B-spline sample ->
Jacobian factor) runs in parallel on all cores and never materialises the
(3, X, Y, Z) coordinate array that :func:`scipy.ndimage.map_coordinates`
needs; ``benchmarks/bench_correct.py`` measures what that buys against
SimpleITK and scipy. The tests check these kernels against scipy.ndimage.

The chain kernels (:func:`fold_chain`, :func:`fold_chain_and_sample`) take
a target point through affines, displacement fields and factor maps
(:mod:`nl_unwarp.compose`); the second samples the raw image at the end in
the same pass, so resampling once needs no stored composed field
(``benchmarks/bench_compose.py``; checked against ITK in the tests).
"""

from __future__ import annotations

import numba
import numpy as np
from numba.core import cgutils, types
from numba.extending import intrinsic

__all__ = ["STEP_AFFINE", "STEP_FACTOR", "STEP_FACTOR_NODES", "STEP_FIELD", "STEP_FIELD_FACTOR",
           "STEP_FIELD_NODES", "field_affine_field_sample", "fold_chain", "fold_chain_and_sample",
           "pull_resample"]

#: Floating-point freedoms of the resampling kernels: fused multiply-add and
#: reciprocals (the B-spline weights' ``/ 6``). Not ``reassoc`` (nor the full
#: fastmath set): with reassociation a kernel compiled in this process and the
#: same kernel loaded from numba's cache by another summed the cubic taps in a
#: different order, so pipeline nodes run in fresh processes (batch jobs) wrote
#: other rounding than the worker that compiled them
#: (``tests/test_reproducibility.py::test_cached_kernels_equal_fresh_ones``).
#: Not ``nnan``/``ninf`` either: a NaN point must keep failing the inside tests,
#: or its index would read out of bounds. Results move at rounding level only
#: (the tests compare with scipy.ndimage); cubic resampling is about 7 % faster
#: than with no freedom, the full set about 20 % (1 mm grid, 2 cores).
FAST_MATH = {"contract", "arcp"}


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


@numba.njit(parallel=True, cache=True, fastmath=FAST_MATH)
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
    Output rows ``i`` are shared out among the threads: the last pass of a
    warp (A = B = 1, the whole grid in C) runs on all cores too.
    """
    na, nb, n, nc = out.shape
    for i in numba.prange(n):
        base, phase = i // step, i % step
        w0 = weights[phase, 0]
        w1 = weights[phase, 1]
        w2 = weights[phase, 2]
        w3 = weights[phase, 3]
        for a in range(na):
            for b in range(nb):
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


# Chains of pull maps (nl_unwarp.compose). A chain is a small program of steps
# (kinds below), followed per target voxel. Fields and factor maps are float32
# buffers with voxels x fastest, evenly spaced (a field's components as whole
# volumes, or a voxel's channels side by side as in our warps), passed by
# address with their steps: either layout is used without a copy, and fetching
# a buffer inside the loop costs no reference counting (tuples of arrays do,
# and two threads then contend for the counts).
# The caller keeps the buffers alive for the call (nl_unwarp.compose does).

#: Step kinds of a chain program (row ``(kind, a, b, o0, o1, o2)``):
#: an affine ``affines[a]``; a field (buffer ``a``) interpolated at the point;
#: a factor map (buffer ``a``) interpolated at the point; a field (``a``) and a
#: factor map (``b``) on the same lattice (map index = field index + o),
#: sharing the interpolation weights; a field, or a factor map, whose nodes
#: are the target grid's (index = target index + o): read there, no weights.
STEP_AFFINE, STEP_FIELD, STEP_FACTOR, STEP_FIELD_FACTOR, STEP_FIELD_NODES, STEP_FACTOR_NODES = range(6)
#: Target voxels are visited in tiles of TILE_X voxels along x by TILE x TILE
#: lines (one tile per parallel task): neighbouring lines in y and z are then
#: visited close in time, and the parts of the fields and of the raw image they
#: read are still in cache when reused. Short segments along x keep a tile's
#: footprint small where a rotated chain drifts across rows along a line.
TILE = 16
TILE_X = 32


@numba.njit(inline="always", cache=True)
def _tile_segment(tile, row, tiles_i, tiles_j):
    """``(i0, j, k)`` of segment ``row`` of tile ``tile``: its first voxel along x and its line
    (``tiles_i`` tiles along x, ``tiles_j`` across y)."""
    rest = tile // tiles_i
    j, k = (rest % tiles_j) * TILE + row % TILE, (rest // tiles_j) * TILE + row // TILE
    return (tile % tiles_i) * TILE_X, j, k


@numba.njit(inline="always", cache=True)
def _tile_counts(nx, ny, nz):
    """Tiles along x, across y and across z."""
    return (nx + TILE_X - 1) // TILE_X, (ny + TILE - 1) // TILE, (nz + TILE - 1) // TILE


@intrinsic
def _as_pointer(typingctx, address):
    """An integer address as a void pointer (for :func:`numba.carray`)."""
    if not isinstance(address, types.Integer):
        return None

    def codegen(context, builder, signature, args):
        return builder.inttoptr(args[0], cgutils.voidptr_t)

    return types.voidptr(address), codegen


@numba.njit(inline="always", cache=True)
def _buffer(addresses, sizes, n):
    """Buffer ``n`` as a float32 array (no owner: the caller keeps it alive)."""
    return numba.carray(_as_pointer(addresses[n]), (sizes[n],), np.float32)


@numba.njit(inline="always", cache=True)
def _point(m, x, y, z):
    """``m[:, :3] @ (x, y, z) + m[:, 3]`` for a (3, 4) matrix."""
    return (m[0, 0] * x + m[0, 1] * y + m[0, 2] * z + m[0, 3],
            m[1, 0] * x + m[1, 1] * y + m[1, 2] * z + m[1, 3],
            m[2, 0] * x + m[2, 1] * y + m[2, 2] * z + m[2, 3])


@numba.njit(inline="always", cache=True)
def _point_n(m, n, x, y, z):
    """:func:`_point` with matrix ``m[n]`` (indexed in place: a view would be reference-counted)."""
    return (m[n, 0, 0] * x + m[n, 0, 1] * y + m[n, 0, 2] * z + m[n, 0, 3],
            m[n, 1, 0] * x + m[n, 1, 1] * y + m[n, 1, 2] * z + m[n, 1, 3],
            m[n, 2, 0] * x + m[n, 2, 1] * y + m[n, 2, 2] * z + m[n, 2, 3])


@numba.njit(inline="always", cache=True)
def _clamp(i, n):
    return 0 if i < 0 else (n - 1 if i > n - 1 else i)


@numba.njit(inline="always", cache=True)
def _floor(g):
    """Floor and fraction of a continuous index ``g >= -1``."""
    b = int(g + 1.0) - 1
    return b, g - b


@numba.njit(inline="always", cache=True)
def _blend(v, o, di, dj, dk, ti, tj, tk):
    """Trilinear blend of a flat buffer over the corners ``o + {0, di} + {0, dj} + {0, dk}``."""
    a00 = v[o] + ti * (v[o + di] - v[o])
    a10 = v[o + dj] + ti * (v[o + dj + di] - v[o + dj])
    a01 = v[o + dk] + ti * (v[o + dk + di] - v[o + dk])
    a11 = v[o + dk + dj] + ti * (v[o + dk + dj + di] - v[o + dk + dj])
    b0 = a00 + tj * (a10 - a00)
    b1 = a01 + tj * (a11 - a01)
    return b0 + tk * (b1 - b0)


@numba.njit(inline="always", cache=True)
def _cell(nx, ny, nz, bi, bj, bk):
    """Flat offset of the first corner of the cell at integer index ``(bi, bj, bk)`` and the
    steps to the others: zero where a corner is clamped to the grid's edge, as :func:`_clamp`
    does."""
    plane = nx * ny
    if 0 <= bi < nx - 1 and 0 <= bj < ny - 1 and 0 <= bk < nz - 1:
        return bi + nx * bj + plane * bk, 1, nx, plane
    i0, j0, k0 = _clamp(bi, nx), _clamp(bj, ny), _clamp(bk, nz)
    di, dj, dk = _clamp(bi + 1, nx) - i0, (_clamp(bj + 1, ny) - j0) * nx, (_clamp(bk + 1, nz) - k0) * plane
    return i0 + nx * j0 + plane * k0, di, dj, dk


@numba.njit(inline="always", cache=True)
def _factor_at(v, nx, ny, nz, gi, gj, gk, step, first):
    """A factor map trilinear at a continuous index, held at its edge values beyond the grid.

    The map is ``v[step * node + first]`` (``step = 1, first = 0`` for a map of its own; ``4, 3``
    for the Jacobian channel of a voxel-interleaved warp)."""
    if gi != gi or gj != gj or gk != gk:  # NaN point: no factor
        return 1.0
    bi, ti = _floor(min(max(gi, -1.0), float(nx)))
    bj, tj = _floor(min(max(gj, -1.0), float(ny)))
    bk, tk = _floor(min(max(gk, -1.0), float(nz)))
    o, di, dj, dk = _cell(nx, ny, nz, bi, bj, bk)
    return _blend(v, step * o + first, step * di, step * dj, step * dk, ti, tj, tk)


def _lerp_ir(builder, p, q, t, vd):
    """IR of ``p + t (q - p)`` on vectors; ``p``, ``q`` float32 are subtracted in float32 and
    widened, as numba's scalar code does with float32 array items, so the lanes round as
    :func:`_blend` does."""
    if p.type.element != vd.element:
        d = builder.fpext(builder.fsub(q, p), vd)
        p = builder.fpext(p, vd)
    else:
        d = builder.fsub(q, p)
    return builder.fadd(p, builder.fmul(t, d, flags=("contract",)), flags=("contract",))


def _blend_ir(context, builder, corners, fractions):
    """IR of four :func:`_blend` at once: ``corners`` the eight <4 x float> corner vectors in
    the order (000, 100, 010, 110, 001, 101, 011, 111), ``fractions`` (ti, tj, tk) float64.
    Returns a UniTuple of four float64."""
    from llvmlite import ir

    i32 = ir.IntType(32)
    vd = ir.VectorType(ir.DoubleType(), 4)

    def splat(x):
        v = builder.insert_element(ir.Constant(vd, ir.Undefined), x, ir.Constant(i32, 0))
        return builder.shuffle_vector(v, v, ir.Constant(ir.VectorType(i32, 4), [0, 0, 0, 0]))

    ti, tj, tk = (splat(t) for t in fractions)
    c000, c100, c010, c110, c001, c101, c011, c111 = corners
    a00, a10 = _lerp_ir(builder, c000, c100, ti, vd), _lerp_ir(builder, c010, c110, ti, vd)
    a01, a11 = _lerp_ir(builder, c001, c101, ti, vd), _lerp_ir(builder, c011, c111, ti, vd)
    b0, b1 = _lerp_ir(builder, a00, a10, tj, vd), _lerp_ir(builder, a01, a11, tj, vd)
    r = _lerp_ir(builder, b0, b1, tk, vd)
    lanes = [builder.extract_element(r, ir.Constant(i32, c)) for c in range(4)]
    return context.make_tuple(builder, types.UniTuple(types.float64, 4), lanes)


def _corner_offsets(builder, o, di, dj, dk):
    """IR of the eight corner offsets of a cell, in :func:`_blend_ir`'s order (x fastest)."""
    offsets = []
    for dz in (False, True):
        for dy in (False, True):
            for dx in (False, True):
                off = o
                for on, step in ((dz, dk), (dy, dj), (dx, di)):
                    off = builder.add(off, step) if on else off
                offsets.append(off)
    return offsets


def _cast_args(context, builder, types_in, args, kind):
    """IR values ``args`` (of numba types ``types_in``) cast to the numba type ``kind``."""
    return [context.cast(builder, v, t, kind) for v, t in zip(args, types_in, strict=True)]


@intrinsic
def _blend_nodes4(typingctx, v, o, di, dj, dk, ti, tj, tk):
    """Four channels of a voxel-interleaved float32 buffer blended at once: the same numbers
    as ``_blend(v, o + c, di, dj, dk, ti, tj, tk)`` for ``c = 0..3`` (offsets in floats),
    with one 16-byte load per corner and the arithmetic on vectors."""
    sig = types.UniTuple(types.float64, 4)(v, o, di, dj, dk, ti, tj, tk)

    def codegen(context, builder, signature, args):
        from llvmlite import ir

        base = context.make_array(signature.args[0])(context, builder, args[0]).data
        o, di, dj, dk = _cast_args(context, builder, signature.args[1:5], args[1:5], types.int64)
        fractions = _cast_args(context, builder, signature.args[5:], args[5:], types.float64)
        vf = ir.VectorType(ir.FloatType(), 4)
        corners = [builder.load(builder.bitcast(builder.gep(base, [off]), vf.as_pointer()), align=4)
                   for off in _corner_offsets(builder, o, di, dj, dk)]
        return _blend_ir(context, builder, corners, fractions)

    return sig, codegen


@intrinsic
def _blend_planes4(typingctx, v, jv, o, di, dj, dk, vol, jo, jdi, jdj, jdk, ti, tj, tk):
    """Three planar channels of ``v`` (``vol`` floats apart) and one of ``jv`` blended at once:
    the same numbers as ``_blend(v, o + c vol, di, dj, dk, ...)`` for ``c = 0..2`` and
    ``_blend(jv, jo, jdi, jdj, jdk, ...)``, with the arithmetic on vectors."""
    sig = types.UniTuple(types.float64, 4)(v, jv, o, di, dj, dk, vol, jo, jdi, jdj, jdk, ti, tj, tk)

    def codegen(context, builder, signature, args):
        from llvmlite import ir

        base = context.make_array(signature.args[0])(context, builder, args[0]).data
        jbase = context.make_array(signature.args[1])(context, builder, args[1]).data
        o, di, dj, dk, vol, jo, jdi, jdj, jdk = _cast_args(context, builder, signature.args[2:11],
                                                          args[2:11], types.int64)
        fractions = _cast_args(context, builder, signature.args[11:], args[11:], types.float64)
        vf = ir.VectorType(ir.FloatType(), 4)
        i32 = ir.IntType(32)
        corners = []
        g_offsets = _corner_offsets(builder, o, di, dj, dk)
        j_offsets = _corner_offsets(builder, jo, jdi, jdj, jdk)
        for off, joff in zip(g_offsets, j_offsets, strict=True):
            vec = ir.Constant(vf, ir.Undefined)
            for c in range(3):
                item = builder.load(builder.gep(base, [off]))
                vec = builder.insert_element(vec, item, ir.Constant(i32, c))
                off = builder.add(off, vol)
            item = builder.load(builder.gep(jbase, [joff]))
            corners.append(builder.insert_element(vec, item, ir.Constant(i32, 3)))
        return _blend_ir(context, builder, corners, fractions)

    return sig, codegen


@numba.njit(inline="always", cache=True)
def _follow(i, j, k, x, y, z, program, affines, addresses, sizes, dims, maps):
    """Take target voxel (i, j, k), at world point (x, y, z), through the chain.

    Returns the end point, the product of the factor maps met on the way, and
    whether a field was met outside its grid. Field displacements are
    trilinear between grid points (ITK's ``VectorLinearInterpolateImageFunction``);
    a point is inside a field when its continuous index lies within
    [-0.5, n - 0.5] on every axis (ITK's rule), else the field is identity
    there and the voxel is flagged. Factor maps are trilinear too, held at
    their edge values beyond their grid.
    """
    f = 1.0
    miss = False
    for s in range(program.shape[0]):
        kind, a = program[s, 0], program[s, 1]
        if kind == STEP_AFFINE:
            x, y, z = _point_n(affines, a, x, y, z)
            continue
        nx, ny, nz = dims[a, 0], dims[a, 1], dims[a, 2]
        ns, cs = dims[a, 3], dims[a, 4]  # floats between voxels, between channels
        plane = nx * ny
        v = _buffer(addresses, sizes, a)
        if kind == STEP_FIELD_NODES or kind == STEP_FACTOR_NODES:
            ii, jj, kk = i + program[s, 3], j + program[s, 4], k + program[s, 5]
            if kind == STEP_FACTOR_NODES:
                f *= v[ns * (_clamp(ii, nx) + nx * _clamp(jj, ny) + plane * _clamp(kk, nz))]
            elif 0 <= ii < nx and 0 <= jj < ny and 0 <= kk < nz:
                o = ns * (ii + nx * jj + plane * kk)
                x += v[o]
                y += v[o + cs]
                z += v[o + 2 * cs]
            else:
                miss = True
            continue
        gi, gj, gk = _point_n(maps, a, x, y, z)
        if kind == STEP_FACTOR:
            f *= _factor_at(v, nx, ny, nz, gi, gj, gk, ns, 0)
            continue
        inside = -0.5 <= gi <= nx - 0.5 and -0.5 <= gj <= ny - 0.5 and -0.5 <= gk <= nz - 0.5
        if not inside:
            if kind == STEP_FIELD_FACTOR:
                b = program[s, 2]
                f *= _factor_at(_buffer(addresses, sizes, b), dims[b, 0], dims[b, 1], dims[b, 2],
                                gi + program[s, 3], gj + program[s, 4], gk + program[s, 5], dims[b, 3], 0)
            miss = True
            continue
        bi, ti = _floor(gi)
        bj, tj = _floor(gj)
        bk, tk = _floor(gk)
        o, di, dj, dk = _cell(nx, ny, nz, bi, bj, bk)
        o, di, dj, dk = ns * o, ns * di, ns * dj, ns * dk
        dx = _blend(v, o, di, dj, dk, ti, tj, tk)
        dy = _blend(v, o + cs, di, dj, dk, ti, tj, tk)
        dz = _blend(v, o + 2 * cs, di, dj, dk, ti, tj, tk)
        if kind == STEP_FIELD_FACTOR:
            b = program[s, 2]
            o, di, dj, dk = _cell(dims[b, 0], dims[b, 1], dims[b, 2], bi + program[s, 3], bj + program[s, 4],
                                  bk + program[s, 5])
            nb = dims[b, 3]
            f *= _blend(_buffer(addresses, sizes, b), nb * o, nb * di, nb * dj, nb * dk, ti, tj, tk)
        x += dx
        y += dy
        z += dz
    return x, y, z, f, miss


@numba.njit(inline="always", cache=True)
def _fold_voxel(i, j, k, target_map, raw_map, raw_dims, use_raw, program, affines, addresses, sizes, dims,
                maps, disp, factor, missed):
    """One target voxel of :func:`fold_chain`."""
    px, py, pz = _point(target_map, i, j, k)
    x, y, z, f, miss = _follow(i, j, k, px, py, pz, program, affines, addresses, sizes, dims, maps)
    disp[i, j, k, 0] = x - px
    disp[i, j, k, 1] = y - py
    disp[i, j, k, 2] = z - pz
    factor[i, j, k] = f
    if miss and use_raw:
        ri, rj, rk = _point(raw_map, x, y, z)
        miss = _inside(ri, raw_dims[0]) and _inside(rj, raw_dims[1]) and _inside(rk, raw_dims[2])
    missed[i, j, k] = miss


@numba.njit(inline="always", cache=True)
def _end_voxel(i, j, k, target_map, raw_map, program, affines, addresses, sizes, dims, maps, ends, e):
    """Pass 1 of a segment of :func:`fold_chain_and_sample`: the end point of voxel ``i`` as a
    raw voxel index, its factor and its miss flag, into row ``e`` of ``ends``."""
    px, py, pz = _point(target_map, i, j, k)
    x, y, z, f, miss = _follow(i, j, k, px, py, pz, program, affines, addresses, sizes, dims, maps)
    ends[e, 0], ends[e, 1], ends[e, 2] = _point(raw_map, x, y, z)
    ends[e, 3] = f
    ends[e, 4] = 1.0 if miss else 0.0


@numba.njit(inline="always", cache=True)
def _sample_line(coef, order, fill, ends, i0, i1, j, k, out, missed, wx, wy, wz):
    """Pass 2 of a segment (voxels ``i0 .. i1 - 1`` of line ``j, k``): sample the raw image at
    the end points in ``ends`` (see :func:`_end_voxel`), times the factor, or ``fill`` outside
    the raw field of view.

    A segment is followed first and sampled after (two passes over a small
    buffer) so that the reads of each pass are independent from voxel to voxel
    and the processor overlaps them; in one pass each sample's reads wait for
    the chain's (about 7 % faster, ``benchmarks/bench_compose.py``).
    """
    rx, ry, rz = coef.shape
    for i in range(i0, i1):
        e = i - i0
        ri, rj, rk = ends[e, 0], ends[e, 1], ends[e, 2]
        if _inside(ri, rx) and _inside(rj, ry) and _inside(rk, rz):
            out[i, j, k] = _sample(coef, ri, rj, rk, order, wx, wy, wz) * ends[e, 3]
            missed[i, j, k] = ends[e, 4] != 0.0
        else:
            out[i, j, k] = fill
            missed[i, j, k] = False


@numba.njit(parallel=True, cache=True, fastmath=FAST_MATH)
def fold_chain(target_map, raw_map, raw_dims, use_raw, program, affines, addresses, sizes, dims, maps,
               disp, factor, missed):
    """Fold a chain into a displacement field on a target grid, x fastest.

    Parameters
    ----------
    target_map : (3, 4) float64 ndarray
        Target voxel index -> world RAS mm.
    raw_map : (3, 4) float64 ndarray
        World RAS mm -> raw voxel index (used if ``use_raw``).
    raw_dims : (3,) int64 ndarray
    use_raw : bool
        Flag a miss only where the end point lies inside the raw field of view.
    program : (S, 6) int64 ndarray
        One row per step (see the step kinds above).
    affines : (A, 3, 4) float64 ndarray
        Pull matrices, RAS mm.
    addresses, sizes : (B,) int64 ndarray
        Address and length (float32 items) of each buffer: field displacements
        (RAS mm) and factor maps, voxels x fastest.
    dims : (B, 5) int64 ndarray
        Grid shape of each buffer, then its step (float32 items) from a voxel to
        the next and from a channel to the next: ``1`` and ``X Y Z`` for
        Fortran order, ``4`` and ``1`` for a voxel-interleaved warp.
    maps : (B, 3, 4) float64 ndarray
        World RAS mm -> buffer voxel index.
    disp : (X, Y, Z, 3) float32 ndarray
        End point minus target point, RAS mm (written).
    factor : (X, Y, Z) float32 ndarray
        Product of the factor maps (written).
    missed : (X, Y, Z) bool ndarray
        Target points that met a field outside its grid (written).
    """
    nx, ny, nz = missed.shape
    nti, ntj, ntk = _tile_counts(nx, ny, nz)
    for tile in numba.prange(nti * ntj * ntk):
        for row in range(TILE * TILE):
            i0, j, k = _tile_segment(tile, row, nti, ntj)
            if j >= ny or k >= nz:
                continue
            for i in range(i0, min(i0 + TILE_X, nx)):
                _fold_voxel(i, j, k, target_map, raw_map, raw_dims, use_raw, program, affines, addresses,
                            sizes, dims, maps, disp, factor, missed)


@numba.njit(parallel=True, cache=True, fastmath=FAST_MATH)
def fold_chain_and_sample(coef, order, fill, target_map, raw_map, program, affines, addresses, sizes,
                          dims, maps, out, missed):
    """Follow the chain from every target voxel and sample the raw image there, in one pass.

    The same chain arguments as :func:`fold_chain`; ``coef`` and ``order``
    as in :func:`pull_resample` (raw voxel index from ``raw_map`` applied to
    the end point). ``out`` gets the sample times the factor, or ``fill``
    outside the raw field of view; ``missed`` flags target points that met a
    field outside its grid and land inside the raw field of view. No
    composed field is stored.
    """
    nx, ny, nz = out.shape
    nti, ntj, ntk = _tile_counts(nx, ny, nz)
    for tile in numba.prange(nti * ntj * ntk):
        wx, wy, wz = np.empty(4), np.empty(4), np.empty(4)
        ends = np.empty((TILE_X, 5))
        for row in range(TILE * TILE):
            i0, j, k = _tile_segment(tile, row, nti, ntj)
            if j >= ny or k >= nz:
                continue
            i1 = min(i0 + TILE_X, nx)
            for i in range(i0, i1):
                _end_voxel(i, j, k, target_map, raw_map, program, affines, addresses, sizes, dims, maps, ends,
                           i - i0)
            _sample_line(coef, order, fill, ends, i0, i1, j, k, out, missed, wx, wy, wz)


@numba.njit(parallel=True, cache=True, fastmath=FAST_MATH)
def field_affine_field_sample(coef, order, fill, target_map, first, first_dims, first_offset, use_first,
                              matrix, last, last_dims, last_map, use_last, packed, jac, jac_dims, jac_step,
                              jac_offset, jac_lattice, jac_map, use_jac, jac_in_last, raw_map, out, missed):
    """:func:`fold_chain_and_sample` for the chain shape ``[W, A, G (x J)]``, unrolled.

    ``W`` (optional) is a field on the target lattice, read at its nodes
    (``first[i + o]``, the ``STEP_FIELD_NODES`` rule); ``A`` is one pull
    matrix (the product of the chain's consecutive affines; identity if
    none); ``G`` (optional) a field read trilinearly (ITK's rule, identity and
    a flagged miss outside ``[-0.5, n - 0.5]``), with a factor map ``J``
    sampled where ``G`` is, held at edge values beyond ``J``'s grid: on
    ``G``'s lattice (its own grid, or e.g. the raw grid inside the grown one)
    it shares ``G``'s weights (the ``STEP_FIELD_FACTOR`` rule), elsewhere (the
    raw grid and a coarser field) it is interpolated on its own (the
    ``STEP_FACTOR`` rule). The arithmetic is that of the generic kernel, step
    for step, to the last bit: ``G``'s three channels and ``J`` are blended
    together on four-lane vectors (:func:`_blend_nodes4` when ``G`` is
    voxel-interleaved, one 16-byte read per corner; :func:`_blend_planes4`
    for planar channels), which round as four :func:`_blend` calls do
    (``benchmarks/bench_compose.py``).

    Parameters
    ----------
    first : float32 ndarray
        ``W``'s displacement, RAS mm, flat, voxels x fastest (read if ``use_first``).
    first_dims : (5,) int64 ndarray
        ``W``'s grid shape, then its steps (items) from a voxel to the next and from a
        component to the next (a row of ``dims`` in :func:`fold_chain`).
    first_offset : (3,) int64 ndarray
        ``W``'s voxel index of target voxel (0, 0, 0).
    matrix : (3, 4) float64 ndarray
        ``A``, RAS mm.
    last : (3 X' Y' Z',) or (4 X' Y' Z',) float32 ndarray
        ``G``'s displacement, RAS mm, flat, x fastest: components slowest, or,
        if ``packed``, a node's ``dx, dy, dz`` and a fourth channel side by
        side (read if ``use_last``).
    last_dims : (3,) int64 ndarray
        ``G``'s grid shape.
    last_map : (3, 4) float64 ndarray
        World RAS mm -> ``G``'s voxel index.
    jac : float32 ndarray
        The factor map ``J``, flat, x fastest, ``jac_step`` items from a voxel to
        the next (read if ``use_jac`` and not ``jac_in_last``).
    jac_dims, jac_offset : (3,) int64 ndarray
        ``J``'s grid shape, and its voxel index of ``G``'s voxel (0, 0, 0).
    jac_lattice : bool
        ``J`` is on ``G``'s lattice (``jac_offset`` applies); else ``jac_map`` does.
    jac_map : (3, 4) float64 ndarray
        World RAS mm -> ``J``'s voxel index (used unless ``jac_lattice``).
    jac_in_last : bool
        ``J`` is the fourth channel of a ``packed`` ``G`` (a warp as
        :func:`nl_unwarp.warp.compute_warp` makes it).

    Other parameters as for :func:`fold_chain_and_sample`.
    """
    nx, ny, nz = out.shape
    fx, fy, fz, fn, fc = first_dims[0], first_dims[1], first_dims[2], first_dims[3], first_dims[4]
    gx, gy, gz = last_dims[0], last_dims[1], last_dims[2]
    jx, jy, jz = jac_dims[0], jac_dims[1], jac_dims[2]
    ox, oy, oz = jac_offset[0], jac_offset[1], jac_offset[2]
    # J on G's own grid (a FieldStep's jacobian) reads the same cells.
    same_cells = jac_lattice and jx == gx and jy == gy and jz == gz and ox == 0 and oy == 0 and oz == 0
    j_shares = use_jac and jac_lattice and not jac_in_last  # J's own buffer, G's weights
    vol = gx * gy * gz
    nti, ntj, ntk = _tile_counts(nx, ny, nz)
    for tile in numba.prange(nti * ntj * ntk):
        wx, wy, wz = np.empty(4), np.empty(4), np.empty(4)
        ends = np.empty((TILE_X, 5))
        for row in range(TILE * TILE):
            i0, j, k = _tile_segment(tile, row, nti, ntj)
            if j >= ny or k >= nz:
                continue
            i1 = min(i0 + TILE_X, nx)
            for i in range(i0, i1):
                x, y, z = _point(target_map, i, j, k)
                miss = False
                if use_first:
                    ii, jj, kk = i + first_offset[0], j + first_offset[1], k + first_offset[2]
                    if 0 <= ii < fx and 0 <= jj < fy and 0 <= kk < fz:
                        o = fn * (ii + fx * jj + fx * fy * kk)
                        x += first[o]
                        y += first[o + fc]
                        z += first[o + 2 * fc]
                    else:
                        miss = True
                x, y, z = _point(matrix, x, y, z)
                f = 1.0
                if use_jac and not jac_lattice:  # J on its own grid, sampled where G is
                    ji, jj, jk = _point(jac_map, x, y, z)
                    f = _factor_at(jac, jx, jy, jz, ji, jj, jk, jac_step, 0)
                if use_last:
                    gi, gj, gk = _point(last_map, x, y, z)
                    if -0.5 <= gi <= gx - 0.5 and -0.5 <= gj <= gy - 0.5 and -0.5 <= gk <= gz - 0.5:
                        bi, ti = _floor(gi)
                        bj, tj_ = _floor(gj)
                        bk, tk_ = _floor(gk)
                        o, di, dj, dk = _cell(gx, gy, gz, bi, bj, bk)
                        # J's cell: G's, another on G's lattice, or none (its lane reads jac[0]).
                        jo, jdi, jdj, jdk = 0, 0, 0, 0
                        if j_shares:
                            jo, jdi, jdj, jdk = o, di, dj, dk
                            if not same_cells:
                                jo, jdi, jdj, jdk = _cell(jx, jy, jz, bi + ox, bj + oy, bk + oz)
                            jo, jdi, jdj, jdk = jac_step * jo, jac_step * jdi, jac_step * jdj, jac_step * jdk
                        if packed:
                            dx, dy, dz, fg = _blend_nodes4(last, 4 * o, 4 * di, 4 * dj, 4 * dk, ti, tj_, tk_)
                            if j_shares:
                                fg = _blend(jac, jo, jdi, jdj, jdk, ti, tj_, tk_)
                        else:
                            dx, dy, dz, fg = _blend_planes4(last, jac, o, di, dj, dk, vol, jo, jdi, jdj, jdk,
                                                            ti, tj_, tk_)
                        if use_jac and jac_lattice:
                            f = fg
                        x += dx
                        y += dy
                        z += dz
                    else:
                        if jac_in_last:
                            f = _factor_at(last, gx, gy, gz, gi, gj, gk, 4, 3)
                        elif j_shares:
                            f = _factor_at(jac, jx, jy, jz, gi + ox, gj + oy, gk + oz, jac_step, 0)
                        miss = True
                e = i - i0
                ends[e, 0], ends[e, 1], ends[e, 2] = _point(raw_map, x, y, z)
                ends[e, 3] = f
                ends[e, 4] = 1.0 if miss else 0.0
            _sample_line(coef, order, fill, ends, i0, i1, j, k, out, missed, wx, wy, wz)
