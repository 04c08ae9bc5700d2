"""The float32 vector slab test of a wide node (engine/wide_slabs.py) against the scalar
reference (wide_traversal._slab), lane by lane, to the bit; both against a float64 slab test written
here from its textbook form (Kay and Kajiya, "Ray tracing complex scenes", SIGGRAPH 1986: a ray
enters a box when the largest near-plane distance is at most the smallest far-plane one); and
its rounding against exact rational arithmetic (Python's fractions): it never misses a box the
ray's segment meets, and its entry distance is never beyond the exact one."""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from numba import njit

from lampyr.engine.wide_bvh import HALF, WIDTH
from lampyr.engine.wide_traversal import DIST_AT, _near_rows, _slab, slabs, slabs_half, traversal_stack
from lampyr.engine.wide_slabs import fma32, interval32, ray_planes


@njit
def _both(box, rays, tmin, tmax, out_vec, out_ref, half=False):
    """For every (node, ray): the vector test's (mask, tn j) and the scalar test's, per slot;
    half: the vector test of the first HALF slots (`slabs_half`), the others reported unentered."""
    scratch = traversal_stack()  # the vector test leaves its distances at DIST_AT
    for i in range(rays.shape[0]):
        ox, oy, oz, dx, dy, dz = rays[i, 0], rays[i, 1], rays[i, 2], rays[i, 3], rays[i, 4], rays[i, 5]
        planes = ray_planes(ox, oy, oz, dx, dy, dz)
        nx, ny, nz, fx, fy, fz = _near_rows(planes)
        t0, t1 = interval32(tmin, tmax)
        for nd in range(box.shape[0]):
            node = np.uint64(nd)
            if half:
                mask = slabs_half(box, node, nx, ny, nz, fx, fy, fz, planes, t0, t1, scratch, DIST_AT)
            else:
                mask = slabs(box, node, nx, ny, nz, fx, fy, fz, planes, t0, t1, scratch, DIST_AT)
            for j in range(WIDTH):
                out_vec[i, nd, j, 0] = 1.0 if (mask >> j) & 1 else 0.0
                out_vec[i, nd, j, 1] = scratch[DIST_AT + j]
                h, k = _slab(box, node, j, nx, ny, nz, fx, fy, fz, planes, t0, t1)
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
    """Kay and Kajiya's test in plain float64, away from grazing rays (where the float32 test's
    outward rounding enters boxes the exact test only touches, by design)."""
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
                if abs(far - near) < 1e-5 * (1.0 + abs(far)):
                    continue  # grazing
                assert vec[i, nd, j, 0] == (1.0 if near <= far else 0.0)
                checked += 1
    assert checked > 10_000


def _round32(x: Fraction) -> np.float32:
    """x rounded to the nearest float32, ties to even (IEEE 754 round to nearest): the
    float64 nearest to x and its float32 neighbours, the nearest of them by exact comparison."""
    guess = np.float32(float(x))
    cands = [np.nextafter(guess, np.float32(-np.inf)), guess, np.nextafter(guess, np.float32(np.inf))]
    cands = [c for c in cands if np.isfinite(c)]
    best = min(abs(Fraction(float(c)) - x) for c in cands)
    ties = [c for c in cands if abs(Fraction(float(c)) - x) == best]
    return min(ties, key=lambda c: int(np.array(c).view(np.int32)) & 1)  # the even one


@njit
def _fma_all(a, b, c, out):
    for i in range(a.shape[0]):
        out[i] = fma32(a[i], b[i], c[i])


