"""Ray/triangle, ray/sphere and ray/box kernels against independent formulas.

Sources:
* triangles: Möller and Trumbore, "Fast, Minimum Storage Ray/Triangle Intersection", JGT 2(1),
  1997 (the numpy reference), and the watertightness property claimed by Woop, Benthin and
  Wald, JCGT 2(1), 2013 (rays through shared edges and vertices hit at least one triangle);
* spheres: the quadratic formula for |o + t d - c|^2 = r^2, evaluated in 60-digit decimal
  arithmetic so it is exact to far beyond float64;
* boxes: the slab method (Kay and Kajiya, "Ray tracing complex scenes", SIGGRAPH 1986) written
  out axis by axis in plain Python.
"""

from __future__ import annotations

import math
from decimal import Decimal, getcontext

import numpy as np
import pytest

from lampyr.engine.intersect import (
    inverse,
    ray_box,
    ray_box_reference,
    ray_sphere,
    ray_sphere_reference,
    ray_triangle,
    ray_triangle_reference,
)


def tri_hit(o, d, a, b, c, tmin=0.0, tmax=math.inf):
    return ray_triangle(*o, *d, tmin, tmax, *a, *b, *c)


def random_pairs(n, seed):
    """n random rays and triangles, every ray aimed at a random point near its triangle."""
    rng = np.random.default_rng(seed)
    tri = rng.normal(size=(n, 3, 3))
    w = rng.uniform(-0.2, 1.2, (n, 3))
    target = np.einsum("nk,nkj->nj", w / w.sum(1, keepdims=True), tri)
    o = rng.normal(scale=3.0, size=(n, 3))
    d = (target - o) * rng.uniform(0.1, 10.0, (n, 1))  # directions of any length
    return o, d, tri


# ------------------------------------------------------------------------------------------
# triangles


def test_triangle_matches_moller_trumbore_on_random_rays():
    o, d, tri = random_pairs(3000, 1)
    hits = 0
    for i in range(len(o)):
        h, t, u, v = tri_hit(o[i], d[i], *tri[i])
        hr, tr, ur, vr = ray_triangle_reference(o[i], d[i], *tri[i])
        if h != hr:
            # only a ray within rounding of an edge may be judged differently by the two tests
            _, _, ur, vr = ray_triangle_reference(o[i], d[i], *tri[i], tmin=-math.inf)
            assert min(abs(ur), abs(vr), abs(1.0 - ur - vr)) < 1e-12, i
            continue
        if h:
            hits += 1
            assert t == pytest.approx(tr, rel=1e-9) and u == pytest.approx(ur, abs=1e-9)
            assert v == pytest.approx(vr, abs=1e-9)
    assert 1000 < hits < 2900  # the sample holds both hits and misses


@pytest.mark.parametrize("flip", [False, True], ids=["ccw", "cw"])
def test_triangle_hits_both_windings(flip):
    a, b, c = (0.0, 0.0, 0.0), (1.0, 0.0, 0.0), (0.0, 1.0, 0.0)
    if flip:
        b, c = c, b
    h, t, u, v = tri_hit((0.2, 0.3, 2.0), (0.0, 0.0, -1.0), a, b, c)
    assert h and t == pytest.approx(2.0)
    # the hit point (1-u-v) a + u b + v c is where the ray meets the plane
    p = (1 - u - v) * np.array(a) + u * np.array(b) + v * np.array(c)
    assert p == pytest.approx([0.2, 0.3, 0.0])


def test_triangle_distance_is_in_units_of_direction_length():
    a, b, c = (0.0, 0.0, 0.0), (1.0, 0.0, 0.0), (0.0, 1.0, 0.0)
    _, t1, _, _ = tri_hit((0.2, 0.3, 2.0), (0.0, 0.0, -1.0), a, b, c)
    _, t4, _, _ = tri_hit((0.2, 0.3, 2.0), (0.0, 0.0, -4.0), a, b, c)
    assert t4 == pytest.approx(t1 / 4.0)


