"""The slab tests of a wide BVH node's children as one float32 vector computation.

A node of wide_bvh.py keeps its children's boxes side by side: row r of node nd is `lanes`
float32 values at `box[nd, r, 0:lanes]`. The intrinsic that `slab_test(lanes)` makes loads each
row the ray needs as one vector and tests every child at once in float32, one fused multiply-add
a plane, with the same operations in the same order as the scalar `wide_traversal._slab` (the readable
reference), so each lane's result is the same bits:

  t0 = fma(near, a_near, b_near),  t1 = fma(far, a_far, b_far)   per axis x, y, z,
  tn = t0 where t0 > tn,           tf = t1 where t1 < tf         from (tmin, tmax) in float32,
  entered = tn <= tf                                              (false for NaN).

`ray_planes` gives each axis's a and b once per ray: a ≈ 1/d, b ≈ -o/d. Why float32 and how it
stays conservative: in float64 (the boxes widened, origin subtracted, then multiplied) eight
lanes take two AVX registers and three operations a plane; in float32 they take one register
and one operation. Rounding to float32
must never let a ray miss a box it passes through, so the terms are rounded outwards (bounds
below; Ize, "Robust BVH Ray Traversal", JCGT 2(2), 2013, does the same for float64 by widening
the far distance):

* a_near = RN32(inv · (1 - KAPPA)), a_far = RN32(inv · (1 + KAPPA)) with KAPPA = 2^-21: the
  inverse's rounding (at most 2^-24 relative) and the result's (2^-24) stay inside KAPPA, so
  for a box plane at distance t >= 0 the computed near distance is at most t and the far one
  at least t;
* b = -RN32(o · a ± slack), slack = 2^-22 · |inv| · (|o| + GRAZE): covers rounding the origin
  term to float32 (2^-24 · |o · a|); the fused multiply-add itself rounds once, relative to its
  result, which KAPPA covers. So t0 <= (near - o) / d and t1 >= (far - o) / d for t >= 0.
* a direction component of 0 (or below 2^-64) takes |inv| = 2^64 (INV_LIMIT), keeping every
  product finite for coordinates below 2^64; a ray in an axis plane then sees that slab through
  whether its origin lies in it (within the slack: a ray sliding along a box face enters it),
  not through a NaN as the float64 test did.
* tmin is rounded down and tmax up (by |t| · 2^-23) before they enter float32.

Measured, with the leaf loop's change of the same day (wide_triangles._rows_left), against the
float64 test and the leaf loop before them (one thread, the same rays through both in one
process, 30-40 alternating rounds, median of the per-round ratios; same hits): camera rays
1.05-1.08x, incoherent closest hits 1.03x on 82 k triangles and 0.98x on 1.31 M, shadow rays
1.00x and 0.98x. Little, because a traversal mostly waits on memory (a node's and a leaf's first
loads, sampled with perf), not on this arithmetic; kept for the camera rays and because the test
is now an exact statement about rounding (tests/engine/test_wide_slabs.py checks it against
rational arithmetic).

The entry distances go to memory widened to float64 (`out[at:at + lanes]`), where the
traversal reads the few lanes that entered by index; being lower bounds, a child popped later
is dropped only when its box truly begins beyond the closest hit. Valid for tmin >= 0 (every
traversal here). The loads and the store are unchecked: `nd` must be a node of `box` (the
traversals take it only from the root or from a node's own child entries, which collapse_bvh
writes), `box` a C-contiguous (W, 8, lanes) float32 array and `out` a C-contiguous float64 array
with room at `at` — the typing refuses other kinds.

numba leaves LLVM's SLP vectoriser off (numba.config.SLP_VECTORIZE = 0), so scalar slab tests
stay scalar; this writes the vector code directly (a numba `intrinsic` emitting LLVM vector
instructions and llvm.fma, which is one instruction where the processor has FMA3 and a correct
library call where not).
"""

from __future__ import annotations

import math

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.extending import intrinsic

ROWS = 8  # a node's rows: six box planes and two of child data (wide_bvh.py)

KAPPA = 2.0**-21  # relative widening of the inverse (module docstring)
SLACK = 2.0**-22  # of the origin term, relative to |o · inv|
GRAZE = 2.0**-20  # world units added to |o| in the slack: a ray within it of a plane is in it
INV_LIMIT = 2.0**64  # |inv| of a zero or tiny direction component
T_ROUND = 2.0**-23  # tmin down and tmax up by |t| · T_ROUND before rounding to float32

# ray_planes' tuple: per axis x, y, z (A_NEAR + axis, ...)
A_NEAR = 0
B_NEAR = 3
A_FAR = 6
B_FAR = 9
N_PLANES = 12


@njit(cache=True, inline="always")
def _axis_terms(o, d):
    if abs(d) >= 1.0 / INV_LIMIT:
        inv = 1.0 / d
    elif d == d:  # zero or tiny: a large finite inverse of the same sign
        inv = math.copysign(INV_LIMIT, d)
    else:  # NaN stays NaN: every slab test of a NaN ray passes, as in the float64 reference
        inv = d
    a_near = np.float32(inv * (1.0 - KAPPA))
    a_far = np.float32(inv * (1.0 + KAPPA))
    slack = SLACK * abs(inv) * (abs(o) + GRAZE)
    b_near = -np.float32(o * np.float64(a_near) + slack)
    b_far = -np.float32(o * np.float64(a_far) - slack)
    return a_near, b_near, a_far, b_far


