"""Software prefetch for the wide BVH traversals: ask the memory system early for rows of an
array a traversal is about to read.

A ray's way through a wide BVH larger than the caches is a chain of waits on memory: each node
record (256 bytes) and each leaf's triangle rows (36 bytes a triangle, up to 16 a leaf) are
loaded only when the traversal reaches them. When a node's slab tests enter several children,
all of them are known at once, but they are visited one after the other, and a leaf's groups of
four are loaded one group at a time. `prefetch_node`, `prefetch_leaf` and `prefetch_span` (the
start of a node's leaf span, wide_bvh.leaf_spans, asked for when the node is entered) issue LLVM's
`llvm.prefetch` (a hint: it never faults and changes no value; LLVM Language Reference, the
"llvm.prefetch" intrinsic) for the cache lines of the rows, so those loads overlap with the
work on the child visited first.

Measured on one thread, the same rays and hits, paired alternating rounds of the traversal
with and without (the previous commit's traversal copied beside this one; 2026-12-03, medians of
30 per-round ratios): on the 1.31 M-triangle sphere of
bench/rays.py, incoherent closest hits 1.17-1.23x as fast, camera rays 1.16-1.21x, shadow rays
1.25x; on 82 k triangles 1.13x, 1.0x and 1.29x; on 5 k (in the caches) 1.0x, 0.97x and 1.07x.
A first version that prefetched in a separate loop over the entered children cost 8-11 % on
camera rays in the caches; asking only where the traversal already handles each child, and
nothing for a lone interior child (entered at once), cut that to 3 %.

The rows are row-major (C order) with the leading axis as the row. The prefetches are branch
free: a fixed number of them, one per cache line from the line holding the rows' first byte,
each address clamped to the line holding their last byte (a repeated line costs an
instruction, no memory traffic), so no line is asked for that holds none of the rows (given
count >= 1; the traversals pass a leaf's count, which is at least 1, 1 for a node, or a span's
rows, only when there are some).
`rows_line_addresses` computes the same addresses into an array (for tests); `lines_of_rows` is
the readable reference of the arithmetic.
"""

from __future__ import annotations

from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic

LINE = 64  # bytes in a cache line (x86-64 and the common ARM cores)
NODE_LINES = 4  # a 256-byte node record, aligned to 256 bytes (wide_bvh.NODE_ALIGN): 4 lines
LEAF_LINES = 10  # a leaf of 16 triangle rows (576 bytes) spans at most 10 lines
# the first lines of an interior child's leaf span (wide_bvh.leaf_spans: its leaf children's
# rows, 35 rows or ~20 lines at the median on bench/rays.py's sphere), asked for when the child
# is entered, a node visit before one of its leaves is read. Measured as below (2026-12-04,
# medians of 10-16 per-round ratios against the same traversal without): 8, 12, 16 and 24
# lines, 1.31 M triangles incoherent 1.12x, 1.14x, 1.12x, 1.12x, camera rays 0.99x, 0.99x,
# 0.98x, 0.96x; 82 k triangles 1.01x, 1.02x, 1.01x, 0.99x and 0.98x, 0.97x, 0.96x, 0.94x.
SPAN_LINES = 12
# The span prefetches cost instructions a scene in the caches does not pay back: the courtyard
# demo (2,244 triangles) rendered 13 % slower with them (bench/engine.py, one thread, three
# alternating runs: 186-207 against 222-234 k samples/s), and 2 % slower with 4 lines a span.
# A scene gets leaf spans only when its triangle rows take at least this many bytes (about a
# core's L2 cache, rule of thumb; 29 k triangles); below, its spans are zero and the
# traversals ask for none (compiler.compile_frame).
SPAN_MIN_BYTES = 1 << 20
# llvm.prefetch operands: a read (0), the highest temporal locality (3: keep it in every cache
# level), the data cache (1)
_READ, _LOCALITY, _DATA = 0, 3, 1