def test_fma32_rounds_once_like_exact_arithmetic():
    """fma32 (llvm.fma on float32) is a · b + c rounded once: equal to the exact rational value
    rounded to float32, also where c cancels most of a · b (two roundings would not be)."""
    rng = np.random.default_rng(5)
    n = 3000
    a = rng.uniform(-100, 100, n).astype(np.float32)
    b = (rng.uniform(-1, 1, n) * 10.0 ** rng.integers(-3, 4, n)).astype(np.float32)
    c = rng.uniform(-100, 100, n).astype(np.float32)
    c[: n // 2] = -(a[: n // 2].astype(np.float64) * b[: n // 2]).astype(np.float32)  # cancellation
    out = np.empty(n, np.float32)
    _fma_all(a, b, c, out)
    exact = [_round32(Fraction(float(x)) * Fraction(float(y)) + Fraction(float(z))) for x, y, z in zip(a, b, c)]
    np.testing.assert_array_equal(out, np.array(exact, np.float32))
    two_roundings = (a * b) + c  # float32 multiply, then float32 add
    assert (two_roundings != out).sum() > 100  # the cases above do tell one rounding from two


def _exact_slab(o, d, lo, hi, tmin, tmax):
    """Kay and Kajiya's test in exact rational arithmetic on the float values given:
    (meets, entry) of the segment o + t d, t in [tmin, tmax] (tmax may be inf); an axis with
    d = 0 constrains through whether o lies in its slab."""
    near, far = Fraction(tmin), (None if math.isinf(tmax) else Fraction(tmax))
    for k in range(3):
        if d[k] == 0.0:
            if not (lo[k] <= o[k] <= hi[k]):
                return False, None
            continue
        ta = (Fraction(float(lo[k])) - Fraction(o[k])) / Fraction(d[k])
        tb = (Fraction(float(hi[k])) - Fraction(o[k])) / Fraction(d[k])
        ta, tb = min(ta, tb), max(ta, tb)
        near = max(near, ta)
        far = tb if far is None else min(far, tb)
    return (far is None or near <= far), near


def _hard_cases(rng, count):
    """Boxes and rays where float32 rounding matters: small boxes far from the origin, rays
    aimed at a corner or edge midpoint, origins on a box's plane with that direction component
    0, axis-parallel rays, flat boxes; (box (3, 2) float32 [lo, hi], ray (6,) float64) pairs."""
    cases = []
    for _ in range(count):
        centre = rng.uniform(-1, 1, 3) * 10.0 ** rng.integers(0, 4)
        size = rng.exponential(1.0, 3) * 10.0 ** rng.integers(-3, 1)
        size[rng.random(3) < 0.15] = 0.0
        lo = (centre - size / 2).astype(np.float32)
        hi = np.maximum((centre + size / 2).astype(np.float32), lo)
        kind = rng.integers(5)
        o = centre + rng.normal(size=3) * (1.0 + 3.0 * size.max())
        corner = np.where(rng.random(3) < 0.5, lo, hi).astype(np.float64)
        if kind == 0:  # at a corner
            d = corner - o
        elif kind == 1:  # at an edge's midpoint
            d = corner - o
            k = rng.integers(3)
            d[k] = (float(lo[k]) + float(hi[k])) / 2 - o[k]
        elif kind == 2:  # from a box plane, sliding along it
            k = rng.integers(3)
            o[k] = float(corner[k])
            d = rng.normal(size=3)
            d[k] = 0.0
        elif kind == 3:  # axis-parallel, from the slab of the other two axes
            k = rng.integers(3)
            d = np.zeros(3)
            d[k] = rng.choice([-1.0, 1.0])
            for a in range(3):
                if a != k:
                    o[a] = rng.uniform(float(lo[a]), float(hi[a])) if hi[a] > lo[a] else float(lo[a])
        else:  # at a random point of the box
            d = rng.uniform(lo, hi) - o
        if not np.any(d):
            d = np.array([0.0, 0.0, 1.0])
        d /= np.linalg.norm(d)
        cases.append((np.stack([lo, hi], axis=1), np.concatenate([o, d])))
    return cases


@pytest.mark.parametrize("finite_tmax", [False, True])
def test_the_float32_test_never_misses_what_exact_arithmetic_meets(finite_tmax):
    """Whenever the exact test says the segment meets the box, the vector test enters it and
    its entry distance is at most the exact one; and it stays tight: a box the segment misses
    by more than 1e-4 of the distances involved is not entered."""
    rng = np.random.default_rng(31)
    cases = _hard_cases(rng, 1500)
    met = missed = clear_misses = 0
    for box3, ray in cases:
        node = np.empty((1, 8, WIDTH), np.float32)
        node[0, 0:3, :] = box3[:, [0]]
        node[0, 3:6, :] = box3[:, [1]]
        node[0, 6:8] = 0.0
        o, d = ray[:3], ray[3:]
        exact_hit, exact_near = _exact_slab(o, d, box3[:, 0], box3[:, 1], 0.0, math.inf)
        tmax = math.inf
        if finite_tmax and exact_hit:  # end the segment just where it enters the box
            tmax = float(exact_near)
        hit, near = _exact_slab(o, d, box3[:, 0], box3[:, 1], 0.0, tmax)
        vec = np.empty((1, 1, WIDTH, 2))
        _both(node, ray[None, :], 0.0, tmax, vec, np.empty_like(vec))
        if hit:
            met += 1
            assert vec[0, 0, 0, 0] == 1.0, (box3, ray, tmax)
            assert Fraction(vec[0, 0, 0, 1]) <= near, (box3, ray)
        else:
            missed += 1
            scale = 1.0 + np.abs(o).max() + np.abs(box3).max()
            grown = _exact_slab(o, d, box3[:, 0] - 1e-4 * scale, box3[:, 1] + 1e-4 * scale, 0.0, tmax * (1 + 1e-4))
            if not grown[0]:
                clear_misses += 1
                assert vec[0, 0, 0, 0] == 0.0, (box3, ray)
    # the cases do test the rounding: a float32 test without it (a = RN(1/d), b = RN(-o a),
    # tmax as is) misses 85 (infinite tmax) and 191 (finite) of the boxes met here
    assert met > 400 and missed > 100 and clear_misses > 50
