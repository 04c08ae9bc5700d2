"""Eight-wide BVH: the binary SAH tree of bvh.py collapsed so that a node holds up to eight
children, their boxes side by side (its traversals: wide_traversal.py).

Collapsing: each wide node starts from the two children of a binary node and repeatedly opens
the child of largest surface area that is not a leaf, until it has eight children or only
leaves (the greedy collapse of Wald, Benthin and Boulos, "Getting rid of packets", IEEE
Symposium on Interactive Ray Tracing 2008, and Dammertz, Hanika and Keller, "Shallow bounding
volume hierarchies for fast SIMD ray tracing of incoherent rays", EGSR 2008). Leaves and
triangles are those of the binary tree, in the same order, so `pack_triangles` serves both.

Why eight: a ray's way down is a chain of dependent loads, one node after the other, and on a
mesh larger than the caches each is a wait on memory (sampled with perf: a quarter of the time
of four-wide traversal waited on a node's first load, a fifth on a leaf's first triangle).
Eight children a node instead of four take an incoherent ray inside the 1.31 M-triangle sphere
of bench/rays.py through 8.9 nodes instead of 13.9, for the same leaves. Measured on one thread
against the four-wide tree, same rays, same hits (2026-12-03, best of 6-8 interleaved repeats):
on 1.31 M triangles incoherent closest hits 1.09-1.24x the rays a second, shadow rays
1.13-1.22x, rays leaving the surface 1.05-1.13x, camera rays 0.96-1.0x; on 20-82 k triangles
1.11-1.21x, 1.14-1.33x, 1.09-1.22x and 0.83-0.88x (in the caches a node's eight float64 lanes
cost more than the visits saved). Renders (bench/engine.py, courtyard and the 1.31 M-triangle
sphere) did not change beyond this machine's noise (+-15 % from run to run).

A tree is a `WideBVH`: one (W, 8, WIDTH) block per node, nodes in depth-first order with the
root at 0, read through two views of the same memory, so a node is one 256-byte record (four
cache lines: records start on 256-byte boundaries, NODE_ALIGN) and a visit reads nothing else
of the tree but its children's leaf spans:

* `box` float32: rows lo x, lo y, lo z, hi x, hi y, hi z (BOX_LO + axis, BOX_HI + axis);
  column j is child slot j, so the children's boxes lie side by side;
* `meta` int32, rows ROW_CHILD and ROW_COUNT (rows 0-5 are the boxes' bits): an interior
  child's node index (local, root = 0) and 0; a leaf's first triangle row (local) and its
  triangle count; for an unused slot 0 and SLOT_EMPTY (its box is empty, lo = +inf and
  hi = -inf, so no slab test of a finite ray enters it);
* `span` int32, (W, 2), beside the records: each node's leaf span (`leaf_spans`), the rows of
  its leaf children, which a traversal asks memory for when it enters the node (prefetch.py).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from numba import njit

from .bvh import BVH

WIDTH = 8
NODE_BYTES = 8 * WIDTH * 4  # a node record: 8 rows of WIDTH float32 / int32
# Node records start on a 256-byte boundary, so a record is exactly four cache lines (the
# NODE_LINES prefetch.py asks for) and two aligned pairs of them. With numpy's own 16-byte
# alignment a record straddles five lines. Measured on one thread, the same rays and hits,
# alternating rounds against the traversal before (numpy's alignment, five lines prefetched;
# 2026-12-04, medians of 24-60 per-round ratios, whose quartiles span about +-5 %): on the
# 1.31 M-triangle sphere of bench/rays.py incoherent closest hits 1.02-1.04x, camera rays
# 1.02-1.04x, shadow rays 0.98-0.99x; on 82 k triangles 1.02x, 1.01x and 1.06x. Small: what
# a traversal waits for is a node's or a leaf's first line, however many lines follow.
NODE_ALIGN = 256
BOX_LO = 0  # rows of `box`: lo x, y, z
BOX_HI = 3  # hi x, y, z
SLOT_EMPTY = -1
ROW_CHILD = 6
ROW_COUNT = 7
# Traversal stack entries. A binary tree from build_bvh is less than 64 levels deep, so its
# wide tree is too, and a wide node pushes at most WIDTH entries and pops one.
WIDE_STACK = (WIDTH - 1) * 64 + WIDTH
HALF = WIDTH // 2  # a node of at most HALF children (slot HALF empty) is tested on HALF lanes
SPAN_FIRST = 0  # columns of a node's leaf span (`leaf_spans`): its first triangle row
SPAN_ROWS = 1  # and the rows from there to the end of its last leaf child (0: no leaf child)


class WideBVH(NamedTuple):
    box: np.ndarray  # (W, 8, WIDTH) float32
    meta: np.ndarray  # (W, 8, WIDTH) int32, a view of the same memory as box
    span: np.ndarray  # (W, 2) int32 leaf spans (`leaf_spans`)


def aligned_nodes(n: int) -> np.ndarray:
    """An uninitialised (n, 8, WIDTH) float32 node array whose records start on NODE_ALIGN-byte
    boundaries (numpy aligns its data to 16 bytes only)."""
    raw = np.empty(n * NODE_BYTES + NODE_ALIGN, np.uint8)
    skip = -raw.ctypes.data % NODE_ALIGN
    return raw[skip:skip + n * NODE_BYTES].view(np.float32).reshape(n, 8, WIDTH)


def wide_views(box) -> WideBVH:
    """The two views of a node array and its leaf spans: (box, its int32 view, `leaf_spans`);
    box: (W, 8, WIDTH) float32, copied unless it is C-contiguous float32 with its records
    aligned (`aligned_nodes`)."""
    box = np.asarray(box)
    if not (box.dtype == np.float32 and box.flags.c_contiguous and box.ctypes.data % NODE_ALIGN == 0):
        src = box
        box = aligned_nodes(len(src))
        box[...] = src
    meta = box.view(np.int32)
    return WideBVH(box, meta, leaf_spans(meta))


def leaf_spans(meta) -> np.ndarray:
    """Each node's leaf span: (W, 2) int32, [SPAN_FIRST] the lowest first triangle row of its
    leaf children, [SPAN_ROWS] the rows from there to the end of the highest; (0, 0) for a node
    without leaf children. Rows are local to the tree, as in `meta`. meta: (W, 8, WIDTH) int32.

    Triangle rows are in the binary tree's leaf order, so a node whose children are all leaves
    (most nodes near the bottom) covers exactly its span; a node with interior children too may
    cover rows of theirs. The traversals prefetch the start of a child's span when they enter
    the child, a level before they reach its leaves (prefetch.py)."""
    count = meta[:, ROW_COUNT, :].astype(np.int64)
    first = meta[:, ROW_CHILD, :].astype(np.int64)
    leaf = count > 0
    lo = np.where(leaf, first, np.iinfo(np.int64).max).min(axis=1)
    hi = np.where(leaf, first + count, -1).max(axis=1)
    out = np.zeros((len(meta), 2), np.int32)
    has = leaf.any(axis=1)
    out[has, SPAN_FIRST] = lo[has]
    out[has, SPAN_ROWS] = (hi - lo)[has]
    return out


def concat_nodes(boxes) -> WideBVH:
    """Node arrays one after the other in one aligned array (their child indices unchanged:
    the traversals add each tree's node_base)."""
    out = aligned_nodes(sum(len(b) for b in boxes))
    np.concatenate(boxes, out=out)
    return wide_views(out)


def empty_wide() -> WideBVH:
    """One node of empty slots: a stand-in where there are no meshes."""
    box = np.zeros((1, 8, WIDTH), np.float32)
    box[0, BOX_LO:BOX_LO + 3] = np.inf
    box[0, BOX_HI:BOX_HI + 3] = -np.inf
    box.view(np.int32)[0, ROW_COUNT] = SLOT_EMPTY
    return wide_views(box)


# ------------------------------------------------------------------------------------------
# collapse


@njit(cache=True, inline="always")
def _half_area(lo, hi, i):
    ex, ey, ez = hi[i, 0] - lo[i, 0], hi[i, 1] - lo[i, 1], hi[i, 2] - lo[i, 2]
    return ex * ey + ey * ez + ez * ex


@njit(cache=True)
def _collapse(lo, hi, a, count, box, meta):
    """Fill box and meta (views of one array) from the binary tree (lo, hi, a, count); returns
    the node count."""
    kids = np.empty(WIDTH, np.int64)
    todo = np.empty((4 * WIDE_STACK, 2), np.int64)  # (binary node, its wide node) to fill
    n_wide = 1
    ntodo = 0
    if count[0] > 0:  # a single leaf: a root with one child
        kids[0] = 0
        nk = 1
    else:
        todo[0, 0], todo[0, 1] = 0, 0
        ntodo = 1
        nk = 0
    while True:
        if nk == 0:  # take the next binary interior node and open it up to WIDTH children
            if ntodo == 0:
                break
            ntodo -= 1
            b, w = todo[ntodo, 0], todo[ntodo, 1]
            kids[0], kids[1] = b + 1, a[b]
            nk = 2
            while nk < WIDTH:
                best, best_area = -1, -1.0
                for j in range(nk):
                    if count[kids[j]] == 0 and _half_area(lo, hi, kids[j]) > best_area:
                        best, best_area = j, _half_area(lo, hi, kids[j])
                if best < 0:
                    break
                k = kids[best]
                kids[best] = k + 1
                kids[nk] = a[k]
                nk += 1
        else:
            w = 0  # the single-leaf root
        for j in range(WIDTH):
            if j >= nk:
                for ax in range(3):
                    box[w, BOX_LO + ax, j] = np.inf
                    box[w, BOX_HI + ax, j] = -np.inf
                meta[w, ROW_CHILD, j] = 0
                meta[w, ROW_COUNT, j] = SLOT_EMPTY
                continue
            k = kids[j]
            for ax in range(3):
                box[w, BOX_LO + ax, j] = lo[k, ax]
                box[w, BOX_HI + ax, j] = hi[k, ax]
            if count[k] > 0:
                meta[w, ROW_CHILD, j] = a[k]
                meta[w, ROW_COUNT, j] = count[k]
            else:
                meta[w, ROW_CHILD, j] = n_wide
                meta[w, ROW_COUNT, j] = 0
                todo[ntodo, 0], todo[ntodo, 1] = k, n_wide
                ntodo += 1
                n_wide += 1
        nk = 0
    return n_wide


def collapse_bvh(bvh: BVH) -> WideBVH:
    """The wide tree of a binary tree from `build_bvh` (same leaves, same triangle order)."""
    m = len(bvh.lo)
    size = max(1, m)  # every wide node but the root replaces at least one binary interior node
    box = np.empty((size, 8, WIDTH), np.float32)
    n = _collapse(bvh.lo, bvh.hi, bvh.a, bvh.count, box, box.view(np.int32))
    out = aligned_nodes(n)
    out[...] = box[:n]
    return wide_views(out)
