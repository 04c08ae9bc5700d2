"""The slab tests of a wide BVH node's children as one vector computation.

A node of wide_bvh.py keeps its children's boxes side by side: row r of node nd is `lanes`
float32 values at `box[nd, r, 0:lanes]`. The intrinsic that `slab_test(lanes)` makes loads each
row the ray needs as one vector, widens it to float64 and runs the slab test on every child at
once, with the same operations in the same order as the scalar `wide_bvh._slab` (the readable
reference), so each lane's result is the same bits:

  t0 = (near - o) · inv_d,  t1 = (far - o) · inv_d · BOX_WIDEN   per axis x, y, z,
  tn = t0 where t0 > tn,    tf = t1 where t1 < tf               starting from (tmin, tmax),
  entered = tn <= tf                                             (false for NaN).

numba leaves LLVM's SLP vectoriser off (numba.config.SLP_VECTORIZE = 0), so scalar slab tests
stay scalar; this writes the vector code directly (a numba `intrinsic` emitting LLVM vector
instructions; LLVM splits an eight-lane float64 vector into two AVX registers). Measured on one
thread, bench/rays.py's incoherent rays inside an icosphere: 1.13–1.5× the rays per second of the
scalar version at four lanes, the same hits (tests/engine/test_wide_slabs.py compares the two on
random boxes and rays).

The entry distances tn go to memory (`out[at:at + lanes]`, float64), where the traversal reads
the few lanes that entered by index. The loads and the store are unchecked: `nd` must be a node
of `box` (the traversals take it only from the root or from a node's own child entries, which
collapse_bvh writes), `box` a C-contiguous (W, 8, lanes) float32 array and `out` a C-contiguous
float64 array with room at `at` — the typing refuses other kinds.
"""

from __future__ import annotations

from llvmlite import ir
from numba import types
from numba.extending import intrinsic

from .intersect import BOX_WIDEN

ROWS = 8  # a node's rows: six box planes and two of child data (wide_bvh.py)


def slab_test(lanes: int, stride: int | None = None):
    """The slab-test intrinsic of nodes `lanes` children wide (see the module's docstring), or
    of the first `lanes` children of nodes `stride` wide:

        slabs(box, nd, nx, ny, nz, fx, fy, fz, ox, oy, oz, idx, idy, idz, tmin, tmax, out, at)
          -> mask (int64)

    bit j of mask is set when the ray enters child slot j's box, whose entry distance goes to
    out[at + j]; nx, ny, nz / fx, fy, fz: the rows of the near / far planes, as wide_bvh's
    traversals choose them from the ray's direction."""
    stride = lanes if stride is None else stride

    @intrinsic
    def slabs(typingctx, box, nd, nx, ny, nz, fx, fy, fz, ox, oy, oz, idx, idy, idz, tmin, tmax, out, at):
        if not (isinstance(box, types.Array) and box.dtype == types.float32 and box.ndim == 3
                and box.layout == "C"):
            return None
        if not (isinstance(out, types.Array) and out.dtype == types.float64 and out.layout == "C"):
            return None
        for row in (nd, nx, ny, nz, fx, fy, fz, at):
            if not isinstance(row, types.Integer):
                return None
        f8 = types.float64
        sig = types.int64(box, nd, nx, ny, nz, fx, fy, fz, ox, oy, oz, idx, idy, idz, tmin, tmax, out, at)

        def codegen(context, builder, signature, args):
            box_v, nd_v, nx_v, ny_v, nz_v, fx_v, fy_v, fz_v = args[:8]
            ox_v, oy_v, oz_v, idx_v, idy_v, idz_v, tmin_v, tmax_v = (
                context.cast(builder, v, t, f8) for v, t in zip(args[8:16], signature.args[8:16]))
            data = context.make_array(signature.args[0])(context, builder, box_v).data
            out_data = context.make_array(signature.args[16])(context, builder, args[16]).data
            i32, i64 = ir.IntType(32), ir.IntType(64)
            f32v = ir.VectorType(ir.FloatType(), lanes)
            f64v = ir.VectorType(ir.DoubleType(), lanes)

            def as_i64(v, t):
                return context.cast(builder, v, t, types.int64) if t != types.int64 else v

            first = builder.mul(as_i64(nd_v, signature.args[1]), ir.Constant(i64, ROWS * stride))

            def row(r, t):
                at_ = builder.add(first, builder.mul(as_i64(r, t), ir.Constant(i64, stride)))
                ptr = builder.bitcast(builder.gep(data, [at_]), f32v.as_pointer())
                return builder.fpext(builder.load(ptr, align=4), f64v)

            def splat(x):
                undef = ir.Constant(f64v, ir.Undefined)
                one = builder.insert_element(undef, x, ir.Constant(i32, 0))
                return builder.shuffle_vector(one, undef, ir.Constant(ir.VectorType(i32, lanes), [0] * lanes))

            widen = splat(ir.Constant(ir.DoubleType(), BOX_WIDEN))
            tn, tf = splat(tmin_v), splat(tmax_v)
            rows = signature.args
            for near, nt, far, ft, o, inv in ((nx_v, rows[2], fx_v, rows[5], ox_v, idx_v),
                                              (ny_v, rows[3], fy_v, rows[6], oy_v, idy_v),
                                              (nz_v, rows[4], fz_v, rows[7], oz_v, idz_v)):
                o_v, inv_v = splat(o), splat(inv)
                t0 = builder.fmul(builder.fsub(row(near, nt), o_v), inv_v)
                t1 = builder.fmul(builder.fmul(builder.fsub(row(far, ft), o_v), inv_v), widen)
                tn = builder.select(builder.fcmp_ordered(">", t0, tn), t0, tn)
                tf = builder.select(builder.fcmp_ordered("<", t1, tf), t1, tf)
            entered = builder.fcmp_ordered("<=", tn, tf)
            dest = builder.gep(out_data, [as_i64(args[17], signature.args[17])])
            builder.store(tn, builder.bitcast(dest, f64v.as_pointer()), align=8)
            return builder.zext(builder.bitcast(entered, ir.IntType(lanes)), i64)

        return sig, codegen

    return slabs
