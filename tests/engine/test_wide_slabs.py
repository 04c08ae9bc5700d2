"""The vector slab test of a wide node (engine/wide_slabs.py) against the scalar reference
(wide_bvh._slab), lane by lane, to the bit; and both against an independent float64 slab test
written here from its textbook form (Kay and Kajiya, "Ray tracing complex scenes", SIGGRAPH 1986:
a ray enters a box when the largest near-plane distance is at most the smallest far-plane one)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from numba import njit

from lampyr.engine.intersect import inverse
from lampyr.engine.wide_bvh import BOX_HI, BOX_LO, DIST_AT, HALF, WIDTH, _slab, slabs, slabs_half, traversal_stack


@njit
def _both(box, rays, tmin, tmax, out_vec, out_ref, half=False):
    """For every (node, ray): the vector test's (mask, tn j) and the scalar test's, per slot;
    half: the vector test of the first HALF slots (`slabs_half`), the others reported unentered."""
    scratch = traversal_stack()  # the vector test leaves its distances at DIST_AT
    for i in range(rays.shape[0]):
        ox, oy, oz, dx, dy, dz = rays[i, 0], rays[i, 1], rays[i, 2], rays[i, 3], rays[i, 4], rays[i, 5]
        idx, idy, idz = inverse(dx), inverse(dy), inverse(dz)
        nx = np.uint64(BOX_HI if idx < 0.0 else BOX_LO)
        ny = np.uint64(BOX_HI + 1 if idy < 0.0 else BOX_LO + 1)
        nz = np.uint64(BOX_HI + 2 if idz < 0.0 else BOX_LO + 2)
        fx, fy, fz = np.uint64(3) - nx, np.uint64(5) - ny, np.uint64(7) - nz
        for nd in range(box.shape[0]):
            node = np.uint64(nd)
            if half:
                mask = slabs_half(box, node, nx, ny, nz, fx, fy, fz, ox, oy, oz, idx, idy, idz, tmin, tmax,
                                  scratch, DIST_AT)
            else:
                mask = slabs(box, node, nx, ny, nz, fx, fy, fz, ox, oy, oz, idx, idy, idz, tmin, tmax,
                             scratch, DIST_AT)
            for j in range(WIDTH):
                out_vec[i, nd, j, 0] = 1.0 if (mask >> j) & 1 else 0.0
                out_vec[i, nd, j, 1] = scratch[DIST_AT + j]
                h, k = _slab(box, node, j, nx, ny, nz, fx, fy, fz, ox, oy, oz, idx, idy, idz, tmin, tmax)
                out_ref[i, nd, j, 0] = 1.0 if h else 0.0
                out_ref[i, nd, j, 1] = k


def _nodes(rng, count):
    """(count, 8, WIDTH) float32 nodes of random boxes; the last slot of every fourth node and
    the last three of every third are empty (lo = +inf, hi = -inf, as collapse_bvh leaves unused
    slots) and some boxes are flat."""
    lo = rng.uniform(-2, 2, (count, 3, WIDTH))
    size = rng.exponential(1.0, (count, 3, WIDTH))
    size[rng.random((count, 3, WIDTH)) < 0.1] = 0.0  # flat boxes
    box = np.empty((count, 8, WIDTH), np.float32)
    box[:, 0:3] = lo
    box[:, 3:6] = lo + size
    box[:, 6:8] = 0.0
    for step, slots in ((4, slice(WIDTH - 1, WIDTH)), (3, slice(WIDTH - 3, WIDTH))):
        box[::step, 0:3, slots] = np.inf
        box[::step, 3:6, slots] = -np.inf
    return box


def _rays(rng, count):
    o = rng.uniform(-3, 3, (count, 3))
    d = rng.normal(size=(count, 3))
    d[rng.random((count, 3)) < 0.05] = 0.0  # axis-parallel rays: an infinite inverse
    d[np.all(d == 0.0, axis=1)] = (0.0, 0.0, 1.0)
    d /= np.linalg.norm(d, axis=1)[:, None]
    rays = np.concatenate([o, d], axis=1)
    rays[0, 3:] = np.nan  # a NaN ray
    return rays


@pytest.mark.parametrize("tmin, tmax", [(0.0, math.inf), (0.5, 2.0), (0.0, 1e-3)])
def test_the_vector_test_gives_the_scalar_test_bits_in_every_lane(tmin, tmax):
    rng = np.random.default_rng(21)
    box, rays = _nodes(rng, 64), _rays(rng, 400)
    vec = np.empty((len(rays), len(box), WIDTH, 2))
    ref = np.empty_like(vec)
    _both(box, rays, tmin, tmax, vec, ref)
    np.testing.assert_array_equal(vec[..., 0], ref[..., 0])
    entered = ref[..., 0] == 1.0
    assert entered.any() and (~entered).any()  # both outcomes occur
    np.testing.assert_array_equal(vec[..., 1][entered], ref[..., 1][entered])


def test_the_half_test_gives_the_scalar_test_bits_in_the_first_half():
    """A node of at most HALF children is tested on HALF lanes (wide_bvh's traversals): the
    same bits as the scalar test there, nothing entered beyond."""
    rng = np.random.default_rng(23)
    box, rays = _nodes(rng, 64), _rays(rng, 400)
    vec = np.empty((len(rays), len(box), WIDTH, 2))
    ref = np.empty_like(vec)
    _both(box, rays, 0.0, math.inf, vec, ref, True)
    np.testing.assert_array_equal(vec[:, :, :HALF, 0], ref[:, :, :HALF, 0])
    assert not vec[:, :, HALF:, 0].any()
    entered = ref[:, :, :HALF, 0] == 1.0
    assert entered.any() and (~entered).any()
    np.testing.assert_array_equal(vec[:, :, :HALF, 1][entered], ref[:, :, :HALF, 1][entered])


def test_entering_agrees_with_the_textbook_slab_test():
    """Kay and Kajiya's test in plain float64, away from grazing rays (where the reference's
    widening of the far distance, Ize 2013, may differ by design)."""
    rng = np.random.default_rng(22)
    box, rays = _nodes(rng, 32), _rays(rng, 300)[1:]
    rays = rays[np.all(rays[:, 3:] != 0.0, axis=1)]
    vec = np.empty((len(rays), len(box), WIDTH, 2))
    _both(box, rays, 0.0, math.inf, vec, np.empty_like(vec))
    checked = 0
    for i, r in enumerate(rays):
        o, d = r[:3], r[3:]
        for nd in range(len(box)):
            for j in range(WIDTH):
                lo, hi = box[nd, 0:3, j].astype(float), box[nd, 3:6, j].astype(float)
                if not np.all(lo <= hi):
                    assert vec[i, nd, j, 0] == 0.0  # an empty slot is never entered
                    continue
                ta, tb = (lo - o) / d, (hi - o) / d
                near, far = max(np.minimum(ta, tb).max(), 0.0), np.maximum(ta, tb).min()
                if abs(far - near) < 1e-9 * (1.0 + abs(far)):
                    continue  # grazing
                assert vec[i, nd, j, 0] == (1.0 if near <= far else 0.0)
                checked += 1
    assert checked > 10_000
