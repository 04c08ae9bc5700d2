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

Bounces count scattering events: passing straight through a thin-walled transmissive surface (a
pane) is not one, so `bounces = 1` still lights a floor through a window.

Sample dimensions: 0-1 pixel position, 2-3 lens, 4 shutter time, then 8 per path vertex b
starting at 8 + 8b: BSDF direction (2), BSDF lobe (1), roulette (1), light position (2), light
choice (1), coverage (1: alpha BLEND, reused stretched for each layer). The 2D draws sit on
dimension pairs (4g, 4g+1) of the padded sampler, whose unscrambled Sobol pair is a (0, 2)-net;
pair (4g+2, 4g+3) is not.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from .borrowing import borrowing
from .bsdf import bsdf_eval, bsdf_sample, build_frame, has_nonspecular_lobe, needs_outward_normal
from .camera import camera_ray
from .layers import deposit, env_group, material_group, sampled_group, shares
from .mattes import KIND_OBJECT, add_coverage
from .lights import env_pdf, env_radiance, light_pdf, sample_light
from .material_table import (
    M_ALPHA_CUTOFF, M_ALPHA_MODE, M_COLOR, M_DOUBLE_SIDED, M_EMISSION, M_THICKNESS, M_TRANSMISSION, M_TYPE,
    MATERIAL_SIZE, PBR, passable,
)
from .pbr import pbr_absorption, pbr_thin_transmittance
from .sampler import group_state, group_value, pixel_key
from .scene import FLAG_PASSABLE, VISIT_PASSABLE, VISIT_SOLID, intersect_scene, occluded_scene
from .scene_data import ALPHA_BLEND, ALPHA_MASK
from .surface import (
    SF_NG, SF_NS, SURF_SIZE, apply_normal_map, hit_material, hit_surface, lifted_origin, normals_hug_face,
    resolve_material,
)
from .wide_traversal import traversal_stack

STACK_SIZE = 64
MAX_LAYERS = 16  # cut-out or partly covered surfaces a ray passes in one segment (rule of thumb)
MAX_PASSES = 16  # thin walls a path passes straight through, beyond its bounces (rule of thumb)
# vertex normals within 30° of their face: a mesh approximating a smooth surface, trusted at its
# shadow terminator (rule of thumb: a 12-sided sphere's normals lie 21° off its faces, while
# normals leaning 55° or more, as on a box with averaged corner normals, would let light leak)
SMOOTH_MESH_COS = 0.866
DIMS_PER_BOUNCE = 8
FIRST_BOUNCE_DIM = 8
# a vertex's dimensions are two whole groups of four (sampler.group_state)
assert FIRST_BOUNCE_DIM % 4 == 0 and DIMS_PER_BOUNCE == 8


@njit(cache=True, inline="always")
def _offset_scale(px, py, pz):
    """Distance to push a new ray's origin off a surface: relative to the coordinates' size,
    well above float32 rounding of the stored geometry (rule of thumb: ~2^-15 relative)."""
    return 3e-5 * (1.0 + max(abs(px), max(abs(py), abs(pz))))


@njit(cache=True, inline="always")
def _behind(surf, px, py, pz, dx, dy, dz):
    """The origin that continues a ray of direction d past the surface it hit at p: p moved off
    the surface along its geometric normal, to the side d goes on to."""
    gx, gy, gz = surf[SF_NG], surf[SF_NG + 1], surf[SF_NG + 2]
    eps = _offset_scale(px, py, pz)
    side = eps if gx * dx + gy * dy + gz * dz > 0.0 else -eps
    return px + gx * side, py + gy * side, pz + gz * side


@njit(cache=True, inline="always")
def _culled(rm, surf, dx, dy, dz):
    """True when a camera ray meets the back of a single-sided glTF material (doubleSided false:
    back-face culling, glTF 2.0 section 3.9.6); refracting solids are seen from inside."""
    if rm[M_TYPE] != PBR or rm[M_DOUBLE_SIDED] != 0.0 or needs_outward_normal(rm):
        return False
    return surf[SF_NG] * dx + surf[SF_NG + 1] * dy + surf[SF_NG + 2] * dz > 0.0


