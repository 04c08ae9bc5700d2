"""The wide BVH (engine/wide_bvh.py, eight children a node; its traversals in
engine/wide_traversal.py) against its readable reference, the binary traversal of
engine/bvh.py, and against Embree (through embreex) on the same rays.

Sources:
* closest hits and distances: Embree through embreex (its own BVH and triangle test, float32);
* the binary traversal of bvh.py, itself checked against Embree, trimesh and brute force in
  test_bvh.py: both trees hold the same leaves and run the same triangle test, so the closest
  distance must agree exactly (the triangle can differ only where two triangles are hit at the
  same distance, on a shared edge or vertex);
* the collapse invariants (every leaf once, every child box inside its parent's) are those of
  any bounding volume hierarchy.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import trimesh
from embreex import rtcore_scene as rtcs
from embreex.mesh_construction import TriangleMesh

from lampyr.engine.bvh import build_bvh, cast, cast_occluded, pack_triangles
from lampyr.engine.wide_bvh import (
    BOX_HI,
    BOX_LO,
    HALF,
    NODE_ALIGN,
    NODE_BYTES,
    ROW_CHILD,
    ROW_COUNT,
    SLOT_EMPTY,
    SPAN_FIRST,
    SPAN_ROWS,
    WIDTH,
    collapse_bvh,
    concat_nodes,
    empty_wide,
    wide_views,
)
from lampyr.engine.wide_traversal import (cast_wide, cast_wide_occluded, intersect_wide, intersect_wide_at,
                                         traversal_stack)


def _soup():
    """2000 random, overlapping triangles: nothing like a manifold."""
    rng = np.random.default_rng(6)
    corners = rng.uniform(-1, 1, (2000, 1, 3)) + rng.normal(scale=0.1, size=(2000, 3, 3))
    return corners.reshape(-1, 3), np.arange(6000).reshape(-1, 3)


def _mesh(name):
    if name == "soup":
        v, f = _soup()
    elif name == "torus":
        m = trimesh.creation.torus(1.0, 0.3, major_sections=64, minor_sections=32)
        v, f = m.vertices, m.faces
    elif name == "one":
        v, f = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0]]), np.array([[0, 1, 2]])
    else:
        m = trimesh.creation.icosphere(4)
        v, f = m.vertices, m.faces
    v = np.asarray(v, np.float32).astype(np.float64)  # float32-representable, as Embree sees it
    f = np.asarray(f, np.int64)
    return v, f


class Tree:
    def __init__(self, name, **kw):
        self.v, self.f = _mesh(name)
        tri = self.v[self.f]
        self.tri = tri
        self.bvh = build_bvh(tri.min(axis=1), tri.max(axis=1), **kw)
        self.wide = collapse_bvh(self.bvh)
        self.tris = pack_triangles(self.v, self.f, self.bvh.order)


@pytest.fixture(scope="module", params=[("icosphere", {}), ("torus", {"max_leaf": 16, "trav_cost": 4.0}),
                                        ("soup", {"max_leaf": 16, "trav_cost": 4.0}), ("one", {})],
                ids=["icosphere", "torus-term", "soup-term", "one"])
def tree(request):
    name, kw = request.param
    return Tree(name, **kw)


def rays(n, seed, inside=False):
    """Outside: origins on a sphere of radius 3 aimed into [-1.3, 1.3]^3 (hits and misses);
    inside: origins in the ball of radius 0.5 with uniform directions."""
    rng = np.random.default_rng(seed)
    o = rng.normal(size=(n, 3))
    if inside:
        o *= 0.5 * rng.random((n, 1)) / np.linalg.norm(o, axis=1, keepdims=True)
        d = rng.normal(size=(n, 3))
    else:
        o *= 3.0 / np.linalg.norm(o, axis=1, keepdims=True)
        d = rng.uniform(-1.3, 1.3, (n, 3)) - o
    return o.astype(np.float32).astype(np.float64), d.astype(np.float32).astype(np.float64)


def both(tr, o, d, tmax=math.inf):
    n = len(o)
    t, k, tw, kw = np.empty(n), np.empty(n, np.int64), np.empty(n), np.empty(n, np.int64)
    cast(tr.bvh, tr.tris, o, d, t, k, tmax=tmax)
    cast_wide(tr.wide, tr.tris, o, d, tw, kw, tmax=tmax)
    return t, k, tw, kw


# ------------------------------------------------------------------------------------------
# collapse invariants


def test_every_leaf_of_the_binary_tree_appears_once(tree):
    b, w = tree.bvh, tree.wide
    binary = sorted((int(b.a[i]), int(b.count[i])) for i in np.flatnonzero(b.count > 0))
    cnt = w.meta[:, ROW_COUNT]
    wide = sorted((int(w.meta[i, ROW_CHILD, j]), int(cnt[i, j])) for i, j in zip(*np.nonzero(cnt > 0)))
    assert wide == binary


def test_child_boxes_lie_inside_their_parent_slot(tree):
    w = tree.wide
    lo, hi = w.box[:, BOX_LO:BOX_LO + 3], w.box[:, BOX_HI:BOX_HI + 3]  # (W, 3, 4)
    cnt, child = w.meta[:, ROW_COUNT], w.meta[:, ROW_CHILD]
    reached = np.zeros(len(w.box), np.int64)
    reached[0] = 1
    for i, j in zip(*np.nonzero(cnt == 0)):
        c = child[i, j]
        reached[c] += 1
        used = cnt[c] != SLOT_EMPTY
        assert (lo[c][:, used] >= lo[i][:, [j]]).all() and (hi[c][:, used] <= hi[i][:, [j]]).all()
    assert (reached == 1).all()  # a tree: every node has exactly one parent slot (the root none)
    # leaves' boxes hold their triangles (the triangles' float32 corners)
    for i, j in zip(*np.nonzero(cnt > 0)):
        t = tree.tris[child[i, j]:child[i, j] + cnt[i, j]].reshape(-1, 3)
        assert (t >= lo[i][:, j]).all() and (t <= hi[i][:, j]).all()


def test_empty_slots_are_empty_boxes(tree):
    w = tree.wide
    empty = w.meta[:, ROW_COUNT] == SLOT_EMPTY
    for i, j in zip(*np.nonzero(empty)):
        assert np.isposinf(w.box[i, BOX_LO:BOX_LO + 3, j]).all()
        assert np.isneginf(w.box[i, BOX_HI:BOX_HI + 3, j]).all()
    if len(tree.f) > 4 * WIDTH:  # a big mesh opens its root to WIDTH children
        assert not empty[0].any()


def test_trees_hold_both_full_and_half_empty_nodes():
    """The traversals test a node whose slot HALF is empty on its first HALF lanes only; the
    trees the hit tests below run on hold both kinds, so both ways are exercised."""
    for name, kw in (("torus", {"max_leaf": 16, "trav_cost": 4.0}), ("icosphere", {})):
        kinds = Tree(name, **kw).wide.meta[:, ROW_COUNT, HALF] == SLOT_EMPTY
        assert kinds.any() and (~kinds).any(), name


def test_views_share_memory(tree):
    w = tree.wide
    assert np.shares_memory(w.box, w.meta)
    again = wide_views(w.box.copy())
    assert (again.meta == w.meta).all()


def _records_aligned(w):
    return w.box.ctypes.data % NODE_ALIGN == 0 and w.box.strides[0] == NODE_BYTES


@pytest.mark.parametrize("skew", [0, 4, 16, 48, 144])
def test_every_node_array_starts_its_records_on_the_alignment(tree, skew):
    """A record is then exactly NODE_BYTES / 64 cache lines, the lines prefetch.NODE_LINES
    asks for (x86-64 and the common ARM cores: 64-byte lines)."""
    raw = np.zeros(tree.wide.box.nbytes + skew + NODE_ALIGN, np.uint8)
    start = -raw.ctypes.data % NODE_ALIGN + skew
    skewed = raw[start:start + tree.wide.box.nbytes].view(np.float32).reshape(tree.wide.box.shape)
    skewed[...] = tree.wide.box
    made = {"collapse_bvh": tree.wide, "wide_views": wide_views(skewed),
            "concat_nodes": concat_nodes([skewed, tree.wide.box]), "empty_wide": empty_wide()}
    for name, w in made.items():
        assert _records_aligned(w), name
    assert (made["wide_views"].meta == tree.wide.meta).all()  # the bits (rows 6-7 are integers)
    assert (made["concat_nodes"].meta[len(skewed):] == tree.wide.meta).all()


def test_an_aligned_node_array_is_not_copied(tree):
    assert wide_views(tree.wide.box).box is tree.wide.box


def _spans_one_by_one(meta):
    """The readable reference of leaf_spans: node by node, slot by slot."""
    out = []
    for nd in range(len(meta)):
        rows = [(int(meta[nd, ROW_CHILD, j]), int(meta[nd, ROW_CHILD, j]) + int(meta[nd, ROW_COUNT, j]))
                for j in range(WIDTH) if meta[nd, ROW_COUNT, j] > 0]
        out.append((min(r[0] for r in rows), max(r[1] for r in rows) - min(r[0] for r in rows)) if rows
                   else (0, 0))
    return out


def test_leaf_spans_equal_the_node_by_node_reference(tree):
    span = tree.wide.span
    assert span.dtype == np.int32 and span.shape == (len(tree.wide.box), 2)
    assert [tuple(r) for r in span.tolist()] == _spans_one_by_one(tree.wide.meta)


def test_a_node_of_leaves_only_spans_exactly_its_leaves(tree):
    """Triangle rows are in the binary tree's leaf order, so the leaves of a node with no
    interior child lie side by side: its span holds their rows and no other."""
    meta, span = tree.wide.meta, tree.wide.span
    count = meta[:, ROW_COUNT]
    only_leaves = (count != 0).all(axis=1) & (count > 0).any(axis=1)
    assert only_leaves.any()
    rows = np.where(count > 0, count, 0).sum(axis=1)
    assert (span[only_leaves, SPAN_ROWS] == rows[only_leaves]).all()
    assert (span[~(count > 0).any(axis=1)] == 0).all()  # no leaf child: (0, 0)


def test_concatenated_trees_keep_their_own_spans():
    a, b = Tree("icosphere"), Tree("torus")
    nodes = concat_nodes([a.wide.box, b.wide.box])
    assert (nodes.span == np.concatenate([a.wide.span, b.wide.span])).all()  # rows stay local
    assert (empty_wide().span == 0).all()


# ------------------------------------------------------------------------------------------
# traversal against the binary reference and against Embree


@pytest.mark.parametrize("inside", [False, True])
def test_closest_hits_equal_the_binary_reference(tree, inside):
    o, d = rays(3000, 21, inside)
    t, k, tw, kw = both(tree, o, d)
    assert (tw == t).all()  # the same closest distance, bit for bit
    same = kw == k
    assert same.mean() > 0.99
    for i in np.flatnonzero(~same):  # a tie: the other triangle is hit at the same distance
        hit_other, t_other, _ = _hit(tree, kw[i], o[i], d[i])
        assert hit_other and t_other == t[i]


def _hit(tree, k, o, d):
    stack = traversal_stack()
    one = tree.tris[k:k + 1]
    sub = collapse_bvh(build_bvh(one.min(axis=1).astype(np.float64), one.max(axis=1).astype(np.float64)))
    t, kk, u, v = intersect_wide(sub.box, sub.meta, sub.span, one, 0, 0, *o, *d, 0.0, math.inf, stack)
    return kk >= 0, t, (u, v)


def test_tmax_cuts_hits_like_the_reference(tree):
    o, d = rays(1000, 22)
    t, k, _, _ = both(tree, o, d)
    tmax = float(np.median(t[k >= 0])) if (k >= 0).any() else 1.0
    t2, k2, tw2, kw2 = both(tree, o, d, tmax=tmax)
    assert (tw2 == t2).all() and ((kw2 >= 0) == (k2 >= 0)).all()
    assert (tw2[kw2 >= 0] < tmax).all()


def test_closest_hits_match_embree():
    tr = Tree("torus", max_leaf=16, trav_cost=4.0)
    o, d = rays(4000, 23)
    _, _, t, k = both(tr, o, d)
    scene = rtcs.EmbreeScene()
    TriangleMesh(scene, tr.tri.astype(np.float32))
    res = scene.run(o.astype(np.float32), d.astype(np.float32), query="DISTANCE", output=1)
    te = np.where(res["primID"] >= 0, res["tfar"], np.inf)
    hit, hit_e = k >= 0, np.isfinite(te)
    assert 0.2 < hit.mean() < 0.95
    # rays that graze an edge may go either way in float32 Embree (see test_bvh.py)
    assert (hit != hit_e).sum() <= len(o) // 1000
    ok = hit & hit_e
    np.testing.assert_allclose(t[ok], te[ok], rtol=1e-5)  # test_bvh.py's Embree tolerance
    # the same triangle as Embree's primID, through the leaf order
    assert (tr.bvh.order[k[ok]] == res["primID"][ok]).mean() > 0.999


def test_occluded_agrees_with_the_reference_and_the_closest_hit(tree):
    o, d = rays(2000, 24)
    t, k, _, _ = both(tree, o, d)
    hit = k >= 0
    for scale in (1.0 + 1e-6, 1.0 - 1e-6):
        tmax = np.where(hit, t * scale, 1e30)
        ref, out = np.empty(len(o), np.bool_), np.empty(len(o), np.bool_)
        cast_occluded(tree.bvh, tree.tris, o, d, tmax, ref)
        cast_wide_occluded(tree.wide, tree.tris, o, d, tmax, out)
        assert (out == ref).all()
        assert (out[hit] == (scale > 1.0)).all()
    out = np.empty(len(o), np.bool_)
    cast_wide_occluded(tree.wide, tree.tris, o, d, np.full(len(o), np.inf), out)
    assert (out == hit).all()


def test_offsets_address_concatenated_trees():
    a, b = Tree("icosphere"), Tree("torus")
    nodes = concat_nodes([a.wide.box, b.wide.box])
    tris = np.concatenate([a.tris, b.tris])
    o, d = rays(200, 25)
    _, _, t, k = both(b, o, d)
    stack = traversal_stack()
    for i in range(len(o)):
        ti, ki, _, _ = intersect_wide(nodes.box, nodes.meta, nodes.span, tris, len(a.wide.box), len(a.tris),
                                      *o[i], *d[i], 0.0, math.inf, stack)
        assert ki == (k[i] + len(a.tris) if k[i] >= 0 else -1) and ti == t[i]


def test_deforming_mesh_blends_towards_the_end_pose():
    """A mesh whose end pose is the start pose moved by +0.5 in z: at w the hits move by w/2."""
    tr = Tree("icosphere")
    tri2 = np.concatenate([tr.tri, tr.tri + [0.0, 0.0, 0.5]], axis=1)
    bvh2 = build_bvh(tri2.min(axis=1), tri2.max(axis=1))  # boxes bound both poses
    wide2 = collapse_bvh(bvh2)
    tris = pack_triangles(tr.v, tr.f, bvh2.order)
    tris_end = pack_triangles(tr.v + [0.0, 0.0, 0.5], tr.f, bvh2.order)
    stack = traversal_stack()
    # rays along -z from above the sphere's top hit it at z = 1 + 0.5 w (up to the faceting)
    for x, y in ((0.0, 0.0), (0.1, -0.05), (0.2, 0.2)):
        z0 = None
        for w in (0.0, 0.5, 1.0):
            t, k, _, _ = intersect_wide_at(wide2.box, wide2.meta, wide2.span, tris, tris_end, 0, 0, 0, w,
                                           x, y, 5.0, 0.0, 0.0, -1.0, 0.0, math.inf, stack)
            assert k >= 0
            z = 5.0 - t
            z0 = z if z0 is None else z0
            assert z - z0 == pytest.approx(0.5 * w, abs=1e-6)


def test_a_nan_ray_returns_what_the_reference_returns():
    """A NaN origin passes every slab test: the traversal must still end (empty slots are
    skipped by their count, not only by their boxes) and answer like the binary one."""
    tr = Tree("icosphere")
    o, d = np.array([[math.nan, 0.0, 0.0]]), np.array([[1.0, 0.0, 0.0]])
    t, k, tw, kw = both(tr, o, d)
    assert kw[0] == k[0] and (tw[0] == t[0] or (math.isnan(tw[0]) and math.isnan(t[0])))
