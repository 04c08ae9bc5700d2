"""Four triangle tests at once (engine/wide_triangles.py) against the scalar watertight test
(intersect.sheared_triangle, itself checked against Möller and Trumbore's test in
test_intersect.py): lane by lane to the bit, and the closest hit of a leaf as the scalar loop in
row order finds it. Shared edges and corners, flat triangles, rays in a triangle's plane and NaN
rays are included on purpose: they are where a vector rewrite would differ."""

from __future__ import annotations

import math

import numpy as np
import pytest
from numba import njit

from lampyr.engine.bvh import _ray_frame
from lampyr.engine.intersect import sheared_triangle
from lampyr.engine.wide_triangles import any_in_leaf, closest_in_leaf, triangles4


@njit
def _lanes(tris, rays, tmin, tmax, out_vec, out_ref):
    """For every ray and group of four rows: each lane's (candidate, t, u, v) from the vector
    test and from the scalar one (t, u, v only where it hits)."""
    for i in range(rays.shape[0]):
        kx, ky, kz, okx, oky, okz, sx, sy, sz = _ray_frame(rays[i, 0], rays[i, 1], rays[i, 2], rays[i, 3],
                                                           rays[i, 4], rays[i, 5])
        for g in range(0, tris.shape[0], 4):
            n = min(4, tris.shape[0] - g)
            r = triangles4(tris, g, n, kx, ky, kz, okx, oky, okz, sx, sy, sz, tmin, tmax)
            m = r[0]
            T = (r[1], r[2], r[3], r[4])
            det = (r[5], r[6], r[7], r[8])
            V = (r[9], r[10], r[11], r[12])
            W = (r[13], r[14], r[15], r[16])
            for j in range(n):
                k = g + j
                out_vec[i, k, 0] = 1.0 if (m >> j) & 1 else 0.0
                if (m >> j) & 1:
                    inv = 1.0 / det[j]  # a candidate's det is never 0
                    out_vec[i, k, 1], out_vec[i, k, 2], out_vec[i, k, 3] = T[j] * inv, V[j] * inv, W[j] * inv
                h, t, u, v = sheared_triangle(
                    sx, sy, sz, tmin, tmax,
                    tris[k, 0, kx] - okx, tris[k, 0, ky] - oky, tris[k, 0, kz] - okz,
                    tris[k, 1, kx] - okx, tris[k, 1, ky] - oky, tris[k, 1, kz] - okz,
                    tris[k, 2, kx] - okx, tris[k, 2, ky] - oky, tris[k, 2, kz] - okz)
                out_ref[i, k, 0] = 1.0 if h else 0.0
                out_ref[i, k, 1], out_ref[i, k, 2], out_ref[i, k, 3] = t, u, v
            for j in range(n, 4):
                if (m >> j) & 1:
                    out_vec[i, 0, 0] = -1.0  # a lane beyond the rows may never be a candidate


