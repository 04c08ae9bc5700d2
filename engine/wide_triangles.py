"""A leaf's triangle tests four at a time, as one vector computation.

`triangles4` runs the watertight test of intersect.py (`sheared_triangle`, the readable
reference) on four consecutive triangle rows of a leaf at once: it gathers each corner
coordinate of the four triangles into one 4-lane float64 vector (the rows are (3, 3) float32
corners, read through the ray's axis permutation kx, ky, kz) and computes the shear, the three
edge functions U, V, W, det = U + V + W and T with the same operations in the same order as the
scalar test, so each lane's values are the same bits. A lane is a candidate when the scalar test
would report a hit with the interval (tmin, tmax) it was given:

  not (some edge function < 0 and some > 0),  det != 0,
  det > 0: not (T <= tmin det or T >= tmax det);  else: not (T >= tmin det or T <= tmax det)

(written as the scalar test's rejections, so a NaN passes exactly where it passes there).

The closest hit must be the one the scalar loop over the rows in order finds, with its
interval shrinking at every hit. `closest_in_leaf` keeps that: a group of four is tested against
the interval at its start, and its candidates are then taken in row order, each checked again
against the shrunk interval with the scalar `_t_inside` (a lane that fails against the larger
interval fails against a smaller one: for det > 0, tmax' <= tmax gives tmax' det <= tmax det,
rounding being monotonic). Hit distances and barycentrics are then T / det, V / det, W / det
computed as the scalar test does (T * (1 / det)). tests/engine/test_wide_triangles.py compares
lane by lane and leaf by leaf.

numba leaves LLVM's SLP vectoriser off, so the four tests are written as LLVM vector
instructions directly (a numba `intrinsic`), as wide_slabs.py does for the node's boxes. The
loads are unchecked: rows k .. k + n - 1 must be rows of `tris`, a C-contiguous (f, 3, 3) float32
array (the typing refuses any other), and kx, ky, kz each 0, 1 or 2; lanes j >= n read row k
and are never candidates.
"""

from __future__ import annotations

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.extending import intrinsic

LANES = 4
TRI_FLOATS = 9  # a row's (3, 3) float32 corners
CORNER_FLOATS = 3


@intrinsic
def triangles4(typingctx, tris, k, n, kx, ky, kz, okx, oky, okz, sx, sy, sz, tmin, tmax):
    """(mask, T0..T3, det0..det3, V0..V3, W0..W3) for rows k .. k + n - 1 of `tris` (n <= 4):
    bit j of mask is set when row k + j is a candidate hit in (tmin, tmax); (okx, oky, okz): the
    ray origin in the permuted axes; (sx, sy, sz): the shear, as `intersect.ray_setup` gives."""
    if not (isinstance(tris, types.Array) and tris.dtype == types.float32 and tris.ndim == 3
            and tris.layout == "C"):
        return None
    for x in (k, n, kx, ky, kz):
        if not isinstance(x, types.Integer):
            return None
    f8 = types.float64
    sig = types.Tuple((types.int64,) + (f8,) * (4 * LANES))(tris, k, n, kx, ky, kz, okx, oky, okz, sx, sy,
                                                             sz, tmin, tmax)

    def codegen(context, builder, signature, args):
        i32, i64, f64 = ir.IntType(32), ir.IntType(64), ir.DoubleType()
        vec = ir.VectorType(f64, LANES)
        undef = ir.Constant(vec, ir.Undefined)
        k_v, n_v, kx_v, ky_v, kz_v = (context.cast(builder, v, t, types.int64)
                                      for v, t in zip(args[1:6], signature.args[1:6]))
        okx_v, oky_v, okz_v, sx_v, sy_v, sz_v, tmin_v, tmax_v = (
            context.cast(builder, v, t, f8) for v, t in zip(args[6:], signature.args[6:]))
        data = context.make_array(signature.args[0])(context, builder, args[0]).data

        def splat(x):
            one = builder.insert_element(undef, x, ir.Constant(i32, 0))
            return builder.shuffle_vector(one, undef, ir.Constant(ir.VectorType(i32, LANES), [0] * LANES))

        # lane j reads row k + j, or row k beyond the leaf's n rows (masked out below)
        starts = []
        for j in range(LANES):
            inside = builder.icmp_signed("<", ir.Constant(i64, j), n_v)
            row = builder.select(inside, builder.add(k_v, ir.Constant(i64, j)), k_v)
            starts.append(builder.mul(row, ir.Constant(i64, TRI_FLOATS)))

        def corner(c, axis, origin):
            """The four rows' corner c along one permuted axis, minus the origin's: float64."""
            v = ir.Constant(ir.VectorType(ir.FloatType(), LANES), ir.Undefined)
            for j in range(LANES):  # four float32 loads into one vector, widened at once (exact)
                at = builder.add(starts[j], builder.add(ir.Constant(i64, CORNER_FLOATS * c), axis))
                v = builder.insert_element(v, builder.load(builder.gep(data, [at]), align=4), ir.Constant(i32, j))
            return builder.fsub(builder.fpext(v, vec), origin)

        o = (splat(okx_v), splat(oky_v), splat(okz_v))
        (ax, ay, az), (bx, by, bz), (cx, cy, cz) = (
            [corner(c, axis, o[i]) for i, axis in enumerate((kx_v, ky_v, kz_v))] for c in range(3))
        sub, mul, add = builder.fsub, builder.fmul, builder.fadd
        sxv, syv, szv = splat(sx_v), splat(sy_v), splat(sz_v)
        # as sheared_triangle: shear, then the 2D edge functions
        axs, ays = sub(ax, mul(sxv, az)), sub(ay, mul(syv, az))
        bxs, bys = sub(bx, mul(sxv, bz)), sub(by, mul(syv, bz))
        cxs, cys = sub(cx, mul(sxv, cz)), sub(cy, mul(syv, cz))
        U = sub(mul(cxs, bys), mul(cys, bxs))
        V = sub(mul(axs, cys), mul(ays, cxs))
        W = sub(mul(bxs, ays), mul(bys, axs))
        zero = ir.Constant(vec, [0.0] * LANES)

        def cmp(op, a, b, ordered=True):
            return (builder.fcmp_ordered if ordered else builder.fcmp_unordered)(op, a, b)

        some_neg = builder.or_(builder.or_(cmp("<", U, zero), cmp("<", V, zero)), cmp("<", W, zero))
        some_pos = builder.or_(builder.or_(cmp(">", U, zero), cmp(">", V, zero)), cmp(">", W, zero))
        det = add(add(U, V), W)
        T = add(add(mul(U, mul(szv, az)), mul(V, mul(szv, bz))), mul(W, mul(szv, cz)))
        lo, hi = mul(splat(tmin_v), det), mul(splat(tmax_v), det)
        # the scalar test's rejections negated: not (T <= lo or T >= hi) is T > lo and T < hi,
        # either true when unordered (NaN)
        inside_pos = builder.and_(cmp(">", T, lo, False), cmp("<", T, hi, False))
        inside_neg = builder.and_(cmp("<", T, lo, False), cmp(">", T, hi, False))
        inside = builder.select(cmp(">", det, zero), inside_pos, inside_neg)
        rejected = builder.or_(builder.and_(some_neg, some_pos), cmp("==", det, zero))
        hit = builder.and_(builder.not_(rejected), inside)
        mask = builder.zext(builder.bitcast(hit, ir.IntType(LANES)), i64)
        rows = builder.sub(builder.shl(ir.Constant(i64, 1), n_v), ir.Constant(i64, 1))
        out = [builder.and_(mask, rows)]
        for v in (T, det, V, W):
            out += [builder.extract_element(v, ir.Constant(i32, j)) for j in range(LANES)]
        return context.make_tuple(builder, signature.return_type, out)

    return sig, codegen


