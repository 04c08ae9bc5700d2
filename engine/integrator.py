"""Unidirectional path tracing with next-event estimation and multiple importance sampling.

`render_tile` renders the samples [first, first + count) of every pixel of one tile and adds
them into per-pixel sums that the caller allocated (a `Film`'s arrays). Each sample's value
depends only on (seed, frame, pixel, sample index): sample dimensions are drawn from the
counter-based sampler, so any split of a pixel's sample range over batches and machines adds up
to the same sums (to float rounding).

Estimator per path vertex (Veach 1997, PhD thesis ch. 9; power heuristic, β = 2):
  * emission seen by a BSDF-sampled ray is weighted w_b = p_b² / (p_b² + p_l²),
  * a light sample is weighted w_l = p_l² / (p_l² + p_b²) and traced with a shadow ray,
  * perfectly specular (delta) bounces skip NEE and count emission they reach in full.
Russian roulette from bounce `rr_start` on keeps the estimate unbiased by dividing the
throughput by the survival probability. A sample whose radiance is NaN or infinite is not added;
it is counted in `dropped` instead.

Sample dimensions: 0-1 pixel position, 2-3 lens, 4 shutter time, then 8 per bounce b starting at
8 + 8b: BSDF direction (2), BSDF lobe (1), roulette (1), light position (2), light choice (1),
spare (1). The 2D draws sit on dimension pairs (4g, 4g+1) of the padded sampler, whose
unscrambled Sobol pair is a (0, 2)-net; pair (4g+2, 4g+3) is not.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from .bsdf import bsdf_eval, bsdf_sample, build_frame, has_nonspecular_lobe
from .camera import camera_ray
from .lights import env_pdf, env_radiance, light_pdf, sample_light
from .sampler import sample_dim
from .scene import intersect_scene, occluded_scene, surface_at

STACK_SIZE = 64
DIMS_PER_BOUNCE = 8
FIRST_BOUNCE_DIM = 8


@njit(cache=True, inline="always")
def _offset_scale(px, py, pz):
    """Distance to push a new ray's origin off a surface: relative to the coordinates' size,
    well above float32 rounding of the stored geometry (rule of thumb: ~2^-15 relative)."""
    return 3e-5 * (1.0 + max(abs(px), max(abs(py), abs(pz))))


@njit(cache=True)
def trace_path(S, cam, aperture, width, height, frame, seed, mode, max_bounces, rr_start,
               pixel, fx, fy, index, stack_top, stack):
    """One camera sample: (Lr, Lg, Lb, hit, albedo rgb, normal xyz, depth)."""
    jx = sample_dim(seed, frame, pixel, index, 0, mode)
    jy = sample_dim(seed, frame, pixel, index, 1, mode)
    lu = sample_dim(seed, frame, pixel, index, 2, mode)
    lv = sample_dim(seed, frame, pixel, index, 3, mode)
    time_u = sample_dim(seed, frame, pixel, index, 4, mode)
    ox, oy, oz, dx, dy, dz = camera_ray(cam, aperture, width, height, fx + jx, fy + jy, lu, lv, time_u)

    lr = 0.0
    lg = 0.0
    lb = 0.0
    br = 1.0
    bg = 1.0
    bb = 1.0
    first_hit = False
    ar = ag = ab = 0.0
    anx = any_ = anz = 0.0
    depth = 0.0
    prev_pdf = 0.0
    prev_delta = True
    prev_x = ox
    prev_y = oy
    prev_z = oz

    for bounce in range(max_bounces + 1):
        t, inst, k, u, v = intersect_scene(S, ox, oy, oz, dx, dy, dz, math.inf, time_u, stack_top, stack)
        if inst < 0:
            er, eg, eb = env_radiance(S, dx, dy, dz)
            w = 1.0
            if not prev_delta and S.env_params[3] > 0.0:
                pl = S.env_params[3] * env_pdf(S, dx, dy, dz)
                w = prev_pdf * prev_pdf / (prev_pdf * prev_pdf + pl * pl)
            lr += br * er * w
            lg += bg * eg * w
            lb += bb * eb * w
            break

        px = ox + t * dx
        py = oy + t * dy
        pz = oz + t * dz
        nx, ny, nz = surface_at(S, inst, k, u, v, px, py, pz, time_u)
        mat = S.mats[S.inst_mat[inst]]
        cos_o = -(nx * dx + ny * dy + nz * dz)

        if bounce == 0:
            first_hit = True
            ar, ag, ab = mat[1], mat[2], mat[3]
            sgn = 1.0 if cos_o >= 0.0 else -1.0
            anx, any_, anz = nx * sgn, ny * sgn, nz * sgn
            depth = t

        # emission reached by the previous bounce's BSDF sample
        if mat[6] > 0.0 or mat[7] > 0.0 or mat[8] > 0.0:
            w = 1.0
            if not prev_delta:
                pl = light_pdf(S, inst, k, prev_x, prev_y, prev_z, px, py, pz, nx, ny, nz, time_u)
                w = prev_pdf * prev_pdf / (prev_pdf * prev_pdf + pl * pl)
            lr += br * mat[6] * w
            lg += bg * mat[7] * w
            lb += bb * mat[8] * w

        if bounce == max_bounces:
            break

        # shading frame: glass keeps the outward normal (inside/outside matters); opaque
        # materials face the normal towards the viewer (two-sided surfaces)
        if mat[0] != 2.0 and cos_o < 0.0:
            nx, ny, nz = -nx, -ny, -nz
        tx, ty, tz, sx, sy, sz = build_frame(nx, ny, nz)
        wox = -(dx * tx + dy * ty + dz * tz)
        woy = -(dx * sx + dy * sy + dz * sz)
        woz = -(dx * nx + dy * ny + dz * nz)
        eps = _offset_scale(px, py, pz)
        base = FIRST_BOUNCE_DIM + DIMS_PER_BOUNCE * bounce

        # next-event estimation
        if has_nonspecular_lobe(mat):
            u1 = sample_dim(seed, frame, pixel, index, base + 4, mode)
            u2 = sample_dim(seed, frame, pixel, index, base + 5, mode)
            u_sel = sample_dim(seed, frame, pixel, index, base + 6, mode)
            wx, wy, wz, dist, er, eg, eb, pl = sample_light(S, px, py, pz, time_u, u_sel, u1, u2)
            if pl > 0.0 and (er > 0.0 or eg > 0.0 or eb > 0.0):
                wix = wx * tx + wy * ty + wz * tz
                wiy = wx * sx + wy * sy + wz * sz
                wiz = wx * nx + wy * ny + wz * nz
                fr, fg, fb, pb = bsdf_eval(mat, wox, woy, woz, wix, wiy, wiz)
                if fr > 0.0 or fg > 0.0 or fb > 0.0:
                    side = eps if wiz > 0.0 else -eps
                    sox = px + nx * side
                    soy = py + ny * side
                    soz = pz + nz * side
                    # aim the shadow ray from the lifted origin at the light point itself and
                    # stop just short of it: reusing the direction from p would move the end
                    # point, which at a sphere's silhouette moves the hit a long way
                    sdx, sdy, sdz, tmax = wx, wy, wz, math.inf
                    if dist < math.inf:
                        sdx = px + wx * dist - sox
                        sdy = py + wy * dist - soy
                        sdz = pz + wz * dist - soz
                        span = math.sqrt(sdx * sdx + sdy * sdy + sdz * sdz)
                        sdx /= span
                        sdy /= span
                        sdz /= span
                        tmax = span * (1.0 - 1e-4)
                    if not occluded_scene(S, sox, soy, soz, sdx, sdy, sdz, tmax, time_u, stack_top, stack):
                        # the BSDF could have sampled this direction too: weigh against it
                        w = pl * pl / (pl * pl + pb * pb)
                        c = abs(wiz) * w / pl
                        lr += br * fr * er * c
                        lg += bg * fg * eg * c
                        lb += bb * fb * eb * c

        # continue the path by sampling the BSDF
        u1 = sample_dim(seed, frame, pixel, index, base + 0, mode)
        u2 = sample_dim(seed, frame, pixel, index, base + 1, mode)
        u0 = sample_dim(seed, frame, pixel, index, base + 2, mode)
        wix, wiy, wiz, wr, wg, wb, pdf, is_delta = bsdf_sample(mat, wox, woy, woz, u0, u1, u2)
        if not (wr > 0.0 or wg > 0.0 or wb > 0.0):
            break
        br *= wr
        bg *= wg
        bb *= wb
        prev_pdf = pdf
        prev_delta = is_delta
        prev_x, prev_y, prev_z = px, py, pz
        dx = wix * tx + wiy * sx + wiz * nx
        dy = wix * ty + wiy * sy + wiz * ny
        dz = wix * tz + wiy * sz + wiz * nz
        dn = math.sqrt(dx * dx + dy * dy + dz * dz)
        dx /= dn
        dy /= dn
        dz /= dn
        side = eps if wiz > 0.0 else -eps
        ox = px + nx * side
        oy = py + ny * side
        oz = pz + nz * side

        if bounce + 1 >= rr_start:
            q = min(0.95, max(br, max(bg, bb)))
            if sample_dim(seed, frame, pixel, index, base + 3, mode) >= q:
                break
            br /= q
            bg /= q
            bb /= q

    return lr, lg, lb, first_hit, ar, ag, ab, anx, any_, anz, depth


@njit(cache=True, parallel=True)
def render_tile(S, cam, aperture, width, height, frame, seed, mode, max_bounces, rr_start,
                x0, y0, tile_w, tile_h, first, count,
                n, rgb_sum, rgb_sq, alpha_sum, albedo_sum, normal_sum, depth_sum, hits, dropped):
    """Add samples [first, first+count) of the tile's pixels into the given sums.

    The sums are (tile_h, tile_w[, 3]) float64 arrays (see film.Film); row 0 of the tile is
    image row y0. Rows run in parallel; every write is per pixel, so the result is the same bits
    for any thread count.
    """
    for ty in prange(tile_h):
        stack_top = np.empty(STACK_SIZE, np.int32)
        stack = np.empty(STACK_SIZE, np.int32)
        y = y0 + ty
        for tx in range(tile_w):
            x = x0 + tx
            pixel = y * width + x
            for s in range(first, first + count):
                lr, lg, lb, hit, ar, ag, ab, nx, ny, nz, depth = trace_path(
                    S, cam, aperture, width, height, frame, seed, mode, max_bounces, rr_start,
                    pixel, float(x), float(y), s, stack_top, stack,
                )
                if not (math.isfinite(lr) and math.isfinite(lg) and math.isfinite(lb)):
                    dropped[ty, tx] += 1.0
                    continue
                n[ty, tx] += 1.0
                rgb_sum[ty, tx, 0] += lr
                rgb_sum[ty, tx, 1] += lg
                rgb_sum[ty, tx, 2] += lb
                rgb_sq[ty, tx, 0] += lr * lr
                rgb_sq[ty, tx, 1] += lg * lg
                rgb_sq[ty, tx, 2] += lb * lb
                if hit:
                    alpha_sum[ty, tx] += 1.0
                    hits[ty, tx] += 1.0
                    albedo_sum[ty, tx, 0] += ar
                    albedo_sum[ty, tx, 1] += ag
                    albedo_sum[ty, tx, 2] += ab
                    normal_sum[ty, tx, 0] += nx
                    normal_sum[ty, tx, 1] += ny
                    normal_sum[ty, tx, 2] += nz
                    depth_sum[ty, tx] += depth