@njit(cache=True, inline="always")
def ray_planes(ox, oy, oz, dx, dy, dz):
    """The per-ray terms of the float32 slab test: a tuple of N_PLANES float32 values, a_near
    x, y, z (A_NEAR + axis), b_near (B_NEAR + axis), a_far (A_FAR + axis), b_far (B_FAR + axis);
    see the module's docstring. The sign of a_near is the direction's (+0 and -0 included)."""
    anx, bnx, afx, bfx = _axis_terms(ox, dx)
    any_, bny, afy, bfy = _axis_terms(oy, dy)
    anz, bnz, afz, bfz = _axis_terms(oz, dz)
    return (anx, any_, anz, bnx, bny, bnz, afx, afy, afz, bfx, bfy, bfz)


@njit(cache=True, inline="always")
def interval32(tmin, tmax):
    """(tmin, tmax) as float32, tmin rounded down and tmax up (float64 in)."""
    return np.float32(tmin - abs(tmin) * T_ROUND), np.float32(tmax + abs(tmax) * T_ROUND)


@intrinsic
def fma32(typingctx, a, b, c):
    """a · b + c rounded once to float32 (llvm.fma): the scalar form of the vector test's
    operation, for the reference."""
    if not all(x == types.float32 for x in (a, b, c)):
        return None

    def codegen(context, builder, signature, args):
        return builder.fma(*args)

    return types.float32(types.float32, types.float32, types.float32), codegen


def slab_test(lanes: int, stride: int | None = None):
    """The slab-test intrinsic of nodes `lanes` children wide (see the module's docstring), or
    of the first `lanes` children of nodes `stride` wide:

        slabs(box, nd, nx, ny, nz, fx, fy, fz, planes, tmin32, tmax32, out, at) -> mask (int64)

    bit j of mask is set when the ray enters child slot j's box, whose entry distance goes to
    out[at + j]; nx, ny, nz / fx, fy, fz: the rows of the near / far planes, as wide_bvh's
    traversals choose them from the ray's direction; planes: from `ray_planes`; tmin32, tmax32:
    float32 from `interval32`."""
    stride = lanes if stride is None else stride

    @intrinsic
    def slabs(typingctx, box, nd, nx, ny, nz, fx, fy, fz, planes, tmin, tmax, out, at):
        if not (isinstance(box, types.Array) and box.dtype == types.float32 and box.ndim == 3
                and box.layout == "C"):
            return None
        if not (isinstance(out, types.Array) and out.dtype == types.float64 and out.layout == "C"):
            return None
        if not (isinstance(planes, types.UniTuple) and planes.dtype == types.float32
                and planes.count == N_PLANES):
            return None
        if tmin != types.float32 or tmax != types.float32:
            return None
        for row in (nd, nx, ny, nz, fx, fy, fz, at):
            if not isinstance(row, types.Integer):
                return None
        sig = types.int64(box, nd, nx, ny, nz, fx, fy, fz, planes, tmin, tmax, out, at)

        def codegen(context, builder, signature, args):
            box_v, nd_v, nx_v, ny_v, nz_v, fx_v, fy_v, fz_v, planes_v, tmin_v, tmax_v, out_v, at_v = args
            rows = signature.args
            data = context.make_array(rows[0])(context, builder, box_v).data
            out_data = context.make_array(rows[11])(context, builder, out_v).data
            i32, i64 = ir.IntType(32), ir.IntType(64)
            f32v = ir.VectorType(ir.FloatType(), lanes)
            f64v = ir.VectorType(ir.DoubleType(), lanes)

            def as_i64(v, t):
                return context.cast(builder, v, t, types.int64) if t != types.int64 else v

            first = builder.mul(as_i64(nd_v, rows[1]), ir.Constant(i64, ROWS * stride))

            def row(r, t):
                at_ = builder.add(first, builder.mul(as_i64(r, t), ir.Constant(i64, stride)))
                ptr = builder.bitcast(builder.gep(data, [at_]), f32v.as_pointer())
                return builder.load(ptr, align=4)

            def splat(x):
                undef = ir.Constant(f32v, ir.Undefined)
                one = builder.insert_element(undef, x, ir.Constant(i32, 0))
                return builder.shuffle_vector(one, undef, ir.Constant(ir.VectorType(i32, lanes), [0] * lanes))

            def term(i):
                return splat(builder.extract_value(planes_v, i))

            # llvm.fma on vectors (llvmlite's builder.fma takes scalars only)
            fma = builder.module.declare_intrinsic(f"llvm.fma.v{lanes}f32", (), ir.FunctionType(f32v, [f32v] * 3))
            tn, tf = splat(tmin_v), splat(tmax_v)
            for axis, (near, nt, far, ft) in enumerate(((nx_v, rows[2], fx_v, rows[5]),
                                                        (ny_v, rows[3], fy_v, rows[6]),
                                                        (nz_v, rows[4], fz_v, rows[7]))):
                t0 = builder.call(fma, [row(near, nt), term(A_NEAR + axis), term(B_NEAR + axis)])
                t1 = builder.call(fma, [row(far, ft), term(A_FAR + axis), term(B_FAR + axis)])
                tn = builder.select(builder.fcmp_ordered(">", t0, tn), t0, tn)
                tf = builder.select(builder.fcmp_ordered("<", t1, tf), t1, tf)
            entered = builder.fcmp_ordered("<=", tn, tf)
            dest = builder.gep(out_data, [as_i64(at_v, rows[12])])
            builder.store(builder.fpext(tn, f64v), builder.bitcast(dest, f64v.as_pointer()), align=8)
            return builder.zext(builder.bitcast(entered, ir.IntType(lanes)), i64)

        return sig, codegen

    return slabs