@njit(cache=True, inline="always")
def _t_inside(T, det, tmin, tmax):
    """The scalar test's interval check of t = T / det, without the division."""
    if det > 0.0:
        return not (T <= tmin * det or T >= tmax * det)
    return not (T >= tmin * det or T <= tmax * det)


@njit(cache=True, inline="always")
def _take(m, j, T, det, V, W, row, tmin, best_t, best_k, best_u, best_v):
    if (m >> j) & 1 != 0 and _t_inside(T, det, tmin, best_t):
        inv = 1.0 / det
        return T * inv, row, V * inv, W * inv
    return best_t, best_k, best_u, best_v


@njit(cache=True, inline="always")
def _rows_left(g, last):
    """The rows of a group starting at g: LANES, or fewer at the leaf's end. (Not the builtin
    min: in the borrowing traversals it was compiled as a call, which spilled every vector
    register around it, once a group; seen in the machine code under perf.)"""
    n = last - g
    return n if n < LANES else np.int64(LANES)


@njit(cache=True, inline="always")
def closest_in_leaf(tris, first, last, kx, ky, kz, okx, oky, okz, sx, sy, sz, tmin, best_t, best_k, best_u, best_v):
    """The closest hit among rows first .. last - 1 of `tris` and (best_t, best_k, best_u,
    best_v) so far: the same as testing the rows one by one with `sheared_triangle` in order."""
    for g in range(first, last, LANES):
        m, T0, T1, T2, T3, d0, d1, d2, d3, V0, V1, V2, V3, W0, W1, W2, W3 = triangles4(
            tris, g, _rows_left(g, last), kx, ky, kz, okx, oky, okz, sx, sy, sz, tmin, best_t)
        if m != 0:
            best_t, best_k, best_u, best_v = _take(m, 0, T0, d0, V0, W0, g, tmin, best_t, best_k, best_u, best_v)
            best_t, best_k, best_u, best_v = _take(m, 1, T1, d1, V1, W1, g + 1, tmin, best_t, best_k, best_u,
                                                   best_v)
            best_t, best_k, best_u, best_v = _take(m, 2, T2, d2, V2, W2, g + 2, tmin, best_t, best_k, best_u,
                                                   best_v)
            best_t, best_k, best_u, best_v = _take(m, 3, T3, d3, V3, W3, g + 3, tmin, best_t, best_k, best_u,
                                                   best_v)
    return best_t, best_k, best_u, best_v


@njit(cache=True, inline="always")
def any_in_leaf(tris, first, last, kx, ky, kz, okx, oky, okz, sx, sy, sz, tmin, tmax):
    """True when any of rows first .. last - 1 of `tris` is hit in (tmin, tmax)."""
    for g in range(first, last, LANES):
        m = triangles4(tris, g, _rows_left(g, last), kx, ky, kz, okx, oky, okz, sx, sy, sz, tmin, tmax)[0]
        if m != 0:
            return True
    return False
