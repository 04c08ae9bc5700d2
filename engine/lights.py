"""Light sampling for next-event estimation: emissive triangles, emissive spheres, environment.

Every function returns solid-angle pdfs measured at the shading point and *including* the
probability of choosing that light, so the integrator can weigh light samples against BSDF
samples with the power heuristic (Veach & Guibas 1995, "Optimally combining sampling
techniques for Monte Carlo rendering") using the same numbers from both sides.

Choice of light: the environment with probability `p_env` (env_params[3]), otherwise one scene
light in proportion to its power (`light_pmf`, emitted flux at the frame's middle instant).
Scene lights are emissive triangles and spheres, and punctual lights (punctual.py): those are
delta lights, whose samples report the probability of their choice instead of a density.

Environment maps are latitude-longitude: row 0 is straight up (+y), the middle row the horizon,
the middle column looks towards -z, the column three quarters across towards +x, and `rotate`
turns the map about +y by the right-hand rule, as an object's rotate does (90° brings what lay
towards -z round to -x). They are sampled with a
piecewise-constant 2D distribution over pixels weighted by luminance × sin θ (the marginal /
conditional method, e.g. Pharr, Jakob & Humphreys, *Physically Based Rendering* 3rd ed. §13.6.7).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from .borrowing import borrowing
from .material_table import M_EMISSION
from .punctual import sample_punctual
from .scene import KIND_SPHERE, point_to_world, tri_corners
from .surface import emission_at

INV_4PI = 1.0 / (4.0 * math.pi)
NO_SAMPLE = (0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 0.0, 0.0, False)


@njit(cache=True, inline="always")
def _search(cdf, u):
    """Largest i with cdf[i] <= u, for a non-decreasing cdf of length n+1 with cdf[0] = 0."""
    lo = 0
    hi = cdf.shape[0] - 2
    while lo < hi:
        mid = (lo + hi + 1) >> 1
        if cdf[mid] <= u:
            lo = mid
        else:
            hi = mid - 1
    return lo


# ---------------------------------------------------------------- environment


@njit(cache=True, inline="always")
def _env_pixel(S, dx, dy, dz):
    """Row, column and sin θ of the map pixel that direction d falls in."""
    h = S.env_map.shape[0]
    w = S.env_map.shape[1]
    theta = math.acos(min(1.0, max(-1.0, dy)))
    u = (math.atan2(dx, -dz) + S.env_params[2]) / (2.0 * math.pi) + 0.5
    u -= math.floor(u)
    col = min(w - 1, int(u * w))
    row = min(h - 1, int(theta / math.pi * h))
    return row, col, math.sin(theta)


@borrowing()
def env_radiance(S, dx, dy, dz):
    """Radiance arriving from direction d (unit) out of the environment: 3 floats."""
    if S.env_params[0] == 0.0:
        c = S.env_color
        return c[0], c[1], c[2]
    row, col, _ = _env_pixel(S, dx, dy, dz)
    px = S.env_map[row, col]
    k = S.env_params[1]
    return px[0] * k, px[1] * k, px[2] * k


@borrowing()
def env_pdf(S, dx, dy, dz):
    """Solid-angle pdf of sampling direction d from the environment (choice excluded)."""
    if S.env_params[0] == 0.0:
        return INV_4PI
    h = S.env_map.shape[0]
    w = S.env_map.shape[1]
    row, col, sin_t = _env_pixel(S, dx, dy, dz)
    if sin_t <= 0.0:
        return 0.0
    p_row = S.env_row_cdf[row + 1] - S.env_row_cdf[row]
    p_col = S.env_col_cdf[row, col + 1] - S.env_col_cdf[row, col]
    # pdf over (u, v) is pmf · w · h; dω = 2π² sin θ du dv
    return p_row * p_col * w * h / (2.0 * math.pi * math.pi * sin_t)


@borrowing()
def env_sample(S, u1, u2):
    """A direction from the environment: (dx, dy, dz, pdf) with pdf in solid angle."""
    if S.env_params[0] == 0.0:
        z = 1.0 - 2.0 * u1
        r = math.sqrt(max(0.0, 1.0 - z * z))
        phi = 2.0 * math.pi * u2
        return r * math.cos(phi), z, r * math.sin(phi), INV_4PI
    h = S.env_map.shape[0]
    w = S.env_map.shape[1]
    row = _search(S.env_row_cdf, u1)
    p_row = S.env_row_cdf[row + 1] - S.env_row_cdf[row]
    cdf = S.env_col_cdf[row]
    col = _search(cdf, u2)
    p_col = cdf[col + 1] - cdf[col]
    if p_row <= 0.0 or p_col <= 0.0:
        return 0.0, 1.0, 0.0, 0.0
    fv = (u1 - S.env_row_cdf[row]) / p_row
    fu = (u2 - cdf[col]) / p_col
    v = (row + min(fv, 0.999999)) / h
    u = (col + min(fu, 0.999999)) / w
    theta = v * math.pi
    phi = (u - 0.5) * 2.0 * math.pi - S.env_params[2]
    sin_t = math.sin(theta)
    if sin_t <= 0.0:
        return 0.0, 1.0, 0.0, 0.0
    pdf = p_row * p_col * w * h / (2.0 * math.pi * math.pi * sin_t)
    return sin_t * math.sin(phi), math.cos(theta), -sin_t * math.cos(phi), pdf


def build_env_distribution(env_map: np.ndarray):
    """Marginal row cdf (H+1,) and conditional column cdfs (H, W+1) for a (H, W, 3) map."""
    h, w, _ = env_map.shape
    # Rec. 709 luminance weights (ITU-R BT.709), times sin θ at the row centre
    lum = env_map[..., 0] * 0.2126 + env_map[..., 1] * 0.7152 + env_map[..., 2] * 0.0722
    sin_t = np.sin((np.arange(h) + 0.5) / h * np.pi)
    weight = np.maximum(lum, 0.0) * sin_t[:, None]
    row_sum = weight.sum(axis=1)
    col_cdf = np.zeros((h, w + 1))
    uniform = np.arange(1, w + 1) / w
    for r in range(h):
        col_cdf[r, 1:] = np.cumsum(weight[r]) / row_sum[r] if row_sum[r] > 0 else uniform
        col_cdf[r, -1] = 1.0
    row_cdf = np.zeros(h + 1)
    total = row_sum.sum()
    row_cdf[1:] = np.cumsum(row_sum) / total if total > 0 else np.arange(1, h + 1) / h
    row_cdf[-1] = 1.0
    return row_cdf, col_cdf


# ---------------------------------------------------------------- scene lights


@njit(cache=True, inline="always")
def _world_triangle(S, inst, k, time_u):
    motion = S.inst_motion[inst]
    moving = S.inst_moving[inst]
    a0, a1, a2, b0, b1, b2, c0, c1, c2 = tri_corners(S, S.inst_mesh[inst], k, time_u)
    ax, ay, az = point_to_world(motion, moving, time_u, a0, a1, a2)
    bx, by, bz = point_to_world(motion, moving, time_u, b0, b1, b2)
    cx, cy, cz = point_to_world(motion, moving, time_u, c0, c1, c2)
    return ax, ay, az, bx, by, bz, cx, cy, cz


@njit(cache=True, inline="always")
def _world_sphere(S, inst, time_u):
    c = S.inst_sphere[inst]
    motion = S.inst_motion[inst]
    cx, cy, cz = point_to_world(motion, S.inst_moving[inst], time_u, c[0], c[1], c[2])
    return cx, cy, cz, c[3] * motion[0, 7]  # spheres carry a uniform scale


@njit(cache=True, inline="always")
def _area_to_solid(px, py, pz, qx, qy, qz, nx, ny, nz, area):
    """dist² / (|cos θ_light| · area): converts a uniform-by-area pdf to solid angle at p."""
    lx = qx - px
    ly = qy - py
    lz = qz - pz
    dist2 = lx * lx + ly * ly + lz * lz
    nn = math.sqrt((nx * nx + ny * ny + nz * nz) * dist2)
    if nn <= 0.0 or area <= 0.0:
        return 0.0
    cos_l = abs(nx * lx + ny * ly + nz * lz) / nn
    if cos_l <= 1e-12:
        return 0.0
    return dist2 / (cos_l * area)


@njit(cache=True)
def sphere_solid_pdf(cx, cy, cz, r, px, py, pz, qx, qy, qz, nx, ny, nz):
    """Solid-angle pdf at p of the sphere sampling below, for the sphere point q with normal n."""
    ex = cx - px
    ey = cy - py
    ez = cz - pz
    d2 = ex * ex + ey * ey + ez * ez
    if d2 > r * r * 1.0001:
        sin2 = r * r / d2
        cos_max = math.sqrt(max(0.0, 1.0 - sin2))
        return 1.0 / (2.0 * math.pi * (sin2 / (1.0 + cos_max)))  # 1 - cos θmax, stably
    return _area_to_solid(px, py, pz, qx, qy, qz, nx, ny, nz, 4.0 * math.pi * r * r)


@borrowing()
def light_pdf(S, inst, k, px, py, pz, qx, qy, qz, nx, ny, nz, time_u):
    """Pdf (solid angle at p, choice included) that NEE picks point q (normal n) on inst."""
    base = S.inst_light_base[inst]
    if base < 0:
        return 0.0
    keep = 1.0 - S.env_params[3]
    if S.inst_kind[inst] == KIND_SPHERE:
        cx, cy, cz, r = _world_sphere(S, inst, time_u)
        return keep * S.light_pmf[base] * sphere_solid_pdf(cx, cy, cz, r, px, py, pz, qx, qy, qz, nx, ny, nz)
    light = base + (k - S.mesh_tri_base[S.inst_mesh[inst]])
    ax, ay, az, bx, by, bz, cx, cy, cz = _world_triangle(S, inst, k, time_u)
    gx = (by - ay) * (cz - az) - (bz - az) * (cy - ay)
    gy = (bz - az) * (cx - ax) - (bx - ax) * (cz - az)
    gz = (bx - ax) * (cy - ay) - (by - ay) * (cx - ax)
    area = 0.5 * math.sqrt(gx * gx + gy * gy + gz * gz)
    return keep * S.light_pmf[light] * _area_to_solid(px, py, pz, qx, qy, qz, gx, gy, gz, area)


@njit(cache=True)
def _orthonormal(wx, wy, wz):
    """Two unit vectors completing w to a right-handed basis (Duff et al. 2017, JCGT 6(1))."""
    sgn = 1.0 if wz >= 0.0 else -1.0
    a = -1.0 / (sgn + wz)
    b = wx * wy * a
    return 1.0 + sgn * wx * wx * a, sgn * b, -sgn * wx, b, sgn + wy * wy * a, -wy


@njit(cache=True, inline="always")
def _light_material(S, inst, k):
    """Material row of a light: the instance's, else its triangle k's."""
    m = S.inst_mat[inst]
    if m >= 0 or k < 0:
        return max(m, 0)
    return S.tri_mat[k]


@borrowing()
def sample_light(S, px, py, pz, time_u, u_sel, u1, u2):
    """Pick a light and a point on it as seen from p.

    Returns (wx, wy, wz, dist, Lr, Lg, Lb, pdf, delta): unit direction from p, distance to the
    light point (inf for the environment), its emitted radiance towards p, and the solid-angle pdf
    with the choice of light included. pdf = 0 means no sample. For a punctual light delta is True,
    L is the irradiance it gives at normal incidence and pdf the probability of choosing it.
    """
    p_env = S.env_params[3]
    n_lights = S.light_inst.shape[0]
    if u_sel < p_env or n_lights == 0:
        if p_env <= 0.0:
            return NO_SAMPLE
        dx, dy, dz, pdf = env_sample(S, u1, u2)
        if pdf <= 0.0:
            return NO_SAMPLE
        lr, lg, lb = env_radiance(S, dx, dy, dz)
        return dx, dy, dz, math.inf, lr, lg, lb, p_env * pdf, False
    light = _search(S.light_cdf, min((u_sel - p_env) / (1.0 - p_env), 0.99999999))
    inst = S.light_inst[light]
    p_choice = (1.0 - p_env) * S.light_pmf[light]
    if p_choice <= 0.0:
        return NO_SAMPLE
    if inst < 0:
        wx, wy, wz, dist, er, eg, eb = sample_punctual(S.punct[S.light_prim[light]], px, py, pz, time_u)
        return wx, wy, wz, dist, er, eg, eb, p_choice, True
    k = S.light_prim[light]
    em = S.mats[_light_material(S, inst, k)]
    wb = 0.0
    wc = 0.0
    if S.inst_kind[inst] == KIND_SPHERE:
        cx, cy, cz, r = _world_sphere(S, inst, time_u)
        ex, ey, ez = cx - px, cy - py, cz - pz
        d2 = ex * ex + ey * ey + ez * ez
        if d2 > r * r * 1.0001:
            # uniform in the cone the sphere subtends (Shirley & Wang 1992, Graphics Gems III)
            d = math.sqrt(d2)
            wx, wy, wz = ex / d, ey / d, ez / d
            sin2 = r * r / d2
            one_minus = sin2 / (1.0 + math.sqrt(max(0.0, 1.0 - sin2)))
            cos_t = 1.0 - u1 * one_minus
            sin_t = math.sqrt(max(0.0, 1.0 - cos_t * cos_t))
            phi = 2.0 * math.pi * u2
            tx, ty, tz, bx, by, bz = _orthonormal(wx, wy, wz)
            cp, sp = math.cos(phi) * sin_t, math.sin(phi) * sin_t
            dx = cp * tx + sp * bx + cos_t * wx
            dy = cp * ty + sp * by + cos_t * wy
            dz = cp * tz + sp * bz + cos_t * wz
            # distance to the near side along d (clamped for rays at the silhouette)
            dist = d * cos_t - math.sqrt(max(0.0, r * r - d2 * sin_t * sin_t))
            pdf = p_choice / (2.0 * math.pi * one_minus)
            return dx, dy, dz, dist, em[M_EMISSION], em[M_EMISSION + 1], em[M_EMISSION + 2], pdf, False
        # inside the sphere: uniform by area
        z = 1.0 - 2.0 * u1
        rr = math.sqrt(max(0.0, 1.0 - z * z))
        phi = 2.0 * math.pi * u2
        nx, ny, nz = rr * math.cos(phi), rr * math.sin(phi), z
        qx, qy, qz = cx + r * nx, cy + r * ny, cz + r * nz
        conv = _area_to_solid(px, py, pz, qx, qy, qz, nx, ny, nz, 4.0 * math.pi * r * r)
    else:
        ax, ay, az, bx, by, bz, cx, cy, cz = _world_triangle(S, inst, k, time_u)
        # uniform point on the triangle (Osada et al. 2002, "Shape distributions", eq. 1)
        su = math.sqrt(u1)
        wb = su * (1.0 - u2)
        wc = su * u2
        qx = ax + wb * (bx - ax) + wc * (cx - ax)
        qy = ay + wb * (by - ay) + wc * (cy - ay)
        qz = az + wb * (bz - az) + wc * (cz - az)
        nx = (by - ay) * (cz - az) - (bz - az) * (cy - ay)
        ny = (bz - az) * (cx - ax) - (bx - ax) * (cz - az)
        nz = (bx - ax) * (cy - ay) - (by - ay) * (cx - ax)
        area = 0.5 * math.sqrt(nx * nx + ny * ny + nz * nz)
        conv = _area_to_solid(px, py, pz, qx, qy, qz, nx, ny, nz, area)
    if conv <= 0.0:
        return NO_SAMPLE
    lx, ly, lz = qx - px, qy - py, qz - pz
    dist = math.sqrt(lx * lx + ly * ly + lz * lz)
    if k >= 0:  # a triangle: its emission may be textured
        er, eg, eb = emission_at(S, _light_material(S, inst, k), inst, k, wb, wc)
        return lx / dist, ly / dist, lz / dist, dist, er, eg, eb, p_choice * conv, False
    er, eg, eb = em[M_EMISSION], em[M_EMISSION + 1], em[M_EMISSION + 2]
    return lx / dist, ly / dist, lz / dist, dist, er, eg, eb, p_choice * conv, False