@njit(cache=True, inline="always")
def _thin(rm):
    """True for a thin-walled transmissive surface (a pane, a leaf)."""
    return rm[M_TYPE] == PBR and rm[M_TRANSMISSION] > 0.0 and rm[M_THICKNESS] <= 0.0


@borrowing()
def shadow_transmittance(S, ox, oy, oz, dx, dy, dz, tmax, time_u, stack_top, stack, surf, rm):
    """(tr, tg, tb): the fraction of light that travels from o along unit d over (0, tmax).

    0 behind anything opaque. Cut-outs (alpha MASK below the cutoff) let everything through,
    partial coverage (BLEND) lets (1 - alpha) through plus what its covered part transmits, and
    a thin-walled transmissive surface transmits as its straight-through lobe does. Scenes
    without such materials take the early-exit occlusion query."""
    if S.flags[FLAG_PASSABLE] == 0:
        if occluded_scene(S, ox, oy, oz, dx, dy, dz, tmax, time_u, stack_top, stack):
            return 0.0, 0.0, 0.0
        return 1.0, 1.0, 1.0
    # first the early-exit query over the instances that stop every ray, then the passable ones
    # one surface at a time
    if occluded_scene(S, ox, oy, oz, dx, dy, dz, tmax, time_u, stack_top, stack, VISIT_SOLID):
        return 0.0, 0.0, 0.0
    tr = 1.0
    tg = 1.0
    tb = 1.0
    for _ in range(MAX_LAYERS):
        t, inst, k, u, v = intersect_scene(S, ox, oy, oz, dx, dy, dz, tmax, time_u, stack_top, stack,
                                           VISIT_PASSABLE)
        if inst < 0:
            return tr, tg, tb
        mid = hit_material(S, inst, k)
        if not passable(S.mats[mid]):
            return 0.0, 0.0, 0.0
        px = ox + t * dx
        py = oy + t * dy
        pz = oz + t * dz
        hit_surface(S, inst, k, u, v, px, py, pz, time_u, surf)
        alpha = resolve_material(S, mid, surf, rm)
        cover = 1.0
        if rm[M_ALPHA_MODE] == ALPHA_MASK:
            cover = 1.0 if alpha >= rm[M_ALPHA_CUTOFF] else 0.0
        elif rm[M_ALPHA_MODE] == ALPHA_BLEND:
            cover = min(1.0, max(0.0, alpha))
        if cover > 0.0:
            ttr = ttg = ttb = 0.0
            if _thin(rm):
                # the cosine the pass-through lobe sees: the shading normal, normal map applied
                apply_normal_map(S, S.mats[mid], surf)
                nx, ny, nz = surf[SF_NS], surf[SF_NS + 1], surf[SF_NS + 2]
                ttr, ttg, ttb = pbr_thin_transmittance(rm, abs(nx * dx + ny * dy + nz * dz))
            tr *= 1.0 - cover + cover * ttr
            tg *= 1.0 - cover + cover * ttg
            tb *= 1.0 - cover + cover * ttb
            if not (tr > 0.0 or tg > 0.0 or tb > 0.0):
                return 0.0, 0.0, 0.0
        ox, oy, oz = _behind(surf, px, py, pz, dx, dy, dz)
        tmax -= t
        if tmax <= 0.0:
            return tr, tg, tb
    return 0.0, 0.0, 0.0


