"""Bounding volume hierarchies: a binned-SAH build over primitive bounds and ray traversal.

One builder serves every level: the triangles of a mesh and the instances of a scene are both
just (n, 3) boxes. The tree is a `BVH` NamedTuple of flat arrays in depth-first order:

* `lo`, `hi` (m, 3) float32: node bounds, rounded outward so they contain the float64 boxes;
* `a` (m,) int32: interior node -> index of its right child (the left child is i + 1);
  leaf -> first position in `order`;
* `count` (m,) int32: 0 for an interior node, the number of primitives for a leaf;
* `axis` (m,) int8: the split axis of an interior node (near child first by the ray's sign);
* `order` (n,) int32: primitive ids in leaf order.

Node indices are local (root = 0), so many BVHs concatenate into one array; a traversal takes
`node_base` (where this tree's root sits) and `tri_base` (where its packed triangles start).

Build: Wald, "On fast construction of SAH-based bounding volume hierarchies", IEEE Symposium
on Interactive Ray Tracing 2007: centroids binned into `bins` equal slots per axis, the
surface area heuristic evaluated at every slot boundary of all three axes.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from numba import njit, prange

from .intersect import inverse, ray_box_at, ray_setup, sheared_triangle

STACK_SIZE = 64
# Past this depth the builder splits at object medians: no tree is deeper than
# MEDIAN_DEPTH + log2(n) < STACK_SIZE, so a traversal stack of 64 entries always suffices.
MEDIAN_DEPTH = 32
# The smallest subtree build_bvh hands to a thread of its own by default (rule of thumb: a few
# thousand primitives take ~1 ms, well above the cost of starting a parallel loop).
SUBTREE_MIN = 4096


class BVH(NamedTuple):
    lo: np.ndarray  # (m, 3) float32
    hi: np.ndarray  # (m, 3) float32
    a: np.ndarray  # (m,) int32
    count: np.ndarray  # (m,) int32
    axis: np.ndarray  # (m,) int8
    order: np.ndarray  # (n,) int32


def empty_stack() -> np.ndarray:
    """A traversal stack, (STACK_SIZE,) int32: allocate one per thread or row, reuse per ray."""
    return np.empty(STACK_SIZE, np.int32)


# ------------------------------------------------------------------------------------------
# build


@njit(cache=True, inline="always")
def _area(x0, y0, z0, x1, y1, z1):
    ex, ey, ez = x1 - x0, y1 - y0, z1 - z0
    return ex * ey + ey * ez + ez * ex  # half the surface area: only ratios matter


@njit(cache=True, inline="always")
def _down(x):  # the largest float32 <= x; _up: the smallest >= x
    f = np.float32(x)
    return np.nextafter(f, np.float32(-np.inf)) if f > x else f


@njit(cache=True, inline="always")
def _up(x):
    f = np.float32(x)
    return np.nextafter(f, np.float32(np.inf)) if f < x else f


# rows of the deferred-subtree table (`_build_range`)
SUB_START = 0
SUB_END = 1
SUB_NODE = 2
SUB_DEPTH = 3


@njit(cache=True)
def _build_range(lo, hi, cen, s0, e0, depth0, node0, defer, leaf_size, max_leaf, trav_cost, bins, median_depth,
                 node_lo, node_hi, node_a, node_count, node_axis, order, deferred):
    """Build the subtree over primitives order[s0:e0] at depth depth0, its root at node node0 and
    its nodes after it in depth-first order (left child at i + 1); returns (next free node, number
    of subtrees deferred).

    defer > 0: a node of more than leaf_size and at most `defer` primitives is not built here: its
    (start, end, node, depth) goes into the next row of `deferred` (SUB_* columns) and 2·cnt − 1
    nodes, the most a subtree of cnt primitives can take, are kept free for it. When `deferred`
    is full, nodes are built here instead."""
    bcount = np.zeros((3, bins), np.int64)
    bbox = np.empty((3, bins, 6), np.float64)
    right_area = np.empty(bins, np.float64)
    # task stack: (start, end, parent to patch with our index or -1, depth)
    task = np.empty((256, 4), np.int64)
    task[0, 0], task[0, 1], task[0, 2], task[0, 3] = s0, e0, -1, depth0
    ntask = 1
    m = node0
    ndef = 0
    while ntask > 0:
        ntask -= 1
        s, e, parent, depth = task[ntask, 0], task[ntask, 1], task[ntask, 2], task[ntask, 3]
        node = m
        if parent >= 0:
            node_a[parent] = node
        if leaf_size < e - s <= defer and ndef < deferred.shape[0]:
            deferred[ndef, SUB_START], deferred[ndef, SUB_END] = s, e
            deferred[ndef, SUB_NODE], deferred[ndef, SUB_DEPTH] = node, depth
            ndef += 1
            m += 2 * (e - s) - 1
            continue
        m += 1
        # bounds of the primitives and of their centroids
        bx0 = by0 = bz0 = cx0 = cy0 = cz0 = np.inf
        bx1 = by1 = bz1 = cx1 = cy1 = cz1 = -np.inf
        for j in range(s, e):
            p = order[j]
            bx0, by0, bz0 = min(bx0, lo[p, 0]), min(by0, lo[p, 1]), min(bz0, lo[p, 2])
            bx1, by1, bz1 = max(bx1, hi[p, 0]), max(by1, hi[p, 1]), max(bz1, hi[p, 2])
            cx0, cy0, cz0 = min(cx0, cen[p, 0]), min(cy0, cen[p, 1]), min(cz0, cen[p, 2])
            cx1, cy1, cz1 = max(cx1, cen[p, 0]), max(cy1, cen[p, 1]), max(cz1, cen[p, 2])
        node_lo[node, 0], node_lo[node, 1], node_lo[node, 2] = _down(bx0), _down(by0), _down(bz0)
        node_hi[node, 0], node_hi[node, 1], node_hi[node, 2] = _up(bx1), _up(by1), _up(bz1)
        cnt = e - s
        if cnt <= leaf_size:
            node_a[node] = s
            node_count[node] = cnt
            continue
        node_count[node] = 0
        cmin = (cx0, cy0, cz0)
        ext = (cx1 - cx0, cy1 - cy0, cz1 - cz0)
        best_axis = -1
        best_split = 0
        best_cost = np.inf
        scale = (bins * (1.0 - 1e-9) / ext[0] if ext[0] > 0.0 else 0.0,
                 bins * (1.0 - 1e-9) / ext[1] if ext[1] > 0.0 else 0.0,
                 bins * (1.0 - 1e-9) / ext[2] if ext[2] > 0.0 else 0.0)
        if depth < median_depth:
            for ax in range(3):
                if ext[ax] <= 0.0:
                    continue
                for b in range(bins):
                    bcount[ax, b] = 0
                    bbox[ax, b, 0] = bbox[ax, b, 1] = bbox[ax, b, 2] = np.inf
                    bbox[ax, b, 3] = bbox[ax, b, 4] = bbox[ax, b, 5] = -np.inf
            for j in range(s, e):
                p = order[j]
                for ax in range(3):
                    if ext[ax] <= 0.0:
                        continue
                    b = min(int((cen[p, ax] - cmin[ax]) * scale[ax]), bins - 1)
                    bcount[ax, b] += 1
                    bb = bbox[ax, b]
                    bb[0], bb[1], bb[2] = min(bb[0], lo[p, 0]), min(bb[1], lo[p, 1]), min(bb[2], lo[p, 2])
                    bb[3], bb[4], bb[5] = max(bb[3], hi[p, 0]), max(bb[4], hi[p, 1]), max(bb[5], hi[p, 2])
            # sweep from the right for suffix areas, then from the left evaluating the SAH
            for ax in range(3):
                if ext[ax] <= 0.0:
                    continue
                x0 = y0 = z0 = np.inf
                x1 = y1 = z1 = -np.inf
                for b in range(bins - 1, 0, -1):
                    bb = bbox[ax, b]
                    x0, y0, z0 = min(x0, bb[0]), min(y0, bb[1]), min(z0, bb[2])
                    x1, y1, z1 = max(x1, bb[3]), max(y1, bb[4]), max(z1, bb[5])
                    right_area[b] = _area(x0, y0, z0, x1, y1, z1)
                x0 = y0 = z0 = np.inf
                x1 = y1 = z1 = -np.inf
                nl = 0
                for b in range(bins - 1):
                    bb = bbox[ax, b]
                    x0, y0, z0 = min(x0, bb[0]), min(y0, bb[1]), min(z0, bb[2])
                    x1, y1, z1 = max(x1, bb[3]), max(y1, bb[4]), max(z1, bb[5])
                    nl += bcount[ax, b]
                    nr = cnt - nl
                    if nl == 0 or nr == 0:
                        continue
                    cost = _area(x0, y0, z0, x1, y1, z1) * nl + right_area[b + 1] * nr
                    if cost < best_cost:
                        best_cost, best_axis, best_split = cost, ax, b + 1
        if cnt <= max_leaf and cnt * _area(bx0, by0, bz0, bx1, by1, bz1) <= (
                trav_cost * _area(bx0, by0, bz0, bx1, by1, bz1) + best_cost):
            node_a[node] = s  # SAH termination: intersecting all of them is cheaper than a split
            node_count[node] = cnt
            continue
        if best_axis >= 0:
            # partition [s, e) so primitives of slots < best_split come first
            sc = scale[best_axis]
            c0 = cmin[best_axis]
            i, j = s, e - 1
            while i <= j:
                if min(int((cen[order[i], best_axis] - c0) * sc), bins - 1) < best_split:
                    i += 1
                else:
                    order[i], order[j] = order[j], order[i]
                    j -= 1
            mid = i
        else:
            # too deep, or all centroids coincide: object median along the widest extent
            best_axis = 0 if ext[0] >= ext[1] and ext[0] >= ext[2] else (1 if ext[1] >= ext[2] else 2)
            keys = np.empty(cnt, np.float64)
            for j in range(s, e):
                keys[j - s] = cen[order[j], best_axis]
            perm = np.argsort(keys, kind="mergesort")
            seg = order[s:e].copy()
            for j in range(cnt):
                order[s + j] = seg[perm[j]]
            mid = s + cnt // 2
        node_axis[node] = best_axis
        # right child first onto the stack, so the left one is built next and lands at node + 1
        task[ntask, 0], task[ntask, 1], task[ntask, 2], task[ntask, 3] = mid, e, node, depth + 1
        task[ntask + 1, 0], task[ntask + 1, 1], task[ntask + 1, 2], task[ntask + 1, 3] = s, mid, -1, depth + 1
        ntask += 2
    return m, ndef


@njit(cache=True, parallel=True)
def _build_deferred(lo, hi, cen, deferred, count, leaf_size, max_leaf, trav_cost, bins, median_depth,
                    node_lo, node_hi, node_a, node_count, node_axis, order):
    """Build the deferred subtrees side by side on numba's threads. Each one writes only its own
    rows of `order` and its own block of nodes, so the result is the same for any thread count."""
    for i in prange(count):
        _build_range(lo, hi, cen, deferred[i, SUB_START], deferred[i, SUB_END], deferred[i, SUB_DEPTH],
                     deferred[i, SUB_NODE], 0, leaf_size, max_leaf, trav_cost, bins, median_depth,
                     node_lo, node_hi, node_a, node_count, node_axis, order, deferred[:0])


@njit(cache=True)
def _compact(node_lo, node_hi, node_a, node_count, node_axis, used):
    """Renumber the nodes reachable from the root 0 in depth-first order (left child first),
    dropping the unused rows of the deferred blocks; returns the compacted arrays."""
    new = np.full(used, -1, np.int64)
    stack = np.empty(256, np.int64)
    stack[0] = 0
    sp = 1
    m = 0
    while sp > 0:  # preorder: a node, then its left subtree (at old i + 1), then its right one
        sp -= 1
        i = stack[sp]
        new[i] = m
        m += 1
        if node_count[i] == 0:
            stack[sp] = node_a[i]
            stack[sp + 1] = i + 1
            sp += 2
    lo = np.empty((m, 3), np.float32)
    hi = np.empty((m, 3), np.float32)
    a = np.empty(m, np.int32)
    count = np.empty(m, np.int32)
    axis = np.empty(m, np.int8)
    for i in range(used):
        j = new[i]
        if j < 0:
            continue
        lo[j], hi[j] = node_lo[i], node_hi[i]
        count[j], axis[j] = node_count[i], node_axis[i]
        a[j] = node_a[i] if node_count[i] > 0 else new[node_a[i]]
    return lo, hi, a, count, axis


def build_bvh(lo, hi, leaf_size: int = 4, bins: int = 16, max_leaf: int = 0, trav_cost: float = 4.0,
              median_depth: int = MEDIAN_DEPTH, subtree_size: int | None = None) -> BVH:
    """Binned-SAH BVH over primitive boxes. lo, hi: (n, 3) float64, n >= 1.

    leaf_size: a node with at most this many primitives always becomes a leaf.
    max_leaf, trav_cost: SAH termination (MacDonald and Booth 1990) — a node of up to max_leaf
      primitives also becomes a leaf when testing them all costs no more than the best split,
      trav_cost being the price of a node visit relative to one primitive test. Off while
      max_leaf <= leaf_size (the default). For triangles max_leaf=16, trav_cost=4 measured
      faster for incoherent rays (bench/rays.py); never use it for costly primitives such as
      instances (a top level built with it rendered the courtyard 35% slower).
    bins: centroid slots per axis; median_depth: depth from which object-median splits bound
      the tree's height (so a traversal stack of STACK_SIZE entries always suffices).
    subtree_size: the top of the tree is built in this thread; below it, subtrees of at most
      this many primitives are built side by side on numba's threads (None: n / 64, at least
      SUBTREE_MIN; 0: the whole tree in this thread). Every split is decided from the node's own
      primitives alone, so the tree is the same for any value and any thread count.
    """
    lo = np.ascontiguousarray(lo, np.float64)
    hi = np.ascontiguousarray(hi, np.float64)
    n = len(lo)
    if n == 0 or lo.shape != (n, 3) or hi.shape != (n, 3):
        raise ValueError(f"build_bvh needs (n >= 1, 3) bounds, got {lo.shape} and {hi.shape}")
    if not (np.isfinite(lo).all() and np.isfinite(hi).all()):
        raise ValueError("build_bvh needs finite bounds (a NaN or inf vertex?)")
    if subtree_size is None:
        subtree_size = max(SUBTREE_MIN, n // 64)
    if subtree_size >= n:
        subtree_size = 0  # one subtree would be the whole tree
    size = max(2 * n - 1, 1)
    node_lo = np.empty((size, 3), np.float32)
    node_hi = np.empty((size, 3), np.float32)
    node_a = np.empty(size, np.int32)
    node_count = np.empty(size, np.int32)
    node_axis = np.zeros(size, np.int8)
    order = np.arange(n, dtype=np.int32)
    cen = (lo + hi) * 0.5  # allocated here, not in numba, so tracemalloc sees the whole build
    # room for the subtrees' table: beyond it nodes are built in this thread (same tree)
    deferred = np.empty((64 + 8 * (n // max(subtree_size, 1)) if subtree_size > 0 else 0, 4), np.int64)
    args = (int(leaf_size), int(max_leaf), float(trav_cost), int(bins), int(median_depth),
            node_lo, node_hi, node_a, node_count, node_axis, order)
    m, ndef = _build_range(lo, hi, cen, 0, n, 0, 0, int(subtree_size), *args, deferred)
    if ndef == 0:
        return BVH(node_lo[:m].copy(), node_hi[:m].copy(), node_a[:m].copy(), node_count[:m].copy(),
                   node_axis[:m].copy(), order)
    _build_deferred(lo, hi, cen, deferred, ndef, *args)
    return BVH(*_compact(node_lo, node_hi, node_a, node_count, node_axis, m), order)


def sah_cost(bvh: BVH, c_trav: float = 1.0, c_isect: float = 1.0) -> float:
    """Expected cost of a random ray through the root (MacDonald and Booth, "Heuristics for ray
    tracing using space subdivision", The Visual Computer 6(3), 1990): every node weighted by
    its surface area relative to the root's."""
    lo, hi = bvh.lo.astype(np.float64), bvh.hi.astype(np.float64)
    e = hi - lo
    area = e[:, 0] * e[:, 1] + e[:, 1] * e[:, 2] + e[:, 2] * e[:, 0]
    weight = np.where(bvh.count > 0, c_isect * bvh.count, c_trav)
    return float((weight * area).sum() / area[0])


@njit(cache=True, parallel=True)
def _corner_bounds(corners, lo, hi):
    for i in prange(corners.shape[0]):
        for ax in range(3):
            a = corners[i, 0, ax]
            b = a
            for c in range(1, corners.shape[1]):
                x = corners[i, c, ax]
                a = min(a, x)
                b = max(b, x)
            lo[i, ax] = a
            hi[i, ax] = b


def corner_bounds(corners) -> tuple[np.ndarray, np.ndarray]:
    """The boxes of polygons given by their corners: corners (n, k, 3) float64 (k = 3 for a
    triangle, 6 for a triangle in two poses) -> (lo, hi), each (n, 3) float64; the same values as
    corners.min(axis=1) and corners.max(axis=1), in one pass on numba's threads."""
    corners = np.ascontiguousarray(corners, np.float64)
    lo = np.empty((corners.shape[0], 3))
    hi = np.empty((corners.shape[0], 3))
    _corner_bounds(corners, lo, hi)
    return lo, hi


def pack_triangles(vertices, faces, order, dtype=np.float32) -> np.ndarray:
    """Triangle corners in leaf order: (f, 3, 3) `dtype`, row k holding face order[k].

    vertices: (v, 3) float64, faces: (f, 3) int, order: (f,) int32 from `build_bvh`.
    """
    v = np.asarray(vertices, np.float64).astype(dtype)  # round vertices once, then gather
    f = np.asarray(faces, np.int64)
    return np.ascontiguousarray(v[f[np.asarray(order)]])


# ------------------------------------------------------------------------------------------
# traversal. Node and triangle indices are uint64 in the loops below: numba wraps negative
# signed indices (a compare and an add per array access), which unsigned ones skip.
_U1 = np.uint64(1)


@njit(cache=True, inline="always")
def _leaf_triangle(tris, k, kx, ky, kz, okx, oky, okz, sx, sy, sz, tmin, tmax):
    return sheared_triangle(
        sx, sy, sz, tmin, tmax,
        tris[k, 0, kx] - okx, tris[k, 0, ky] - oky, tris[k, 0, kz] - okz,
        tris[k, 1, kx] - okx, tris[k, 1, ky] - oky, tris[k, 1, kz] - okz,
        tris[k, 2, kx] - okx, tris[k, 2, ky] - oky, tris[k, 2, kz] - okz,
    )


@njit(cache=True, inline="always")
def _leaf(tris, tris_end, k, ke, w, kx, ky, kz, okx, oky, okz, sx, sy, sz, tmin, tmax):
    """The leaf test of triangle k; for a deforming mesh (w > 0, or any time of a mesh with a
    second pose) the corners are blended linearly towards row ke of `tris_end`: (1 - w) a + w b."""
    if tris_end.shape[0] == 0:
        return _leaf_triangle(tris, k, kx, ky, kz, okx, oky, okz, sx, sy, sz, tmin, tmax)
    a = tris[k]
    b = tris_end[ke]
    return sheared_triangle(
        sx, sy, sz, tmin, tmax,
        a[0, kx] + w * (b[0, kx] - a[0, kx]) - okx, a[0, ky] + w * (b[0, ky] - a[0, ky]) - oky,
        a[0, kz] + w * (b[0, kz] - a[0, kz]) - okz,
        a[1, kx] + w * (b[1, kx] - a[1, kx]) - okx, a[1, ky] + w * (b[1, ky] - a[1, ky]) - oky,
        a[1, kz] + w * (b[1, kz] - a[1, kz]) - okz,
        a[2, kx] + w * (b[2, kx] - a[2, kx]) - okx, a[2, ky] + w * (b[2, ky] - a[2, ky]) - oky,
        a[2, kz] + w * (b[2, kz] - a[2, kz]) - okz,
    )


@njit(cache=True, inline="always")
def _ray_frame(ox, oy, oz, dx, dy, dz):
    kx, ky, kz, sx, sy, sz = ray_setup(dx, dy, dz)
    o = (ox, oy, oz)
    return np.uint64(kx), np.uint64(ky), np.uint64(kz), o[kx], o[ky], o[kz], sx, sy, sz


@njit(cache=True)
def intersect_mesh(node_lo, node_hi, node_a, node_count, node_axis, tris, node_base, tri_base,
                   ox, oy, oz, dx, dy, dz, tmin, tmax, stack):
    """Closest hit in (tmin, tmax) of one mesh BVH: (t, k, u, v).

    k: absolute row of `tris` (tri_base included) or -1 on a miss (then t = tmax); u, v: the
    barycentrics of the triangle's second and third corners. stack: (>= 64,) int32 scratch.

    Both children's boxes are tested at their parent; the nearer is entered, the farther pushed
    and tested again when popped, against the closest hit found by then.
    """
    return intersect_mesh_at(node_lo, node_hi, node_a, node_count, node_axis, tris, tris[:0], node_base,
                             tri_base, 0, 0.0, ox, oy, oz, dx, dy, dz, tmin, tmax, stack)


@njit(cache=True)
def intersect_mesh_at(node_lo, node_hi, node_a, node_count, node_axis, tris, tris_end, node_base, tri_base,
                      end_base, w, ox, oy, oz, dx, dy, dz, tmin, tmax, stack):
    """`intersect_mesh` for a mesh that may deform: with a non-empty `tris_end`, triangle k's
    corners are blended by w towards row k - tri_base + end_base of `tris_end` (its pose at
    shutter close); the node boxes must bound both poses."""
    idx, idy, idz = inverse(dx), inverse(dy), inverse(dz)
    kx, ky, kz, okx, oky, okz, sx, sy, sz = _ray_frame(ox, oy, oz, dx, dy, dz)
    best_t, best_k, best_u, best_v = tmax, -1, 0.0, 0.0
    base = np.uint64(node_base)
    tbase = np.uint64(tri_base)
    shift = np.int64(end_base) - np.int64(tri_base)
    if node_base < 0 or node_base >= node_lo.shape[0]:  # an empty tree: nothing to hit
        return best_t, best_k, best_u, best_v
    room = stack.shape[0]
    node = base
    hit, tnear = ray_box_at(ox, oy, oz, idx, idy, idz, tmin, best_t, node_lo, node_hi, node)
    if not hit:
        return best_t, best_k, best_u, best_v
    sp = 0
    while True:
        cnt = node_count[node]
        if cnt > 0:
            first = tbase + np.uint64(node_a[node])
            for k in range(first, first + np.uint64(cnt)):
                h, t, u, v = _leaf(tris, tris_end, k, np.int64(k) + shift, w, kx, ky, kz, okx, oky, okz,
                                   sx, sy, sz, tmin, best_t)
                if h:
                    best_t, best_k, best_u, best_v = t, np.int64(k), u, v
        else:
            left = node + _U1
            right = base + np.uint64(node_a[node])
            hl, tl = ray_box_at(ox, oy, oz, idx, idy, idz, tmin, best_t, node_lo, node_hi, left)
            hr, tr = ray_box_at(ox, oy, oz, idx, idy, idz, tmin, best_t, node_lo, node_hi, right)
            if hl or hr:
                # selects rather than branches: which child is nearer is a coin toss for
                # incoherent rays, and a mispredicted branch costs more than both moves
                far = hr and (not hl or tr < tl)
                node = right if far else left
                stack[sp] = left if far else right
                sp += 1 if (hl and hr and sp + 1 < room) else 0  # a full stack drops the far child
                continue
        while True:  # pop the next subtree whose box still lies before the closest hit
            if sp == 0:
                return best_t, best_k, best_u, best_v
            sp -= 1
            node = np.uint64(stack[sp])
            hit, tnear = ray_box_at(ox, oy, oz, idx, idy, idz, tmin, best_t, node_lo, node_hi, node)
            if hit:
                break


@njit(cache=True)
def occluded_mesh(node_lo, node_hi, node_a, node_count, node_axis, tris, node_base, tri_base,
                  ox, oy, oz, dx, dy, dz, tmin, tmax, stack):
    """True if any triangle of the mesh is hit in (tmin, tmax): shadow rays, first hit wins."""
    return occluded_mesh_at(node_lo, node_hi, node_a, node_count, node_axis, tris, tris[:0], node_base,
                            tri_base, 0, 0.0, ox, oy, oz, dx, dy, dz, tmin, tmax, stack)


@njit(cache=True)
def occluded_mesh_at(node_lo, node_hi, node_a, node_count, node_axis, tris, tris_end, node_base, tri_base,
                     end_base, w, ox, oy, oz, dx, dy, dz, tmin, tmax, stack):
    """`occluded_mesh` for a mesh that may deform (see intersect_mesh_at)."""
    idx, idy, idz = inverse(dx), inverse(dy), inverse(dz)
    kx, ky, kz, okx, oky, okz, sx, sy, sz = _ray_frame(ox, oy, oz, dx, dy, dz)
    base = np.uint64(node_base)
    tbase = np.uint64(tri_base)
    shift = np.int64(end_base) - np.int64(tri_base)
    if node_base < 0 or node_base >= node_lo.shape[0]:  # an empty tree: nothing to hit
        return False
    room = stack.shape[0] - 2
    stack[0] = node_base
    sp = 1
    while sp > 0:
        sp -= 1
        node = np.uint64(stack[sp])
        hit, tnear = ray_box_at(ox, oy, oz, idx, idy, idz, tmin, tmax, node_lo, node_hi, node)
        if not hit:
            continue
        cnt = node_count[node]
        if cnt > 0:
            first = tbase + np.uint64(node_a[node])
            for k in range(first, first + np.uint64(cnt)):
                h, t, u, v = _leaf(tris, tris_end, k, np.int64(k) + shift, w, kx, ky, kz, okx, oky, okz,
                                   sx, sy, sz, tmin, tmax)
                if h:
                    return True
        elif sp <= room:  # a full stack (never, for trees build_bvh makes) drops the subtree
            stack[sp] = base + np.uint64(node_a[node])
            stack[sp + 1] = node + _U1
            sp += 2
    return False


@njit(cache=True, parallel=True)
def _cast(node_lo, node_hi, node_a, node_count, node_axis, tris, origins, dirs, tmin, tmax,
          chunk, t_out, k_out):
    n = origins.shape[0]
    for c in prange((n + chunk - 1) // chunk):
        stack = np.empty(STACK_SIZE, np.int32)  # one per chunk of rays, reused for each ray
        for i in range(c * chunk, min(n, (c + 1) * chunk)):
            t, k, u, v = intersect_mesh(
                node_lo, node_hi, node_a, node_count, node_axis, tris, 0, 0,
                origins[i, 0], origins[i, 1], origins[i, 2], dirs[i, 0], dirs[i, 1], dirs[i, 2],
                tmin, tmax, stack,
            )
            t_out[i] = t
            k_out[i] = k


@njit(cache=True, parallel=True)
def _cast_occluded(node_lo, node_hi, node_a, node_count, node_axis, tris, origins, dirs, tmin,
                   tmax, chunk, out):
    n = origins.shape[0]
    for c in prange((n + chunk - 1) // chunk):
        stack = np.empty(STACK_SIZE, np.int32)
        for i in range(c * chunk, min(n, (c + 1) * chunk)):
            out[i] = occluded_mesh(
                node_lo, node_hi, node_a, node_count, node_axis, tris, 0, 0,
                origins[i, 0], origins[i, 1], origins[i, 2], dirs[i, 0], dirs[i, 1], dirs[i, 2],
                tmin, tmax[i], stack,
            )


def cast(bvh: BVH, tris, origins, dirs, t_out, k_out, tmin: float = 0.0, tmax: float = math.inf,
         chunk: int = 256) -> None:
    """Closest hits of many rays against one mesh (tests, benchmarks), in parallel.

    origins, dirs: (n, 3) float64; writes t_out (n,) float64 (tmax on a miss) and k_out (n,)
    int64 (row of `tris`, -1 on a miss).
    """
    _cast(bvh.lo, bvh.hi, bvh.a, bvh.count, bvh.axis, tris, origins, dirs, float(tmin),
          float(tmax), int(chunk), t_out, k_out)


def cast_occluded(bvh: BVH, tris, origins, dirs, tmax, out, tmin: float = 0.0, chunk: int = 256) -> None:
    """Shadow-ray batch: out[i] (bool) = anything hit in (tmin, tmax[i]). tmax: (n,) float64."""
    _cast_occluded(bvh.lo, bvh.hi, bvh.a, bvh.count, bvh.axis, tris, origins, dirs, float(tmin),
                   tmax, int(chunk), out)