def lines_of_rows(data: int, first: int, count: int, row_bytes: int, lines: int) -> list[int]:
    """The readable reference: the `lines` addresses asked for, for rows first .. first +
    count - 1 (count >= 1) of an array whose data begins at address `data`."""
    start = data + first * row_bytes
    last = start + count * row_bytes - 1
    line0, line_last = start - start % LINE, last - last % LINE
    return [min(line0 + k * LINE, line_last) for k in range(lines)]


def _typed(arr, first, count) -> bool:
    return (isinstance(arr, types.Array) and arr.layout == "C" and arr.ndim >= 1
            and isinstance(first, types.Integer) and isinstance(count, types.Integer))


def _addresses(context, builder, arr, ary_value, first, first_t, count, count_t, lines):
    """IR: the `lines` clamped line addresses (i64) of `lines_of_rows`."""
    i64 = ir.IntType(64)
    ary = context.make_array(arr)(context, builder, ary_value)
    first_v = context.cast(builder, first, first_t, types.int64)
    count_v = context.cast(builder, count, count_t, types.int64)
    # bytes in a row: the item size times the trailing extents
    row = ir.Constant(i64, context.get_abi_sizeof(context.get_data_type(arr.dtype)))
    for extent in cgutils.unpack_tuple(builder, ary.shape, arr.ndim)[1:]:
        row = builder.mul(row, extent)
    start = builder.add(builder.ptrtoint(ary.data, i64), builder.mul(first_v, row))
    last = builder.sub(builder.add(start, builder.mul(count_v, row)), ir.Constant(i64, 1))
    mask = ir.Constant(i64, ~(LINE - 1))
    line0, line_last = builder.and_(start, mask), builder.and_(last, mask)
    out = []
    for k in range(lines):
        at = builder.add(line0, ir.Constant(i64, k * LINE))
        out.append(builder.select(builder.icmp_unsigned("<", at, line_last), at, line_last))
    return out


def rows_prefetcher(lines: int):
    """An intrinsic `prefetch(arr, first, count)`: prefetch rows first .. first + count - 1 of
    `arr` (a C-contiguous array, any dtype and rank; count >= 1), `lines` cache lines from the
    first (the module docstring). Returns nothing."""

    @intrinsic
    def prefetch(typingctx, arr, first, count):
        if not _typed(arr, first, count):
            return None

        def codegen(context, builder, signature, args):
            i8p, i32 = ir.PointerType(ir.IntType(8)), ir.IntType(32)
            fnty = ir.FunctionType(ir.VoidType(), [i8p, i32, i32, i32])
            fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.prefetch.p0")
            for at in _addresses(context, builder, arr, args[0], args[1], signature.args[1], args[2],
                                 signature.args[2], lines):
                builder.call(fn, [builder.inttoptr(at, i8p), ir.Constant(i32, _READ),
                                  ir.Constant(i32, _LOCALITY), ir.Constant(i32, _DATA)])
            return context.get_dummy_value()

        return types.void(arr, first, count), codegen

    return prefetch


def rows_line_addresses(lines: int):
    """An intrinsic `addresses(arr, first, count, out)`: writes into out[:lines] (int64) the
    addresses `rows_prefetcher(lines)` would prefetch, computed by the same IR."""

    @intrinsic
    def addresses(typingctx, arr, first, count, out):
        if not (_typed(arr, first, count) and isinstance(out, types.Array) and out.dtype == types.int64
                and out.ndim == 1 and out.layout == "C"):
            return None

        def codegen(context, builder, signature, args):
            dest = context.make_array(signature.args[3])(context, builder, args[3]).data
            for k, at in enumerate(_addresses(context, builder, arr, args[0], args[1], signature.args[1],
                                              args[2], signature.args[2], lines)):
                builder.store(at, builder.gep(dest, [ir.Constant(ir.IntType(64), k)]))
            return context.get_dummy_value()

        return types.void(arr, first, count, out), codegen

    return addresses


prefetch_node = rows_prefetcher(NODE_LINES)
prefetch_leaf = rows_prefetcher(LEAF_LINES)
prefetch_span = rows_prefetcher(SPAN_LINES)