@borrowing()
def trace_path(S, cam, aperture, width, height, frame, seed, mode, max_bounces, rr_start,
               pixel, fx, fy, index, stack_top, stack, surf, rm, surf_shadow, rm_shadow, split, lay):
    """One camera sample: (Lr, Lg, Lb, hit, albedo rgb, normal xyz, depth, the first hit's
    instance and material row (-1 without a hit)).

    surf, surf_shadow (SURF_SIZE,) and rm, rm_shadow (MATERIAL_SIZE,) float64: scratch for the
    hit's surface and resolved material (surface.py), and the same for shadow rays' tests,
    allocated once per thread. split: bits of layers.SPLIT_*; when not 0 every contribution is
    also added into `lay` (rows of layers.py), which the caller zeroed."""
    # sample values come in groups of four dimensions that share their scrambling (sampler.py)
    key = pixel_key(seed, frame, pixel)
    g = group_state(key, index, 0, mode)
    jx = group_value(g, 0, mode)
    jy = group_value(g, 1, mode)
    lu = group_value(g, 2, mode)
    lv = group_value(g, 3, mode)
    time_u = group_value(group_state(key, index, 1, mode), 4, mode)
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
    inst0 = -1
    mid0 = -1
    prev_pdf = 0.0
    prev_delta = True
    prev_x = ox
    prev_y = oy
    prev_z = oz
    # the shares of the path's first scattering event (layers.shares), once it has scattered
    qdr = qdg = qdb = 0.0
    qtr = qtg = qtb = 0.0

    bounce = 0  # scattering events so far; passing straight through a thin wall is not one
    for vertex in range(max_bounces + 1 + MAX_PASSES):
        base = FIRST_BOUNCE_DIM + DIMS_PER_BOUNCE * vertex
        unscattered = bounce == 0  # nothing has scattered the ray yet (thin walls pass it on)
        # the next surface the ray stops at: cut-outs and uncovered parts are passed
        # this vertex's dimensions: base .. base + 3 (BSDF, roulette), base + 4 .. base + 7
        # (light, coverage); base is a multiple of 4, so each four are one group
        g_light = group_state(key, index, (base + 4) >> 2, mode)
        u_cover = group_value(g_light, base + 7, mode)
        t = 0.0
        travelled = 0.0  # along this segment, past every layer passed (for absorption)
        inst = -1
        k = -1
        mid = 0
        u = v = 0.0
        px = py = pz = 0.0
        passes = False
        for _ in range(MAX_LAYERS):
            t, inst, k, u, v = intersect_scene(S, ox, oy, oz, dx, dy, dz, math.inf, time_u, stack_top, stack)
            if inst < 0:
                passes = False
                break
            travelled += t
            px = ox + t * dx
            py = oy + t * dy
            pz = oz + t * dz
            mid = hit_material(S, inst, k)
            hit_surface(S, inst, k, u, v, px, py, pz, time_u, surf)
            alpha = resolve_material(S, mid, surf, rm)
            amode = rm[M_ALPHA_MODE]
            passes = unscattered and _culled(rm, surf, dx, dy, dz)
            if not passes and amode == ALPHA_MASK:
                passes = alpha < rm[M_ALPHA_CUTOFF]
            elif not passes and amode == ALPHA_BLEND:
                # stochastic coverage: stop with probability alpha; the number is reused,
                # stretched to [0, 1), for the next layer
                a = min(1.0, max(0.0, alpha))
                passes = u_cover >= a
                if passes:
                    u_cover = (u_cover - a) / (1.0 - a)
            if not passes:
                break
            ox, oy, oz = _behind(surf, px, py, pz, dx, dy, dz)
        if passes:
            break  # more layers than MAX_LAYERS: taken as blocked, as shadow rays take them

        if inst < 0:
            er, eg, eb = env_radiance(S, dx, dy, dz)
            w = 1.0
            if not prev_delta and S.env_params[3] > 0.0:
                pl = S.env_params[3] * env_pdf(S, dx, dy, dz)
                w = prev_pdf * prev_pdf / (prev_pdf * prev_pdf + pl * pl)
            cr = br * er * w
            cg = bg * eg * w
            cb = bb * eb * w
            lr += cr
            lg += cg
            lb += cb
            if split:
                deposit(lay, split, bounce, True, cr, cg, cb, qdr, qdg, qdb, qtr, qtg, qtb, env_group(S))
            break

        gx, gy, gz = surf[SF_NG], surf[SF_NG + 1], surf[SF_NG + 2]  # outward (winding or vertex normals)
        cos_o = -(gx * dx + gy * dy + gz * dz)
        refracts = needs_outward_normal(rm)

        # Beer-Lambert absorption over the segment just travelled inside a volume
        if refracts and rm[M_TYPE] == PBR and cos_o < 0.0:
            abr, abg, abb = pbr_absorption(rm, travelled)
            br *= abr
            bg *= abg
            bb *= abb

        if vertex == 0:
            first_hit = True
            ar, ag, ab = rm[M_COLOR], rm[M_COLOR + 1], rm[M_COLOR + 2]
            depth = t
            inst0 = inst
            mid0 = mid

        # emission reached by the previous bounce's BSDF sample
        if rm[M_EMISSION] > 0.0 or rm[M_EMISSION + 1] > 0.0 or rm[M_EMISSION + 2] > 0.0:
            w = 1.0
            if not prev_delta:
                pl = light_pdf(S, inst, k, prev_x, prev_y, prev_z, px, py, pz, gx, gy, gz, time_u)
                w = prev_pdf * prev_pdf / (prev_pdf * prev_pdf + pl * pl)
            cr = br * rm[M_EMISSION] * w
            cg = bg * rm[M_EMISSION + 1] * w
            cb = bb * rm[M_EMISSION + 2] * w
            lr += cr
            lg += cg
            lb += cb
            if split:
                deposit(lay, split, bounce, False, cr, cg, cb, qdr, qdg, qdb, qtr, qtg, qtb,
                        material_group(S, mid))

        apply_normal_map(S, S.mats[mid], surf)
        nx, ny, nz = surf[SF_NS], surf[SF_NS + 1], surf[SF_NS + 2]
        # shading frame: refracting materials keep the outward normal (inside/outside matters);
        # the others face the normals towards the viewer (two-sided surfaces)
        lift_side = 1.0  # the side of the geometric normal that the lifted origin lies on
        if not refracts and cos_o < 0.0:
            gx, gy, gz = -gx, -gy, -gz
            nx, ny, nz = -nx, -ny, -nz
            lift_side = -1.0
        # a shading normal that puts the viewer on the other side than the geometry does
        # (a strong normal map at a silhouette) falls back to the geometric normal
        if (nx * dx + ny * dy + nz * dz) * (gx * dx + gy * dy + gz * dz) <= 0.0:
            nx, ny, nz = gx, gy, gz
        if vertex == 0:
            sgn = 1.0 if -(nx * dx + ny * dy + nz * dz) >= 0.0 else -1.0
            anx, any_, anz = nx * sgn, ny * sgn, nz * sgn

        # the last scattering event is spent: only a thin wall may still be passed
        last = bounce == max_bounces
        if last and not _thin(rm):
            break

        tx, ty, tz, sx, sy, sz = build_frame(nx, ny, nz)
        wox = -(dx * tx + dy * ty + dz * tz)
        woy = -(dx * sx + dy * sy + dz * sz)
        woz = -(dx * nx + dy * ny + dz * nz)
        eps = _offset_scale(px, py, pz)
        # origins for rays leaving on the lifted side start from the smooth surface (Hanika 2021)
        hx, hy, hz = lifted_origin(S, inst, k, u, v, px, py, pz, time_u)

        # next-event estimation
        if not last and has_nonspecular_lobe(rm):
            u1 = group_value(g_light, base + 4, mode)
            u2 = group_value(g_light, base + 5, mode)
            u_sel = group_value(g_light, base + 6, mode)
            wx, wy, wz, dist, er, eg, eb, pl, delta = sample_light(S, px, py, pz, time_u, u_sel, u1, u2)
            cos_g = wx * gx + wy * gy + wz * gz
            if pl > 0.0 and (er > 0.0 or eg > 0.0 or eb > 0.0):
                wix = wx * tx + wy * ty + wz * tz
                wiy = wx * sx + wy * sy + wz * sz
                wiz = wx * nx + wy * ny + wz * nz
                fr, fg, fb, pb = bsdf_eval(rm, wox, woy, woz, wix, wiy, wiz)
                # the geometric and the shading normal must agree on the side of wi, or light
                # would leak through the surface (Veach 1997, PhD thesis, section 5.3) ...
                agree = cos_g * wiz > 0.0
                # ... except at the terminator of a smooth-shaded mesh whose vertex normals stay
                # close to its faces: the light is above the curved surface the normals describe
                # though below the flat facet, and the shadow ray leaves from that curved surface
                terminator = (not agree and wiz > 0.0 and lift_side > 0.0 and not refracts
                              and normals_hug_face(S, inst, k, time_u, SMOOTH_MESH_COS))
                if (fr > 0.0 or fg > 0.0 or fb > 0.0) and (agree or terminator):
                    side = eps if cos_g > 0.0 else -eps
                    qx, qy, qz = px, py, pz
                    if cos_g * lift_side > 0.0:
                        qx, qy, qz = hx, hy, hz
                    if terminator:
                        side = eps
                        qx, qy, qz = hx, hy, hz
                    sox = qx + gx * side
                    soy = qy + gy * side
                    soz = qz + gz * side
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
                    vr, vg, vb = shadow_transmittance(S, sox, soy, soz, sdx, sdy, sdz, tmax, time_u,
                                                      stack_top, stack, surf_shadow, rm_shadow)
                    if vr > 0.0 or vg > 0.0 or vb > 0.0:
                        if delta or terminator:
                            # a punctual light (no BSDF sample can reach it), or a direction the
                            # BSDF samples never continue into (they stop at the flat facet):
                            # the light sample alone carries it
                            c = abs(wiz) / pl
                        else:  # the BSDF could have sampled this direction too: weigh against it
                            c = abs(wiz) * (pl * pl / (pl * pl + pb * pb)) / pl
                        cr = br * fr * er * c * vr
                        cg = bg * fg * eg * c * vg
                        cb = bb * fb * eb * c * vb
                        lr += cr
                        lg += cg
                        lb += cb
                        if split:
                            if bounce == 0:  # the first scattering event: the light's own shares
                                sdr, sdg, sdb, stt, stg, stb = shares(rm, woz, wiz, fr, fg, fb, False)
                            else:
                                sdr, sdg, sdb, stt, stg, stb = qdr, qdg, qdb, qtr, qtg, qtb
                            deposit(lay, split, bounce + 1, False, cr, cg, cb, sdr, sdg, sdb, stt, stg, stb,
                                    sampled_group(S, u_sel))

        # continue the path by sampling the BSDF
        g_bsdf = group_state(key, index, base >> 2, mode)
        u1 = group_value(g_bsdf, base + 0, mode)
        u2 = group_value(g_bsdf, base + 1, mode)
        u0 = group_value(g_bsdf, base + 2, mode)
        wix, wiy, wiz, wr, wg, wb, pdf, is_delta = bsdf_sample(rm, wox, woy, woz, u0, u1, u2)
        passes = is_delta and _thin(rm) and wiz * woz < 0.0  # straight through a thin wall
        if not (wr > 0.0 or wg > 0.0 or wb > 0.0) or (last and not passes):
            break
        ndx = wix * tx + wiy * sx + wiz * nx
        ndy = wix * ty + wiy * sy + wiz * ny
        ndz = wix * tz + wiy * sz + wiz * nz
        dn = math.sqrt(ndx * ndx + ndy * ndy + ndz * ndz)
        ndx /= dn
        ndy /= dn
        ndz /= dn
        cos_g = ndx * gx + ndy * gy + ndz * gz
        if cos_g * wiz <= 0.0:
            break  # the sample leaves on the other side of the geometry than of the shading normal
        br *= wr
        bg *= wg
        bb *= wb
        # straight through a thin wall the path keeps going as if the wall were not there: the
        # emission it reaches is weighed against the light sample of the vertex before the
        # wall, whose shadow ray passed the wall too (else that light would count twice)
        if not passes:
            prev_pdf = pdf
            prev_delta = is_delta
            prev_x, prev_y, prev_z = px, py, pz
            if split and bounce == 0:  # the path's first scattering event: its shares
                fr, fg, fb = wr, wg, wb
                if not is_delta:  # the BSDF's value itself (the weight is over the mixture pdf)
                    fr, fg, fb, fpdf = bsdf_eval(rm, wox, woy, woz, wix, wiy, wiz)
                qdr, qdg, qdb, qtr, qtg, qtb = shares(rm, woz, wiz, fr, fg, fb, is_delta)
        dx, dy, dz = ndx, ndy, ndz
        side = eps if cos_g > 0.0 else -eps
        qx, qy, qz = px, py, pz
        if cos_g * lift_side > 0.0:
            qx, qy, qz = hx, hy, hz
        ox = qx + gx * side
        oy = qy + gy * side
        oz = qz + gz * side

        if passes:
            continue
        bounce += 1
        if bounce >= rr_start:
            q = min(0.95, max(br, max(bg, bb)))
            if group_value(g_bsdf, base + 3, mode) >= q:
                break
            br /= q
            bg /= q
            bb /= q

    return lr, lg, lb, first_hit, ar, ag, ab, anx, any_, anz, depth, inst0, mid0


