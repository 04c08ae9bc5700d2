"""Software prefetch (engine/prefetch.py): the line addresses asked for, computed by the
intrinsic's own IR, equal the readable reference; they stay inside the rows asked for and cover
them; and the wide traversals' machine code does prefetch. Prefetching cannot change a value
(LLVM Language Reference, "llvm.prefetch"), so the traversals' hits are checked where they
always are (test_wide_bvh.py)."""

from __future__ import annotations

import numpy as np
import pytest
from numba import njit

from lampyr.engine.prefetch import LEAF_LINES, LINE, NODE_LINES, SPAN_LINES, lines_of_rows, rows_line_addresses

_ADDRESSES = {n: rows_line_addresses(n) for n in (1, NODE_LINES, LEAF_LINES, SPAN_LINES)}


def _kernel(lines):
    addresses = _ADDRESSES[lines]

    @njit
    def run(arr, first, count, out):
        addresses(arr, first, count, out)

    return run


@pytest.mark.parametrize("shape, dtype", [((300, 3, 3), np.float32), ((40, 8, 8), np.float32),
                                          ((500,), np.float64), ((64, 5), np.uint8)])
@pytest.mark.parametrize("lines", [1, NODE_LINES, LEAF_LINES, SPAN_LINES])
@pytest.mark.parametrize("index", [np.int64, np.int32])  # the traversals pass int32 counts
def test_the_intrinsic_asks_for_the_reference_lines(shape, dtype, lines, index):
    arr = np.zeros(shape, dtype)
    row = arr.itemsize * int(np.prod(shape[1:]))
    run = _kernel(lines)
    rng = np.random.default_rng(lines)
    out = np.empty(lines, np.int64)
    for _ in range(200):
        first = int(rng.integers(0, shape[0]))
        count = int(rng.integers(1, shape[0] - first + 1))
        run(arr, index(first), index(count), out)
        assert out.tolist() == lines_of_rows(arr.ctypes.data, first, count, row, lines)


@pytest.mark.parametrize("first, count", [(0, 1), (7, 16), (13, 5), (290, 10)])
def test_the_lines_lie_in_the_rows_and_cover_them_when_enough(first, count):
    tris = np.zeros((300, 3, 3), np.float32)  # triangle rows, 36 bytes each
    row = 36
    got = lines_of_rows(tris.ctypes.data, first, count, row, LEAF_LINES)
    start = tris.ctypes.data + first * row
    last = start + count * row - 1
    assert all(start - start % LINE <= a <= last for a in got)
    assert all(a % LINE == 0 for a in got)
    wanted = set(range(start - start % LINE, last + 1, LINE))
    assert set(got) == wanted  # up to 16 rows: every line of them, none twice but the clamped last


@pytest.mark.parametrize("traversal", ["intersect_wide_at", "occluded_wide_at"])
def test_the_wide_traversals_prefetch(traversal):
    """The machine code of the wide traversals holds prefetch instructions (x86's prefetcht0,
    ARM's prfm), so the hint survived LLVM's passes. The traversal is compiled afresh from its
    Python source (a kernel loaded from numba's cache keeps no assembly text)."""
    import lampyr.engine.wide_traversal as wide
    from lampyr.engine.bvh import build_bvh, corner_bounds, pack_triangles
    from lampyr.engine.wide_bvh import collapse_bvh

    rng = np.random.default_rng(1)
    v = rng.random((60, 3))
    f = rng.integers(0, 60, (40, 3))
    b = build_bvh(*corner_bounds(v[f]), max_leaf=16, trav_cost=4.0)
    w = collapse_bvh(b)
    tris = pack_triangles(v, f, b.order)
    fresh = njit(_nrt=False)(getattr(wide, traversal).py_func)
    fresh(w.box, w.meta, w.span, tris, tris[:0], 0, 0, 0, 0.0, 0.1, 0.2, 0.3, 1.0, 0.5, 0.25, 0.0, 10.0,
          wide.traversal_stack())
    asm = "\n".join(fresh.inspect_asm().values()).lower()
    assert "prefetcht0" in asm or "prfm" in asm
