"""The four slab tests of a wide BVH node as one vector computation.

A node of wide_bvh.py keeps its four children's boxes side by side: row r of node nd is four
float32 values at `box[nd, r, 0:4]`. `slabs4` loads each row the ray needs as one 4-lane vector,
widens it to float64 and runs the slab test on all four children at once, with the same
operations in the same order as the scalar `wide_bvh._slab` (the readable reference), so each
lane's result is the same bits:

  t0 = (near - o) · inv_d,  t1 = (far - o) · inv_d · BOX_WIDEN   per axis x, y, z,
  tn = t0 where t0 > tn,    tf = t1 where t1 < tf               starting from (tmin, tmax),
  entered = tn <= tf                                             (false for NaN).

numba leaves LLVM's SLP vectoriser off (numba.config.SLP_VECTORIZE = 0), so four scalar slab
tests stay four; this writes the vector code directly (a numba `intrinsic` emitting LLVM vector
instructions). Measured on one thread, bench/rays.py's incoherent rays inside an icosphere: 1.13–1.5×
the rays per second of the scalar version, the same hits (tests/engine/test_wide_slabs.py compares
the two on random boxes and rays).

The loads are unchecked: `nd` must be a node of `box` (the traversals take it only from the root
or from a node's own child entries, which collapse_bvh writes), and `box` a C-contiguous (W, 8, 4)
float32 array — the typing refuses any other.
"""

from __future__ import annotations

from llvmlite import ir
from numba import types
from numba.extending import intrinsic

from .intersect import BOX_WIDEN

NODE_FLOATS = 32  # a node's (8, 4) float32 block
ROW_FLOATS = 4


@intrinsic
def slabs4(typingctx, box, nd, nx, ny, nz, fx, fy, fz, ox, oy, oz, idx, idy, idz, tmin, tmax):
    """(mask, tn0, tn1, tn2, tn3): bit j of mask is set when the ray enters child slot j's box,
    tn j the entry distance; nx, ny, nz / fx, fy, fz: the rows of the near / far planes, as
    wide_bvh's traversals choose them from the ray's direction."""
    if not (isinstance(box, types.Array) and box.dtype == types.float32 and box.ndim == 3 and box.layout == "C"):
        return None
    for row in (nd, nx, ny, nz, fx, fy, fz):
        if not isinstance(row, types.Integer):
            return None
    f8 = types.float64
    sig = types.Tuple((types.int64, f8, f8, f8, f8))(box, nd, nx, ny, nz, fx, fy, fz, ox, oy, oz, idx, idy,
                                                     idz, tmin, tmax)

    def codegen(context, builder, signature, args):
        box_v, nd_v, nx_v, ny_v, nz_v, fx_v, fy_v, fz_v = args[:8]
        ox_v, oy_v, oz_v, idx_v, idy_v, idz_v, tmin_v, tmax_v = (
            context.cast(builder, v, t, f8) for v, t in zip(args[8:], signature.args[8:]))
        data = context.make_array(signature.args[0])(context, builder, box_v).data
        i32, i64 = ir.IntType(32), ir.IntType(64)
        f32x4 = ir.VectorType(ir.FloatType(), 4)
        f64x4 = ir.VectorType(ir.DoubleType(), 4)

        def as_i64(v, t):
            return context.cast(builder, v, t, types.int64) if t != types.int64 else v

        first = builder.mul(as_i64(nd_v, signature.args[1]), ir.Constant(i64, NODE_FLOATS))

        def row(r, t):
            at = builder.add(first, builder.mul(as_i64(r, t), ir.Constant(i64, ROW_FLOATS)))
            ptr = builder.bitcast(builder.gep(data, [at]), f32x4.as_pointer())
            return builder.fpext(builder.load(ptr, align=4), f64x4)

        def splat(x):
            undef = ir.Constant(f64x4, ir.Undefined)
            one = builder.insert_element(undef, x, ir.Constant(i32, 0))
            return builder.shuffle_vector(one, undef, ir.Constant(ir.VectorType(i32, 4), [0, 0, 0, 0]))

        widen = splat(ir.Constant(ir.DoubleType(), BOX_WIDEN))
        tn, tf = splat(tmin_v), splat(tmax_v)
        rows = signature.args
        for near, nt, far, ft, o, inv in ((nx_v, rows[2], fx_v, rows[5], ox_v, idx_v),
                                          (ny_v, rows[3], fy_v, rows[6], oy_v, idy_v),
                                          (nz_v, rows[4], fz_v, rows[7], oz_v, idz_v)):
            o4, inv4 = splat(o), splat(inv)
            t0 = builder.fmul(builder.fsub(row(near, nt), o4), inv4)
            t1 = builder.fmul(builder.fmul(builder.fsub(row(far, ft), o4), inv4), widen)
            tn = builder.select(builder.fcmp_ordered(">", t0, tn), t0, tn)
            tf = builder.select(builder.fcmp_ordered("<", t1, tf), t1, tf)
        entered = builder.fcmp_ordered("<=", tn, tf)
        mask = builder.zext(builder.bitcast(entered, ir.IntType(4)), i64)
        lanes = [builder.extract_element(tn, ir.Constant(i32, j)) for j in range(4)]
        return context.make_tuple(builder, signature.return_type, [mask, *lanes])

    return sig, codegen
