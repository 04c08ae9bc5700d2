"""Four-wide BVH: the binary SAH tree of bvh.py collapsed so that a node holds up to four
children, their boxes side by side, and traversals over it.

Collapsing: each wide node starts from the two children of a binary node and repeatedly opens
the child of largest surface area that is not a leaf, until it has four children or only
leaves (the greedy collapse of Wald, Benthin and Boulos, "Getting rid of packets", IEEE
Symposium on Interactive Ray Tracing 2008, and Dammertz, Hanika and Keller, "Shallow bounding
volume hierarchies for fast SIMD ray tracing of incoherent rays", EGSR 2008). Leaves and
triangles are those of the binary tree, in the same order, so `pack_triangles` serves both.

A tree is a `WideBVH`: one (W, 8, 4) block per node, nodes in depth-first order with the root
at 0, read through two views of the same memory, so a node is one 128-byte record (two cache
lines) and a visit touches nothing else:

* `box` float32: rows lo x, lo y, lo z, hi x, hi y, hi z (BOX_LO + axis, BOX_HI + axis);
  column j is child slot j, so the four boxes of a node lie side by side;
* `meta` int32, rows ROW_CHILD and ROW_COUNT (rows 0-5 are the boxes' bits): an interior
  child's node index (local, root = 0) and 0; a leaf's first triangle row (local) and its
  triangle count; for an unused slot 0 and SLOT_EMPTY (its box is empty, lo = +inf and
  hi = -inf, so no slab test of a finite ray enters it).

The traversals compute the slab tests exactly as `intersect.ray_box` does (float64, the far
distance widened after Ize 2013), choosing each axis's near plane by the sign of the ray's
direction instead of swapping, visit the hit children nearest first and keep the entry
distance of every pushed child on the stack, so a child that lies beyond the closest hit found
since is dropped when popped without reading its node. A leaf's triangles are tested four at a
time (wide_triangles.py), with the same hits as one by one in row order; a deforming mesh's
still one by one. The binary traversals of bvh.py stay as the readable reference;
tests/engine/test_wide_bvh.py checks that both agree.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from numba import njit, prange

from .borrowing import borrowing
from .bvh import BVH, _leaf, _ray_frame
from .intersect import BOX_WIDEN, inverse
from .wide_slabs import slabs4
from .wide_triangles import any_in_leaf, closest_in_leaf

WIDTH = 4
BOX_LO = 0  # rows of `box`: lo x, y, z
BOX_HI = 3  # hi x, y, z
SLOT_EMPTY = -1
ROW_CHILD = 6
ROW_COUNT = 7
# Traversal stack entries. A binary tree from build_bvh is less than 64 levels deep, so its
# wide tree is too, and a wide node pushes at most 4 entries and pops one: 3 * 64 + 4 suffice.
WIDE_STACK = 3 * 64 + 4


class WideBVH(NamedTuple):
    box: np.ndarray  # (W, 8, 4) float32
    meta: np.ndarray  # (W, 8, 4) int32, a view of the same memory as box


def wide_views(box) -> WideBVH:
    """The two views of a node array: (box, its int32 view); box: (W, 8, 4) float32."""
    box = np.ascontiguousarray(box, np.float32)
    return WideBVH(box, box.view(np.int32))


def empty_wide() -> WideBVH:
    """One node of four empty slots: a stand-in where there are no meshes."""
    box = np.zeros((1, 8, WIDTH), np.float32)
    box[0, BOX_LO:BOX_LO + 3] = np.inf
    box[0, BOX_HI:BOX_HI + 3] = -np.inf
    w = wide_views(box)
    w.meta[0, ROW_COUNT] = SLOT_EMPTY
    return w


@njit(cache=True)
def traversal_stack():
    """Scratch for the wide traversals: (2 * WIDE_STACK,) float64 holding (entry distance,
    entry) pairs. Allocate one per thread or chunk of rays and reuse it for every ray."""
    return np.empty(2 * WIDE_STACK, np.float64)


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
        if nk == 0:  # take the next binary interior node and open it up to four children
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
    """The four-wide tree of a binary tree from `build_bvh` (same leaves, same triangle order)."""
    m = len(bvh.lo)
    size = max(1, m)  # every wide node but the root replaces at least one binary interior node
    box = np.empty((size, 8, WIDTH), np.float32)
    n = _collapse(bvh.lo, bvh.hi, bvh.a, bvh.count, box, box.view(np.int32))
    return wide_views(box[:n].copy())


# ------------------------------------------------------------------------------------------
# traversal


@njit(cache=True, inline="always")
def _slab(box, nd, j, nx, ny, nz, fx, fy, fz, ox, oy, oz, idx, idy, idz, tmin, tmax):
    """Slab test of child slot j of node nd, as `intersect.ray_box_at` computes it; nx, ny, nz:
    the rows of the near planes (BOX_HI + axis where the direction is negative). The readable
    reference of wide_slabs.slabs4, which the traversals use (all four slots at once)."""
    tn = tmin
    tf = tmax
    t0 = (box[nd, nx, j] - ox) * idx
    t1 = (box[nd, fx, j] - ox) * idx * BOX_WIDEN
    tn = t0 if t0 > tn else tn
    tf = t1 if t1 < tf else tf
    t0 = (box[nd, ny, j] - oy) * idy
    t1 = (box[nd, fy, j] - oy) * idy * BOX_WIDEN
    tn = t0 if t0 > tn else tn
    tf = t1 if t1 < tf else tf
    t0 = (box[nd, nz, j] - oz) * idz
    t1 = (box[nd, fz, j] - oz) * idz * BOX_WIDEN
    tn = t0 if t0 > tn else tn
    tf = t1 if t1 < tf else tf
    return tn <= tf, tn


@njit(cache=True, inline="always")
def _entry(meta, nd, j, base):
    """Stack entry of slot j: an interior child's absolute node, or -1 - slot for a leaf."""
    c = meta[nd, ROW_COUNT, j]
    if c == 0:
        return np.int64(base) + np.int64(meta[nd, ROW_CHILD, j])
    return -1 - (np.int64(nd) * WIDTH + j)