@njit(cache=True, parallel=True)
def render_tile(S, cam, aperture, width, height, frame, seed, mode, max_bounces, rr_start,
                x0, y0, tile_w, tile_h, first, count,
                n, rgb_sum, rgb_sq, alpha_sum, albedo_sum, normal_sum, depth_sum, hits, dropped,
                odd_n, odd_sum, split, slots, layers, matte_src, inst_ids, mat_ids, matte_ids, matte_cov):
    """Add samples [first, first+count) of the tile's pixels into the given sums.

    The sums are (tile_h, tile_w[, 3]) float64 arrays (see film.Film); row 0 of the tile is
    image row y0. Rows run in parallel; every write is per pixel, so the result is the same bits
    for any thread count. split, slots: layers.layer_plan's; layers (tile_h, tile_w, K, 3) the
    film's layer sums (K = 0 and split = 0 when the shot keeps none). matte_src (M,): per ID
    matte kind, mattes.KIND_OBJECT (the first hit's instance's id from inst_ids) or KIND_MATERIAL
    (its material row's from mat_ids); matte_ids, matte_cov (tile_h, tile_w, M, S) the film's
    slots (mattes.add_coverage; M = 0 when the shot keeps none). odd_n, odd_sum: the count and
    Σ L of the kept samples whose index is odd (the film's odd half, docs/denoising.md).
    """
    for ty in prange(tile_h):
        stack_top = np.empty(STACK_SIZE, np.int32)
        stack = traversal_stack()  # the meshes' wide BVHs (wide_bvh.py)
        surf = np.zeros(SURF_SIZE)
        rm = np.zeros(MATERIAL_SIZE)
        rm_shadow = np.zeros(MATERIAL_SIZE)
        surf_shadow = np.zeros(SURF_SIZE)
        lay = np.zeros((slots.shape[0], 3))
        y = y0 + ty
        for tx in range(tile_w):
            x = x0 + tx
            pixel = y * width + x
            for s in range(first, first + count):
                if split:
                    lay[:, :] = 0.0
                lr, lg, lb, hit, ar, ag, ab, nx, ny, nz, depth, inst0, mid0 = trace_path(
                    S, cam, aperture, width, height, frame, seed, mode, max_bounces, rr_start,
                    pixel, float(x), float(y), s, stack_top, stack, surf, rm, surf_shadow, rm_shadow,
                    split, lay,
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
                if s & 1:
                    odd_n[ty, tx] += 1.0
                    odd_sum[ty, tx, 0] += lr
                    odd_sum[ty, tx, 1] += lg
                    odd_sum[ty, tx, 2] += lb
                if split:
                    for i in range(slots.shape[0]):
                        k = slots[i]
                        if k >= 0:
                            layers[ty, tx, k, 0] += lay[i, 0]
                            layers[ty, tx, k, 1] += lay[i, 1]
                            layers[ty, tx, k, 2] += lay[i, 2]
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
                    for m in range(matte_src.shape[0]):
                        idv = inst_ids[inst0] if matte_src[m] == KIND_OBJECT else mat_ids[mid0]
                        add_coverage(matte_ids, matte_cov, ty, tx, m, idv, 1.0)