@pytest.mark.parametrize("tmin,tmax,expect", [(0.0, 2.5, True), (0.0, 2.0, False), (2.0, 9.0, False),
                                              (1.9, 9.0, True)])
def test_triangle_interval_is_open(tmin, tmax, expect):
    h, _, _, _ = tri_hit((0.2, 0.3, 2.0), (0.0, 0.0, -1.0), (0, 0, 0), (1, 0, 0), (0, 1, 0), tmin, tmax)
    assert h == expect


@pytest.mark.parametrize("case", ["in plane", "degenerate", "behind"])
def test_triangle_misses(case):
    o, d = (0.2, 0.3, 2.0), (0.0, 0.0, -1.0)
    a, b, c = (0, 0, 0), (1, 0, 0), (0, 1, 0)
    if case == "in plane":
        o, d = (-1.0, 0.2, 0.0), (1.0, 0.0, 0.0)
    elif case == "degenerate":
        c = (2, 0, 0)
    else:
        d = (0.0, 0.0, 1.0)
    assert not tri_hit(o, d, a, b, c)[0]


@pytest.mark.parametrize("seed", range(4))
def test_triangle_fan_is_watertight(seed):
    """Watertightness (Woop et al. 2013): a fan of triangles around a shared vertex, rays aimed
    exactly at the shared vertex and at points of the shared edges, each hits some triangle."""
    rng = np.random.default_rng(seed)
    centre = rng.normal(size=3)
    ang = (np.arange(7) + rng.uniform(-0.3, 0.3, 7)) * (2.0 * np.pi / 7)  # gaps < pi: a disc
    ring = centre + np.stack([np.cos(ang), np.sin(ang), 0.1 * rng.normal(size=7)], 1)
    fan = [(centre, ring[i], ring[(i + 1) % 7]) for i in range(7)]
    targets = [centre] + [centre + s * (p - centre) for p in ring for s in rng.uniform(0, 1, 20)]
    origin = centre + np.array([*rng.normal(size=2) * 0.3, 3.0])  # above: the fan is a disc from here
    for p in targets:
        d = p - origin
        assert any(tri_hit(origin, d, *t)[0] for t in fan)


# ------------------------------------------------------------------------------------------
# spheres


def exact_sphere_roots(o, d, c, r):
    """Both roots of the quadratic formula in 60-digit decimals, from the exact float inputs."""
    getcontext().prec = 60
    o, d, c, r = [Decimal(float(x)) for x in o], [Decimal(float(x)) for x in d], [Decimal(float(x)) for x in c], Decimal(r)
    f = [oi - ci for oi, ci in zip(o, c)]
    a = sum(x * x for x in d)
    b = 2 * sum(fi * di for fi, di in zip(f, d))
    cc = sum(x * x for x in f) - r * r
    disc = b * b - 4 * a * cc
    if disc < 0:
        return None
    s = disc.sqrt()
    return float((-b - s) / (2 * a)), float((-b + s) / (2 * a))


@pytest.mark.parametrize(
    "o,d,c,r",
    [
        ((0, 0, 5), (0, 0, -1), (0, 0, 0), 1.0),  # head on, both roots ahead
        ((0.3, -0.2, 0.1), (1, 2, 3), (0, 0, 0), 1.0),  # from inside: the far root
        ((0, 0.999, 5), (0, 0, -2), (0, 0, 0), 1.0),  # close to grazing
        ((0, 0, 0), (0.6, 0.8, 0.0), (3e6, 4e6, 0.0), 10.0),  # far away: 5e6 units off, radius 10
        ((1e-3, 0, 0), (0, 0, 1), (0, 0, 1e7), 1e3),  # large sphere far along the axis
        ((0, 0, 0), (1, 3e-9, 1e-9), (1e8, 0, 0), 1.0),  # unit sphere at 1e8
    ],
)
def test_sphere_nearest_root_matches_exact_quadratic(o, d, c, r):
    roots = exact_sphere_roots(o, d, c, r)
    expect = next(t for t in roots if t > 0.0)
    hit, t = ray_sphere(*map(float, o), *map(float, d), 0.0, math.inf, *map(float, c), r)
    assert hit
    assert t == pytest.approx(expect, rel=1e-12)  # float64 eps is 1.1e-16: a few ulps of slack