@njit(cache=True, inline="always")
def _order(ka, ea, ha, kb, eb, hb):
    """One compare-exchange of a sorting network: the nearer (key) first."""
    sw = kb < ka
    return (kb if sw else ka, eb if sw else ea, hb if sw else ha,
            ka if sw else kb, ea if sw else eb, ha if sw else hb)


@borrowing()
def intersect_wide(box, meta, tris, node_base, tri_base, ox, oy, oz, dx, dy, dz, tmin, tmax, stack):
    """Closest hit in (tmin, tmax) of one wide mesh BVH: (t, k, u, v), as bvh.intersect_mesh.

    node_base: the absolute index of this tree's root in the concatenated node arrays;
    tri_base: of its first triangle row in `tris`; stack: from `traversal_stack`.
    """
    return intersect_wide_at(box, meta, tris, tris[:0], node_base, tri_base, 0, 0.0,
                             ox, oy, oz, dx, dy, dz, tmin, tmax, stack)


@borrowing()
def intersect_wide_at(box, meta, tris, tris_end, node_base, tri_base, end_base, w,
                      ox, oy, oz, dx, dy, dz, tmin, tmax, stack):
    """`intersect_wide` for a mesh that may deform (see bvh.intersect_mesh_at)."""
    best_t, best_k, best_u, best_v = tmax, np.int64(-1), 0.0, 0.0
    if node_base < 0 or node_base >= box.shape[0]:  # an empty tree: nothing to hit
        return best_t, best_k, best_u, best_v
    idx, idy, idz = inverse(dx), inverse(dy), inverse(dz)
    kx, ky, kz, okx, oky, okz, sx, sy, sz = _ray_frame(ox, oy, oz, dx, dy, dz)
    nx = np.uint64(BOX_HI if idx < 0.0 else BOX_LO)
    ny = np.uint64(BOX_HI + 1 if idy < 0.0 else BOX_LO + 1)
    nz = np.uint64(BOX_HI + 2 if idz < 0.0 else BOX_LO + 2)
    fx, fy, fz = np.uint64(3) - nx, np.uint64(5) - ny, np.uint64(7) - nz
    tbase = np.int64(tri_base)
    shift = np.int64(end_base) - np.int64(tri_base)
    room = stack.shape[0] // 2 - WIDTH
    inf = math.inf
    sp = 0
    entry = np.int64(node_base)
    while True:
        if entry >= 0:
            nd = np.uint64(entry)
            # the four children's slab tests at once (wide_slabs.py; the same bits as _slab)
            mask, k0, k1, k2, k3 = slabs4(box, nd, nx, ny, nz, fx, fy, fz, ox, oy, oz, idx, idy, idz, tmin, best_t)
            h0, h1, h2, h3 = (mask & 1) != 0, (mask & 2) != 0, (mask & 4) != 0, (mask & 8) != 0
            # an empty slot never passes a slab test of a finite ray; a NaN ray passes every
            # one, so empty slots are also masked by their count
            h0 = h0 and meta[nd, np.uint64(ROW_COUNT), 0] >= 0
            h1 = h1 and meta[nd, ROW_COUNT, 1] >= 0
            h2 = h2 and meta[nd, ROW_COUNT, 2] >= 0
            h3 = h3 and meta[nd, ROW_COUNT, 3] >= 0
            nh = int(h0) + int(h1) + int(h2) + int(h3)
            if nh == 1:  # one child: enter it without touching the stack
                j = 0 if h0 else (1 if h1 else (2 if h2 else 3))
                entry = _entry(meta, nd, j, node_base)
                continue
            if nh > 1:
                e0 = _entry(meta, nd, 0, node_base)
                e1 = _entry(meta, nd, 1, node_base)
                e2 = _entry(meta, nd, 2, node_base)
                e3 = _entry(meta, nd, 3, node_base)
                k0, k1, k2, k3 = (k0 if h0 else inf), (k1 if h1 else inf), (k2 if h2 else inf), (k3 if h3 else inf)
                # sort the four by entry distance (a five-exchange network), push farthest first
                k0, e0, h0, k1, e1, h1 = _order(k0, e0, h0, k1, e1, h1)
                k2, e2, h2, k3, e3, h3 = _order(k2, e2, h2, k3, e3, h3)
                k0, e0, h0, k2, e2, h2 = _order(k0, e0, h0, k2, e2, h2)
                k1, e1, h1, k3, e3, h3 = _order(k1, e1, h1, k3, e3, h3)
                k1, e1, h1, k2, e2, h2 = _order(k1, e1, h1, k2, e2, h2)
                if sp <= room:  # a full stack (never, for trees build_bvh makes) drops them
                    if h3:
                        stack[2 * sp], stack[2 * sp + 1] = k3, e3
                        sp += 1
                    if h2:
                        stack[2 * sp], stack[2 * sp + 1] = k2, e2
                        sp += 1
                    if h1:
                        stack[2 * sp], stack[2 * sp + 1] = k1, e1
                        sp += 1
                    entry = e0
                    continue
        else:  # a leaf
            s = np.uint64(-1 - entry)
            nd = s // np.uint64(WIDTH)
            js = s % np.uint64(WIDTH)
            first = tbase + np.int64(meta[nd, ROW_CHILD, js])
            last = first + np.int64(meta[nd, ROW_COUNT, js])
            if tris_end.shape[0] == 0:  # four triangles at a time (wide_triangles.py; same hits)
                best_t, best_k, best_u, best_v = closest_in_leaf(tris, first, last, kx, ky, kz, okx, oky, okz,
                                                                 sx, sy, sz, tmin, best_t, best_k, best_u, best_v)
            else:
                for k in range(first, last):
                    h, t, u, v = _leaf(tris, tris_end, np.uint64(k), k + shift, w, kx, ky, kz, okx, oky, okz,
                                       sx, sy, sz, tmin, best_t)
                    if h:
                        best_t, best_k, best_u, best_v = t, k, u, v
        while True:  # pop the next entry that still begins before the closest hit
            if sp == 0:
                return best_t, best_k, best_u, best_v
            sp -= 1
            if stack[2 * sp] <= best_t:
                entry = np.int64(stack[2 * sp + 1])
                break