@njit
def _leaves(tris, rays, size, tmin, tmax, out_vec, out_ref, out_any):
    """Each ray against consecutive leaves of `size` rows: closest_in_leaf and any_in_leaf, and
    the scalar loop in row order with the interval shrinking at each hit."""
    for i in range(rays.shape[0]):
        kx, ky, kz, okx, oky, okz, sx, sy, sz = _ray_frame(rays[i, 0], rays[i, 1], rays[i, 2], rays[i, 3],
                                                           rays[i, 4], rays[i, 5])
        for leaf in range(tris.shape[0] // size):
            first, last = leaf * size, leaf * size + size
            t, k, u, v = closest_in_leaf(tris, np.int64(first), np.int64(last), kx, ky, kz, okx, oky, okz,
                                         sx, sy, sz, tmin, tmax, np.int64(-1), 0.0, 0.0)
            out_vec[i, leaf, 0], out_vec[i, leaf, 1], out_vec[i, leaf, 2], out_vec[i, leaf, 3] = t, k, u, v
            out_any[i, leaf] = any_in_leaf(tris, np.int64(first), np.int64(last), kx, ky, kz, okx, oky, okz,
                                           sx, sy, sz, tmin, tmax)
            bt, bk, bu, bv = tmax, -1, 0.0, 0.0
            for r in range(first, last):
                h, t, u, v = sheared_triangle(
                    sx, sy, sz, tmin, bt,
                    tris[r, 0, kx] - okx, tris[r, 0, ky] - oky, tris[r, 0, kz] - okz,
                    tris[r, 1, kx] - okx, tris[r, 1, ky] - oky, tris[r, 1, kz] - okz,
                    tris[r, 2, kx] - okx, tris[r, 2, ky] - oky, tris[r, 2, kz] - okz)
                if h:
                    bt, bk, bu, bv = t, r, u, v
            out_ref[i, leaf, 0], out_ref[i, leaf, 1], out_ref[i, leaf, 2], out_ref[i, leaf, 3] = bt, bk, bu, bv


def _triangles(rng, count):
    """(count, 3, 3) float32 rows: random triangles around the origin, with a fan of triangles
    sharing edges and a corner, flat (degenerate) ones and repeated ones (equal distances)."""
    tris = rng.uniform(-1, 1, (count, 3, 3))
    ring = np.array([[math.cos(a), math.sin(a), 0.0] for a in np.linspace(0, 2 * math.pi, 9)[:-1]])
    for j in range(8):  # a fan around (0, 0, 0.25): shared edges, one shared corner
        tris[j] = [(0.0, 0.0, 0.25), 0.7 * ring[j] + (0, 0, 0.25), 0.7 * ring[(j + 1) % 8] + (0, 0, 0.25)]
    tris[8] = [(0, 0, 0), (1, 1, 1), (2, 2, 2)]  # a segment: flat
    tris[9] = tris[10]  # the same triangle twice: the first in row order wins
    return np.ascontiguousarray(tris, np.float32)


def _rays(rng, count):
    o = rng.uniform(-2, 2, (count, 3))
    d = rng.normal(size=(count, 3))
    d[rng.random((count, 3)) < 0.05] = 0.0  # axis-parallel rays
    d[np.all(d == 0.0, axis=1)] = (0.0, 0.0, 1.0)
    o[:40, 2] = 2.0
    d[:40] = (0.0, 0.0, -1.0)  # straight down through the fan: some through its shared edges
    o[:20, :2] = 0.7 * np.array([[math.cos(a), math.sin(a)] for a in np.linspace(0, 2 * math.pi, 21)[:-1]]) * 0.5
    o[40:50] = rng.uniform(-1, 1, (10, 3))
    o[40:50, 2] = 0.25
    d[40:50, 2] = 0.0  # in the fan's plane
    rays = np.concatenate([o, d], axis=1)
    rays[50, 3:] = np.nan  # a NaN ray
    return rays


@pytest.mark.parametrize("count", [64, 67])
@pytest.mark.parametrize("tmin, tmax", [(0.0, math.inf), (0.5, 2.5), (0.0, 1e-3)])
def test_every_lane_gives_the_scalar_test_bits(count, tmin, tmax):
    rng = np.random.default_rng(31)
    tris, rays = _triangles(rng, count), _rays(rng, 500)
    vec = np.zeros((len(rays), count, 4))
    ref = np.zeros_like(vec)
    _lanes(tris, rays, tmin, tmax, vec, ref)
    assert (vec[:, 0, 0] >= 0.0).all(), "a lane beyond the leaf's rows was a candidate"
    np.testing.assert_array_equal(vec[..., 0], ref[..., 0])
    hit = ref[..., 0] == 1.0
    if tmax > 1.0:
        assert hit.sum() > 100 and (~hit).sum() > 100  # both outcomes occur
    np.testing.assert_array_equal(vec[..., 1:][hit], ref[..., 1:][hit])


@pytest.mark.parametrize("size", [1, 3, 4, 5, 8, 13, 16])
def test_the_closest_hit_of_a_leaf_is_the_scalar_loops(size):
    rng = np.random.default_rng(32 + size)
    tris, rays = _triangles(rng, 16 * size), _rays(rng, 400)
    leaves = len(tris) // size
    vec = np.zeros((len(rays), leaves, 4))
    ref = np.zeros_like(vec)
    anyhit = np.zeros((len(rays), leaves), np.bool_)
    _leaves(tris, rays, size, 0.0, math.inf, vec, ref, anyhit)
    np.testing.assert_array_equal(vec, ref)
    np.testing.assert_array_equal(anyhit, ref[..., 1] >= 0)
    assert (ref[..., 1] >= 0).sum() > 50


def test_a_repeated_triangle_is_won_by_its_first_row():
    rng = np.random.default_rng(33)
    tris = _triangles(rng, 16)
    ray = np.array([[0.0, 0.0, 2.0, 0.0, 0.0, -1.0]])
    o = np.array([tris[9].mean(axis=0)]) + (0.0, 0.0, 2.0)  # straight down onto rows 9 and 10
    ray[0, :3] = o
    vec = np.zeros((1, 1, 4))
    ref = np.zeros_like(vec)
    _leaves(tris[8:12], ray, 4, 0.0, math.inf, vec, ref, np.zeros((1, 1), np.bool_))
    assert ref[0, 0, 1] == 1  # row 9 of tris is row 1 of the leaf
    np.testing.assert_array_equal(vec, ref)
