"""Ray/primitive intersection: scalar numba helpers plus slow numpy references beside them.

Every kernel takes plain float scalars (so numba inlines it into traversal loops) and computes
in float64, whatever the storage precision of the geometry. Ray directions need not be unit
length: every `t` is in units of |d|, so a ray moved into an instance's object space without
re-normalising keeps its world `t`.

* `ray_triangle`: the watertight test of Woop, Benthin and Wald, "Watertight Ray/Triangle
  Intersection", JCGT 2(1), 2013. The ray is made the +z axis of a sheared frame; each edge's
  2D edge function then depends only on the two vertices of that edge, so the neighbour across
  a shared edge computes the same value with the opposite sign and a ray can never slip
  between the two.
* `ray_sphere`: the cancellation-free quadratic of Haines, Günther and Akenine-Möller,
  "Precision Improvements for Ray/Sphere Intersection", Ray Tracing Gems ch. 7, 2019.
* `ray_box`: the slab test; comparisons are written so that a NaN slab (0 * inf when the ray
  lies in a slab plane) imposes no constraint, and the far distance is widened by
  1 + 2 gamma(3) as in Ize, "Robust BVH Ray Traversal", JCGT 2(2), 2013.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

# Ize 2013, eq. (6): gamma(n) = n eps / (1 - n eps) with eps = 2^-53 for float64
_EPS64 = 2.0**-53
BOX_WIDEN = 1.0 + 2.0 * (3.0 * _EPS64 / (1.0 - 3.0 * _EPS64))


# ------------------------------------------------------------------------------------------
# triangle


@njit(cache=True, fastmath=False, inline="always")
def ray_setup(dx, dy, dz):
    """Per-ray constants of the watertight test: (kx, ky, kz, sx, sy, sz).

    kz is the axis where |d| is largest; kx, ky follow it cyclically and are swapped when
    d[kz] < 0 so the winding of the sheared triangle is preserved (Woop et al. 2013, fig. 4).
    """
    ax, ay, az = abs(dx), abs(dy), abs(dz)
    if ax >= ay and ax >= az:
        kz, dkz = 0, dx
        kx, ky, dkx, dky = 1, 2, dy, dz
    elif ay >= az:
        kz, dkz = 1, dy
        kx, ky, dkx, dky = 2, 0, dz, dx
    else:
        kz, dkz = 2, dz
        kx, ky, dkx, dky = 0, 1, dx, dy
    if dkz < 0.0:
        kx, ky = ky, kx
        dkx, dky = dky, dkx
    return kx, ky, kz, dkx / dkz, dky / dkz, 1.0 / dkz


@njit(cache=True, fastmath=False, inline="always")
def _pick(k, x, y, z):
    if k == 0:
        return x
    if k == 1:
        return y
    return z


@njit(cache=True, fastmath=False, inline="always")
def sheared_triangle(sx, sy, sz, tmin, tmax, ax, ay, az, bx, by, bz, cx, cy, cz):
    """Core of the watertight test on vertices already relative to the origin and permuted
    into (kx, ky, kz) order. Returns (hit, t, u, v), u and v the barycentrics of b and c."""
    # shear so the ray is the +z axis (Woop et al. 2013, section 3)
    axs = ax - sx * az
    ays = ay - sy * az
    bxs = bx - sx * bz
    bys = by - sy * bz
    cxs = cx - sx * cz
    cys = cy - sy * cz
    # 2D edge functions; U belongs to the edge b-c opposite a, and so on
    U = cxs * bys - cys * bxs
    V = axs * cys - ays * cxs
    W = bxs * ays - bys * axs
    if (U < 0.0 or V < 0.0 or W < 0.0) and (U > 0.0 or V > 0.0 or W > 0.0):
        return False, tmax, 0.0, 0.0
    det = U + V + W
    if det == 0.0:  # the ray lies in the triangle's plane (or the triangle is degenerate)
        return False, tmax, 0.0, 0.0
    T = U * (sz * az) + V * (sz * bz) + W * (sz * cz)
    # t = T / det within (tmin, tmax), tested without the division and for either sign of det
    if det > 0.0:
        if T <= tmin * det or T >= tmax * det:
            return False, tmax, 0.0, 0.0
    else:
        if T >= tmin * det or T <= tmax * det:
            return False, tmax, 0.0, 0.0
    inv = 1.0 / det
    return True, T * inv, V * inv, W * inv


@njit(cache=True, fastmath=False, inline="always")
def ray_triangle(ox, oy, oz, dx, dy, dz, tmin, tmax, ax, ay, az, bx, by, bz, cx, cy, cz):
    """Watertight ray/triangle test: (hit, t, u, v) with hit point (1-u-v) a + u b + v c.

    Hits in (tmin, tmax) only; both windings hit. On a miss t = tmax, u = v = 0.
    """
    kx, ky, kz, sx, sy, sz = ray_setup(dx, dy, dz)
    okx, oky, okz = _pick(kx, ox, oy, oz), _pick(ky, ox, oy, oz), _pick(kz, ox, oy, oz)
    return sheared_triangle(
        sx, sy, sz, tmin, tmax,
        _pick(kx, ax, ay, az) - okx, _pick(ky, ax, ay, az) - oky, _pick(kz, ax, ay, az) - okz,
        _pick(kx, bx, by, bz) - okx, _pick(ky, bx, by, bz) - oky, _pick(kz, bx, by, bz) - okz,
        _pick(kx, cx, cy, cz) - okx, _pick(ky, cx, cy, cz) - oky, _pick(kz, cx, cy, cz) - okz,
    )


def ray_triangle_reference(o, d, a, b, c, tmin=0.0, tmax=math.inf):
    """Möller and Trumbore, "Fast, Minimum Storage Ray/Triangle Intersection", JGT 2(1), 1997,
    in float64 numpy. o, d, a, b, c: (3,) float64. Returns (hit, t, u, v) like `ray_triangle`
    (not watertight: an exactly-on-edge ray may miss both neighbours)."""
    o, d, a, b, c = (np.asarray(x, np.float64) for x in (o, d, a, b, c))
    e1, e2 = b - a, c - a
    p = np.cross(d, e2)
    det = float(e1 @ p)
    if det == 0.0:
        return False, tmax, 0.0, 0.0
    s = o - a
    u = float(s @ p) / det
    q = np.cross(s, e1)
    v = float(d @ q) / det
    t = float(e2 @ q) / det
    if u < 0.0 or v < 0.0 or u + v > 1.0 or not (tmin < t < tmax):
        return False, tmax, 0.0, 0.0
    return True, t, u, v


# ------------------------------------------------------------------------------------------
# sphere


@njit(cache=True, fastmath=False, inline="always")
def ray_sphere(ox, oy, oz, dx, dy, dz, tmin, tmax, cx, cy, cz, r):
    """Nearest root t in (tmin, tmax) of |o + t d - c| = r: (hit, t); t = tmax on a miss."""
    fx, fy, fz = ox - cx, oy - cy, oz - cz
    a = dx * dx + dy * dy + dz * dz
    bh = fx * dx + fy * dy + fz * dz  # half of the usual b
    # discriminant as a * (r^2 - |f - (bh/a) d|^2): the distance of the centre from the line,
    # free of the b^2 - 4ac cancellation (Haines et al. 2019, eq. 7.5)
    s = bh / a
    lx, ly, lz = fx - s * dx, fy - s * dy, fz - s * dz
    disc = a * (r * r - (lx * lx + ly * ly + lz * lz))
    if disc < 0.0:
        return False, tmax
    c = fx * fx + fy * fy + fz * fz - r * r
    # q has the sign of -bh, so neither root formula subtracts nearly equal numbers
    # (Press et al., Numerical Recipes, section 5.6; Haines et al. 2019, eq. 7.6)
    q = -(bh + math.copysign(math.sqrt(disc), bh))
    if q == 0.0:  # bh = 0 and disc = 0: a ray from the surface along the tangent
        t0 = 0.0
        t1 = 0.0
    else:
        t0 = c / q
        t1 = q / a
    if t0 > t1:
        t0, t1 = t1, t0
    if tmin < t0 < tmax:
        return True, t0
    if tmin < t1 < tmax:
        return True, t1
    return False, tmax


def ray_sphere_reference(o, d, center, r, tmin=0.0, tmax=math.inf):
    """The textbook quadratic formula in float64 numpy: (hit, t) like `ray_sphere`. Loses
    precision when the sphere is far from the origin relative to its radius."""
    o, d, center = (np.asarray(x, np.float64) for x in (o, d, center))
    f = o - center
    a, b, c = float(d @ d), 2.0 * float(f @ d), float(f @ f) - r * r
    disc = b * b - 4.0 * a * c
    if disc < 0.0:
        return False, tmax
    for t in sorted(((-b - math.sqrt(disc)) / (2 * a), (-b + math.sqrt(disc)) / (2 * a))):
        if tmin < t < tmax:
            return True, t
    return False, tmax


# ------------------------------------------------------------------------------------------
# box


@njit(cache=True, fastmath=False, inline="always")
def inverse(d):
    """1/d with a signed infinity for d = ±0 (never a NaN from a finite d)."""
    return 1.0 / d if d != 0.0 else math.copysign(math.inf, d)


@njit(cache=True, fastmath=False, inline="always")
def ray_box(ox, oy, oz, idx, idy, idz, tmin, tmax, lo, hi):
    """Slab test of the ray o + t d against the box [lo, hi] for t in [tmin, tmax].

    idx, idy, idz: 1/d from `inverse`; lo, hi: (3,) arrays (float32 or float64).
    Returns (hit, tnear) with tnear the entry distance clipped to tmin.
    """
    tn = tmin
    tf = tmax
    t0 = (lo[0] - ox) * idx
    t1 = (hi[0] - ox) * idx
    if t0 > t1:
        t0, t1 = t1, t0
    # "x if x > y else y" keeps y when x is NaN: a NaN slab never narrows the interval
    tn = t0 if t0 > tn else tn
    tf = t1 * BOX_WIDEN if t1 * BOX_WIDEN < tf else tf
    t0 = (lo[1] - oy) * idy
    t1 = (hi[1] - oy) * idy
    if t0 > t1:
        t0, t1 = t1, t0
    tn = t0 if t0 > tn else tn
    tf = t1 * BOX_WIDEN if t1 * BOX_WIDEN < tf else tf
    t0 = (lo[2] - oz) * idz
    t1 = (hi[2] - oz) * idz
    if t0 > t1:
        t0, t1 = t1, t0
    tn = t0 if t0 > tn else tn
    tf = t1 * BOX_WIDEN if t1 * BOX_WIDEN < tf else tf
    return tn <= tf, tn


@njit(cache=True, fastmath=False, inline="always")
def ray_box_at(ox, oy, oz, idx, idy, idz, tmin, tmax, lo, hi, i):
    """`ray_box` against row i of (m, 3) bound arrays, without making row views in hot loops."""
    tn = tmin
    tf = tmax
    t0 = (lo[i, 0] - ox) * idx
    t1 = (hi[i, 0] - ox) * idx
    if t0 > t1:
        t0, t1 = t1, t0
    tn = t0 if t0 > tn else tn
    tf = t1 * BOX_WIDEN if t1 * BOX_WIDEN < tf else tf
    t0 = (lo[i, 1] - oy) * idy
    t1 = (hi[i, 1] - oy) * idy
    if t0 > t1:
        t0, t1 = t1, t0
    tn = t0 if t0 > tn else tn
    tf = t1 * BOX_WIDEN if t1 * BOX_WIDEN < tf else tf
    t0 = (lo[i, 2] - oz) * idz
    t1 = (hi[i, 2] - oz) * idz
    if t0 > t1:
        t0, t1 = t1, t0
    tn = t0 if t0 > tn else tn
    tf = t1 * BOX_WIDEN if t1 * BOX_WIDEN < tf else tf
    return tn <= tf, tn


def ray_box_reference(o, d, lo, hi, tmin=0.0, tmax=math.inf):
    """Slab test by clipping the ray interval axis by axis, in plain Python: (hit, tnear).
    An axis with d = 0 constrains only through whether o lies inside that slab."""
    tn, tf = tmin, tmax
    for k in range(3):
        if d[k] == 0.0:
            if not (lo[k] <= o[k] <= hi[k]):
                return False, tn
            continue
        t0, t1 = sorted(((lo[k] - o[k]) / d[k], (hi[k] - o[k]) / d[k]))
        tn, tf = max(tn, t0), min(tf, t1)
    return tn <= tf, tn