@borrowing()
def occluded_wide(box, meta, tris, node_base, tri_base, ox, oy, oz, dx, dy, dz, tmin, tmax, stack):
    """True if any triangle of the mesh is hit in (tmin, tmax): shadow rays, first hit wins."""
    return occluded_wide_at(box, meta, tris, tris[:0], node_base, tri_base, 0, 0.0,
                            ox, oy, oz, dx, dy, dz, tmin, tmax, stack)


@borrowing()
def occluded_wide_at(box, meta, tris, tris_end, node_base, tri_base, end_base, w,
                     ox, oy, oz, dx, dy, dz, tmin, tmax, stack):
    """`occluded_wide` for a mesh that may deform (see bvh.intersect_mesh_at)."""
    if node_base < 0 or node_base >= box.shape[0]:
        return False
    idx, idy, idz = inverse(dx), inverse(dy), inverse(dz)
    kx, ky, kz, okx, oky, okz, sx, sy, sz = _ray_frame(ox, oy, oz, dx, dy, dz)
    nx = np.uint64(BOX_HI if idx < 0.0 else BOX_LO)
    ny = np.uint64(BOX_HI + 1 if idy < 0.0 else BOX_LO + 1)
    nz = np.uint64(BOX_HI + 2 if idz < 0.0 else BOX_LO + 2)
    fx, fy, fz = np.uint64(3) - nx, np.uint64(5) - ny, np.uint64(7) - nz
    tbase = np.int64(tri_base)
    shift = np.int64(end_base) - np.int64(tri_base)
    room = stack.shape[0] - WIDTH
    sp = 0
    entry = np.int64(node_base)
    while True:
        if entry >= 0:
            nd = np.uint64(entry)
            mask, k0, k1, k2, k3 = slabs4(box, nd, nx, ny, nz, fx, fy, fz, ox, oy, oz, idx, idy, idz, tmin, tmax)
            h0, h1, h2, h3 = (mask & 1) != 0, (mask & 2) != 0, (mask & 4) != 0, (mask & 8) != 0
            if sp <= room:
                if h3 and meta[nd, ROW_COUNT, 3] >= 0:
                    stack[sp] = _entry(meta, nd, 3, node_base)
                    sp += 1
                if h2 and meta[nd, ROW_COUNT, 2] >= 0:
                    stack[sp] = _entry(meta, nd, 2, node_base)
                    sp += 1
                if h1 and meta[nd, ROW_COUNT, 1] >= 0:
                    stack[sp] = _entry(meta, nd, 1, node_base)
                    sp += 1
                if h0 and meta[nd, np.uint64(ROW_COUNT), 0] >= 0:
                    stack[sp] = _entry(meta, nd, 0, node_base)
                    sp += 1
        else:
            s = np.uint64(-1 - entry)
            nd = s // np.uint64(WIDTH)
            js = s % np.uint64(WIDTH)
            first = tbase + np.int64(meta[nd, ROW_CHILD, js])
            last = first + np.int64(meta[nd, ROW_COUNT, js])
            if tris_end.shape[0] == 0:
                if any_in_leaf(tris, first, last, kx, ky, kz, okx, oky, okz, sx, sy, sz, tmin, tmax):
                    return True
            else:
                for k in range(first, last):
                    h, t, u, v = _leaf(tris, tris_end, np.uint64(k), k + shift, w, kx, ky, kz, okx, oky, okz,
                                       sx, sy, sz, tmin, tmax)
                    if h:
                        return True
        if sp == 0:
            return False
        sp -= 1
        entry = np.int64(stack[sp])