def test_sphere_far_away_beats_textbook_formula():
    """A unit sphere 1e8 units away: b^2 and 4ac agree to 16 digits, so the textbook form
    keeps about 8 of them; the cancellation-free form (Haines et al., Ray Tracing Gems ch. 7,
    2019) stays within a few ulps. The textbook error shows the case really is demanding."""
    o, d, c, r = (0.0, 0.0, 0.0), (1.0, 3e-9, 1e-9), (1e8, 0.0, 0.0), 1.0
    exact = exact_sphere_roots(o, d, c, r)[0]
    _, t = ray_sphere(*o, *d, 0.0, math.inf, *c, r)
    _, t_naive = ray_sphere_reference(o, d, c, r)
    assert abs(t - exact) <= 4 * math.ulp(exact)
    assert abs(t_naive - exact) > 1e-10 * exact


@pytest.mark.parametrize("seed", range(3))
def test_sphere_matches_reference_on_random_rays(seed):
    rng = np.random.default_rng(seed)
    for _ in range(300):
        o, d, c = rng.normal(size=3) * 3, rng.normal(size=3), rng.normal(size=3)
        r = float(rng.uniform(0.2, 2.0))
        hit, t = ray_sphere(*o, *d, 0.0, math.inf, *c, r)
        hr, tr = ray_sphere_reference(o, d, c, r)
        assert hit == hr
        if hit:
            assert t == pytest.approx(tr, rel=1e-9)


@pytest.mark.parametrize("tmin,tmax,expect", [(0.0, math.inf, 4.0), (4.5, math.inf, 6.0), (0.0, 3.0, None),
                                              (6.5, math.inf, None)])
def test_sphere_respects_interval(tmin, tmax, expect):
    hit, t = ray_sphere(0.0, 0.0, 5.0, 0.0, 0.0, -1.0, tmin, tmax, 0.0, 0.0, 0.0, 1.0)
    assert hit == (expect is not None)
    if expect is not None:
        assert t == pytest.approx(expect)


# ------------------------------------------------------------------------------------------
# boxes

LO = np.array([-1.0, -2.0, 0.5], np.float32)
HI = np.array([1.0, 2.0, 3.0], np.float32)


@pytest.mark.parametrize("seed", range(3))
def test_box_matches_slab_reference(seed):
    rng = np.random.default_rng(seed)
    for _ in range(500):
        o = rng.normal(size=3) * 3
        d = rng.normal(size=3)
        d[rng.random(3) < 0.3] = 0.0  # axis-parallel rays: inverse components are infinite
        if not d.any():
            d[0] = 1.0
        hit, tn = ray_box(*o, inverse(d[0]), inverse(d[1]), inverse(d[2]), 0.0, math.inf, LO, HI)
        hr, tr = ray_box_reference(o, d, LO.astype(float), HI.astype(float))
        assert hit == hr
        if hit:
            assert tn == pytest.approx(tr, rel=1e-12, abs=1e-12)


@pytest.mark.parametrize("o", [(-1.0, 0.0, 1.0), (1.0, 2.0, 3.0), (0.0, -2.0, 0.5)])
def test_box_ray_in_a_face_plane_is_nan_free(o):
    """o lies in face planes and d has zero components there: (lo - o) * inf is 0 * inf = NaN;
    the slab must then not constrain (the ray runs along the face: a conservative hit)."""
    d = (0.0, 0.0, 1.0) if o[2] != 3.0 else (0.0, 0.0, -1.0)
    hit, tn = ray_box(*o, inverse(d[0]), inverse(d[1]), inverse(d[2]), 0.0, math.inf, LO, HI)
    assert hit and not math.isnan(tn)


def test_box_entry_distance_is_clipped_to_tmin():
    # from inside, the entry distance is tmin itself
    hit, tn = ray_box(0.0, 0.0, 1.0, 1.0, math.inf, math.inf, 0.25, 10.0, LO, HI)
    assert hit and tn == 0.25
