"""Traversals of the eight-wide BVH (wide_bvh.py): closest hit and any hit (shadow rays), for
meshes that stand still and meshes that deform, one ray at a time, and batches of rays for
tests and benchmarks.

The traversals compute the slab tests in float32, one fused multiply-add a plane, with terms
rounded outwards so that no box the ray meets is missed and entry distances are lower bounds
(wide_slabs.py; the float64 `intersect.ray_box` of the binary reference widens the far
distance after Ize 2013 instead). They choose each axis's near plane by the sign of the ray's
direction instead of swapping, visit the nearest hit child first and keep the entry
distance of every pushed child on the stack, so a child that lies beyond the closest hit found
since is dropped when popped without reading its node. One child entered is visited at once,
two are ordered by one comparison; of more, only the nearest is brought to the top (sorting
them all was no faster). What a child's visit will read, its node record or a leaf's triangle
rows, is asked for from memory as soon as the child is known (prefetch.py): by the closest-hit
traversal for every child entered but a lone interior one (entered at once), by the shadow
traversal for every child it pushes (a child dropped when popped has then been fetched all the
same). A node of at most four children (its slot HALF empty) is tested on four lanes. A leaf's
triangles are tested four at a time (wide_triangles.py), with the same hits as one by one in row
order; a deforming mesh's still one by one. The binary traversals of bvh.py stay as the
readable reference; tests/engine/test_wide_bvh.py checks that both agree.

Each interior child entered also has the first lines of its leaf span asked for
(`wide_bvh.leaf_spans`), so the rows of the leaf the ray reaches next are on their way a node
visit before it gets there. Measured on one thread, the same rays and hits, alternating rounds
against the traversal without spans (2026-12-04, medians of 16-24 per-round ratios; the static
kernels' split below included): on the 1.31 M-triangle sphere of bench/rays.py incoherent
closest hits 1.22x as fast, shadow rays 1.22x, camera rays 1.00x; on 82 k triangles 1.07x,
1.03x and 0.99x. A traversal on a mesh larger than the caches waits mostly on memory: before,
perf sampled 21 % of the time on a node's first load and 16-18 % on a leaf's.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange
from numba.cpython.unsafe.numbers import trailing_zeros

from .borrowing import borrowing
from .bvh import _leaf, _ray_frame
from .prefetch import prefetch_leaf, prefetch_node, prefetch_span
from .wide_bvh import (BOX_HI, BOX_LO, HALF, ROW_CHILD, ROW_COUNT, SLOT_EMPTY, SPAN_FIRST, SPAN_ROWS, WIDE_STACK,
                       WIDTH, WideBVH)
from .wide_slabs import A_FAR, A_NEAR, B_FAR, B_NEAR, fma32, interval32, ray_planes, slab_test
from .wide_triangles import any_in_leaf, closest_in_leaf

# where in the traversal scratch the slab test leaves its WIDTH entry distances
DIST_AT = 2 * WIDE_STACK

slabs = slab_test(WIDTH)  # the children's slab tests as one vector computation (wide_slabs.py)
slabs_half = slab_test(HALF, WIDTH)  # the same on the first half: a node of at most HALF children


@njit(cache=True)
def traversal_stack():
    """Scratch for the wide traversals: (2 * WIDE_STACK + WIDTH,) float64 holding (entry
    distance, entry) pairs, then a node's entry distances at DIST_AT. Allocate one per thread or
    chunk of rays and reuse it for every ray."""
    return np.empty(2 * WIDE_STACK + WIDTH, np.float64)


@njit(cache=True, inline="always")
def _slab(box, nd, j, nx, ny, nz, fx, fy, fz, planes, tmin, tmax):
    """Slab test of child slot j of node nd in float32 (wide_slabs.py's docstring); nx, ny, nz:
    the rows of the near planes (BOX_HI + axis where the direction is negative); planes: from
    `ray_planes`; tmin, tmax: float32 from `interval32`. The readable reference of `slabs`
    (wide_slabs.py), which the traversals use (every slot at once): (entered, entry distance)."""
    tn = tmin
    tf = tmax
    t0 = fma32(box[nd, nx, j], planes[A_NEAR + 0], planes[B_NEAR + 0])
    t1 = fma32(box[nd, fx, j], planes[A_FAR + 0], planes[B_FAR + 0])
    tn = t0 if t0 > tn else tn
    tf = t1 if t1 < tf else tf
    t0 = fma32(box[nd, ny, j], planes[A_NEAR + 1], planes[B_NEAR + 1])
    t1 = fma32(box[nd, fy, j], planes[A_FAR + 1], planes[B_FAR + 1])
    tn = t0 if t0 > tn else tn
    tf = t1 if t1 < tf else tf
    t0 = fma32(box[nd, nz, j], planes[A_NEAR + 2], planes[B_NEAR + 2])
    t1 = fma32(box[nd, fz, j], planes[A_FAR + 2], planes[B_FAR + 2])
    tn = t0 if t0 > tn else tn
    tf = t1 if t1 < tf else tf
    return tn <= tf, np.float64(tn)


@njit(cache=True, inline="always")
def _entry(meta, nd, j, base):
    """Stack entry of slot j: an interior child's absolute node, or -1 - slot for a leaf."""
    c = meta[nd, ROW_COUNT, j]
    if c == 0:
        return np.int64(base) + np.int64(meta[nd, ROW_CHILD, j])
    return -1 - (np.int64(nd) * WIDTH + j)


@njit(cache=True, inline="always")
def _children(box, meta, nd, nx, ny, nz, fx, fy, fz, planes, tmin, tmax, stack):
    """The slab tests of node nd's children at once (wide_slabs.py; the same bits as _slab): the
    mask of those entered, their entry distances left at stack[DIST_AT + j]. A node of at most
    HALF children (its slot HALF empty) is tested on HALF lanes. tmin, tmax: float64."""
    t0, t1 = interval32(tmin, tmax)
    if meta[nd, np.uint64(ROW_COUNT), np.uint64(HALF)] == SLOT_EMPTY:
        return slabs_half(box, nd, nx, ny, nz, fx, fy, fz, planes, t0, t1, stack, DIST_AT)
    return slabs(box, nd, nx, ny, nz, fx, fy, fz, planes, t0, t1, stack, DIST_AT)


@njit(cache=True, inline="always")
def _prefetch_span(span, tris, child, tbase):
    """Ask early for the first lines of interior node `child`'s leaf span (absolute node index;
    nothing for a node without leaf children)."""
    rows = span[child, np.uint64(SPAN_ROWS)]
    if rows > 0:
        prefetch_span(tris, tbase + np.int64(span[child, np.uint64(SPAN_FIRST)]), rows)


@njit(cache=True, inline="always")
def _prefetch_child(box, meta, span, tris, nd, j, node_base, tbase):
    """Ask early for what visiting child slot j of node nd will read (prefetch.py): an interior
    child's node record and the start of its leaf span, a leaf's triangle rows; nothing for an
    empty slot."""
    c = meta[nd, np.uint64(ROW_COUNT), j]
    if c == 0:
        child = np.uint64(np.int64(node_base) + np.int64(meta[nd, np.uint64(ROW_CHILD), j]))
        prefetch_node(box, child, 1)
        _prefetch_span(span, tris, child, tbase)
    elif c > 0:
        prefetch_leaf(tris, tbase + np.int64(meta[nd, np.uint64(ROW_CHILD), j]), c)


@njit(cache=True, inline="always")
def _near_rows(planes):
    """The rows of each axis's near and far planes, by the direction's sign:
    (nx, ny, nz, fx, fy, fz) as uint64."""
    nx = np.uint64(BOX_HI if planes[A_NEAR + 0] < 0.0 else BOX_LO)
    ny = np.uint64(BOX_HI + 1 if planes[A_NEAR + 1] < 0.0 else BOX_LO + 1)
    nz = np.uint64(BOX_HI + 2 if planes[A_NEAR + 2] < 0.0 else BOX_LO + 2)
    return nx, ny, nz, np.uint64(3) - nx, np.uint64(5) - ny, np.uint64(7) - nz


@borrowing()
def intersect_wide(box, meta, span, tris, node_base, tri_base, ox, oy, oz, dx, dy, dz, tmin, tmax, stack):
    """Closest hit in (tmin, tmax) of one wide mesh BVH: (t, k, u, v), as bvh.intersect_mesh.

    box, meta, span: a `WideBVH`'s arrays (or the concatenated ones of several trees);
    node_base: the absolute index of this tree's root in them; tri_base: of its first triangle
    row in `tris`; stack: from `traversal_stack`.
    """
    return _closest(box, meta, span, tris, tris[:0], node_base, tri_base, 0, 0.0, False,
                    ox, oy, oz, dx, dy, dz, tmin, tmax, stack)


@borrowing()
def intersect_wide_at(box, meta, span, tris, tris_end, node_base, tri_base, end_base, w,
                      ox, oy, oz, dx, dy, dz, tmin, tmax, stack):
    """`intersect_wide` for a mesh that may deform (see bvh.intersect_mesh_at)."""
    return _closest(box, meta, span, tris, tris_end, node_base, tri_base, end_base, w, True,
                    ox, oy, oz, dx, dy, dz, tmin, tmax, stack)


# The two kernels above are one traversal inlined twice: `deforming` is a constant in each, so
# the static one compiles without the deforming leaf test. Measured on one thread, the same rays
# and hits, alternating rounds (2026-12-04, medians of 10 per-round ratios): a kernel holding
# both leaf tests ran incoherent closest hits on the 1.31 M-triangle sphere of bench/rays.py
# 0.94-1.0x as fast as one without the deforming test (the same code otherwise).
@njit(cache=True, inline="always")
def _closest(box, meta, span, tris, tris_end, node_base, tri_base, end_base, w, deforming,
             ox, oy, oz, dx, dy, dz, tmin, tmax, stack):
    best_t, best_k, best_u, best_v = tmax, np.int64(-1), 0.0, 0.0
    if node_base < 0 or node_base >= box.shape[0]:  # an empty tree: nothing to hit
        return best_t, best_k, best_u, best_v
    planes = ray_planes(ox, oy, oz, dx, dy, dz)
    kx, ky, kz, okx, oky, okz, sx, sy, sz = _ray_frame(ox, oy, oz, dx, dy, dz)
    nx, ny, nz, fx, fy, fz = _near_rows(planes)
    tbase = np.int64(tri_base)
    shift = np.int64(end_base) - np.int64(tri_base)
    room = WIDE_STACK - WIDTH
    sp = 0
    entry = np.int64(node_base)
    while True:
        if entry >= 0:
            nd = np.uint64(entry)
            mask = _children(box, meta, nd, nx, ny, nz, fx, fy, fz, planes, tmin, best_t, stack)
            if mask != 0:
                j0 = np.uint64(trailing_zeros(mask))
                rest = mask & (mask - 1)
                # an empty slot never passes a slab test of a finite ray; a NaN ray passes every
                # one, so empty slots are also told by their count (the general case below)
                c0 = meta[nd, np.uint64(ROW_COUNT), j0]
                if rest == 0 and c0 >= 0:  # one child: enter it without touching the stack
                    if c0 > 0:  # a leaf: its later groups of four asked for now (prefetch.py)
                        prefetch_leaf(tris, tbase + np.int64(meta[nd, np.uint64(ROW_CHILD), j0]), c0)
                    entry = _entry(meta, nd, j0, node_base)
                    if c0 == 0:  # an interior node: its record is read at once, its leaves next
                        _prefetch_span(span, tris, np.uint64(entry), tbase)
                    continue
                j1 = np.uint64(trailing_zeros(rest))
                if rest & (rest - 1) == 0 and c0 >= 0 and meta[nd, np.uint64(ROW_COUNT), j1] >= 0 and sp <= room:
                    # two: push the farther, enter the nearer
                    k0, k1 = stack[np.uint64(DIST_AT) + j0], stack[np.uint64(DIST_AT) + j1]
                    e0, e1 = _entry(meta, nd, j0, node_base), _entry(meta, nd, j1, node_base)
                    _prefetch_child(box, meta, span, tris, nd, j0, node_base, tbase)
                    _prefetch_child(box, meta, span, tris, nd, j1, node_base, tbase)
                    if k1 < k0:
                        k0, e0, k1, e1 = k1, e1, k0, e0
                    stack[2 * sp], stack[2 * sp + 1] = k1, e1
                    sp += 1
                    entry = e0
                    continue
                if sp <= room:  # more: push them, then bring the nearest to the top (a full
                    base = sp  # stack, never for trees build_bvh makes, drops them)
                    m = mask
                    near = sp
                    while m != 0:
                        j = np.uint64(trailing_zeros(m))
                        m &= m - 1
                        if meta[nd, np.uint64(ROW_COUNT), j] < 0:
                            continue
                        k = stack[np.uint64(DIST_AT) + j]
                        stack[2 * sp], stack[2 * sp + 1] = k, _entry(meta, nd, j, node_base)
                        _prefetch_child(box, meta, span, tris, nd, j, node_base, tbase)
                        if k < stack[2 * near] or sp == base:
                            near = sp
                        sp += 1
                    if sp > base:
                        top = sp - 1
                        k, e = stack[2 * near], stack[2 * near + 1]
                        stack[2 * near], stack[2 * near + 1] = stack[2 * top], stack[2 * top + 1]
                        stack[2 * top], stack[2 * top + 1] = k, e
        else:  # a leaf
            s = np.uint64(-1 - entry)
            nd = s // np.uint64(WIDTH)
            js = s % np.uint64(WIDTH)
            first = tbase + np.int64(meta[nd, ROW_CHILD, js])
            last = first + np.int64(meta[nd, ROW_COUNT, js])
            if not deforming or tris_end.shape[0] == 0:  # four at a time (wide_triangles.py; same hits)
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
def occluded_wide(box, meta, span, tris, node_base, tri_base, ox, oy, oz, dx, dy, dz, tmin, tmax, stack):
    """True if any triangle of the mesh is hit in (tmin, tmax): shadow rays, first hit wins."""
    return _occluded(box, meta, span, tris, tris[:0], node_base, tri_base, 0, 0.0, False,
                     ox, oy, oz, dx, dy, dz, tmin, tmax, stack)


@borrowing()
def occluded_wide_at(box, meta, span, tris, tris_end, node_base, tri_base, end_base, w,
                     ox, oy, oz, dx, dy, dz, tmin, tmax, stack):
    """`occluded_wide` for a mesh that may deform (see bvh.intersect_mesh_at)."""
    return _occluded(box, meta, span, tris, tris_end, node_base, tri_base, end_base, w, True,
                     ox, oy, oz, dx, dy, dz, tmin, tmax, stack)


@njit(cache=True, inline="always")
def _occluded(box, meta, span, tris, tris_end, node_base, tri_base, end_base, w, deforming,
              ox, oy, oz, dx, dy, dz, tmin, tmax, stack):
    if node_base < 0 or node_base >= box.shape[0]:
        return False
    planes = ray_planes(ox, oy, oz, dx, dy, dz)
    kx, ky, kz, okx, oky, okz, sx, sy, sz = _ray_frame(ox, oy, oz, dx, dy, dz)
    nx, ny, nz, fx, fy, fz = _near_rows(planes)
    tbase = np.int64(tri_base)
    shift = np.int64(end_base) - np.int64(tri_base)
    room = DIST_AT - WIDTH
    sp = 0
    entry = np.int64(node_base)
    while True:
        if entry >= 0:
            nd = np.uint64(entry)
            m = _children(box, meta, nd, nx, ny, nz, fx, fy, fz, planes, tmin, tmax, stack)
            if sp <= room:
                while m != 0:  # every child entered, in any order: the first hit ends it
                    j = np.uint64(trailing_zeros(m))
                    m &= m - 1
                    if meta[nd, np.uint64(ROW_COUNT), j] >= 0:
                        stack[sp] = _entry(meta, nd, j, node_base)
                        sp += 1
                        _prefetch_child(box, meta, span, tris, nd, j, node_base, tbase)
        else:
            s = np.uint64(-1 - entry)
            nd = s // np.uint64(WIDTH)
            js = s % np.uint64(WIDTH)
            first = tbase + np.int64(meta[nd, ROW_CHILD, js])
            last = first + np.int64(meta[nd, ROW_COUNT, js])
            if not deforming or tris_end.shape[0] == 0:
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
def _cast(box, meta, span, tris, origins, dirs, tmin, tmax, chunk, t_out, k_out):
    n = origins.shape[0]
    for c in prange((n + chunk - 1) // chunk):
        stack = traversal_stack()  # one per chunk of rays, reused for each ray
        for i in range(c * chunk, min(n, (c + 1) * chunk)):
            t, k, u, v = intersect_wide(box, meta, span, tris, 0, 0, origins[i, 0], origins[i, 1],
                                        origins[i, 2], dirs[i, 0], dirs[i, 1], dirs[i, 2], tmin, tmax, stack)
            t_out[i] = t
            k_out[i] = k


@njit(cache=True, parallel=True)
def _cast_occluded(box, meta, span, tris, origins, dirs, tmin, tmax, chunk, out):
    n = origins.shape[0]
    for c in prange((n + chunk - 1) // chunk):
        stack = traversal_stack()
        for i in range(c * chunk, min(n, (c + 1) * chunk)):
            out[i] = occluded_wide(box, meta, span, tris, 0, 0, origins[i, 0], origins[i, 1], origins[i, 2],
                                   dirs[i, 0], dirs[i, 1], dirs[i, 2], tmin, tmax[i], stack)


def cast_wide(wide: WideBVH, tris, origins, dirs, t_out, k_out, tmin: float = 0.0, tmax: float = math.inf,
              chunk: int = 256) -> None:
    """Closest hits of many rays against one mesh, like bvh.cast, through the wide tree."""
    _cast(wide.box, wide.meta, wide.span, tris, origins, dirs, float(tmin), float(tmax), int(chunk),
          t_out, k_out)


def cast_wide_occluded(wide: WideBVH, tris, origins, dirs, tmax, out, tmin: float = 0.0, chunk: int = 256) -> None:
    """Shadow-ray batch like bvh.cast_occluded, through the wide tree."""
    _cast_occluded(wide.box, wide.meta, wide.span, tris, origins, dirs, float(tmin), tmax, int(chunk), out)