# ------------------------------------------------------------------------------------------
# batches (tests, benchmarks)


@njit(cache=True, parallel=True)
def _cast(box, meta, tris, origins, dirs, tmin, tmax, chunk, t_out, k_out):
    n = origins.shape[0]
    for c in prange((n + chunk - 1) // chunk):
        stack = traversal_stack()  # one per chunk of rays, reused for each ray
        for i in range(c * chunk, min(n, (c + 1) * chunk)):
            t, k, u, v = intersect_wide(box, meta, tris, 0, 0, origins[i, 0], origins[i, 1],
                                        origins[i, 2], dirs[i, 0], dirs[i, 1], dirs[i, 2], tmin, tmax, stack)
            t_out[i] = t
            k_out[i] = k


@njit(cache=True, parallel=True)
def _cast_occluded(box, meta, tris, origins, dirs, tmin, tmax, chunk, out):
    n = origins.shape[0]
    for c in prange((n + chunk - 1) // chunk):
        stack = traversal_stack()
        for i in range(c * chunk, min(n, (c + 1) * chunk)):
            out[i] = occluded_wide(box, meta, tris, 0, 0, origins[i, 0], origins[i, 1], origins[i, 2],
                                   dirs[i, 0], dirs[i, 1], dirs[i, 2], tmin, tmax[i], stack)


def cast_wide(wide: WideBVH, tris, origins, dirs, t_out, k_out, tmin: float = 0.0, tmax: float = math.inf,
              chunk: int = 256) -> None:
    """Closest hits of many rays against one mesh, like bvh.cast, through the wide tree."""
    _cast(wide.box, wide.meta, tris, origins, dirs, float(tmin), float(tmax), int(chunk),
          t_out, k_out)


def cast_wide_occluded(wide: WideBVH, tris, origins, dirs, tmax, out, tmin: float = 0.0, chunk: int = 256) -> None:
    """Shadow-ray batch like bvh.cast_occluded, through the wide tree."""
    _cast_occluded(wide.box, wide.meta, tris, origins, dirs, float(tmin), tmax, int(chunk), out)
