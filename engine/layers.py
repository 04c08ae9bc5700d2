"""Light-path layers and light groups: which part of a sample's radiance goes where.

Every sample's radiance is a sum of contributions, each the light of one emitter (a surface's
emission, the environment, a punctual light) carried along the path to the camera. A contribution
is routed, in full, into one light-path class and one light group, so each family of layers adds
up to the beauty (the path-space integral split into a sum over disjoint sets of paths: Veach
1997, PhD thesis, ch. 8). docs/shot-file.md (`[output]`) defines the layers for users.

Light-path classes, by the path's first scattering event (as for `bounces`, passing straight
through a thin wall is not one) and by the number of scattering events the light has met:

  events = 0 (the camera sees the emitter): EMISSION (a surface) or BACKGROUND (the environment);
  events = 1: DIFFUSE_DIRECT / SPECULAR_DIRECT;  events >= 2: DIFFUSE_INDIRECT / SPECULAR_INDIRECT;
  TRANSMISSION (any events >= 1): the first event sent the path through the surface.

The first event's BSDF is split into its diffuse part (the Lambertian base of diffuse, plastic
and glTF materials), its transmission (any direction on the other side of the surface) and the
rest (specular: metal, coats, glossy reflection). A contribution through direction wi is split
by the fractions f_diffuse(wi) / f(wi) and f_transmission(wi) / f(wi) per channel; the specular
share is the remainder, so the three add up to the contribution to float rounding. Because the
fractions are fixed once wi is, each layer is an unbiased estimate of its own part of the
integral (the same sample, weighted by the part's share of the integrand).

A sample's contributions go into `lay` (rows: the classes, then one row per light group, group 0
being the ungrouped emitters); `render_tile` adds the rows that `slots` names into the film.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .borrowing import borrowing
from .fresnel import diffuse_fresnel, fresnel_dielectric
from .lights import _light_material, _search
from .lobes import ROUGH_COAT_BASE, SMOOTH_ROUGHNESS
from .material_table import (
    DIFFUSE, M_CLEARCOAT, M_COLOR, M_GROUP, M_IOR, M_METALLIC, M_ROUGHNESS, M_TRANSMISSION, M_TYPE,
    PBR, PLASTIC,
)
from .pbr import coat_fresnel, dielectric_fresnel
from .punctual import L_GROUP

DIFFUSE_DIRECT = 0
DIFFUSE_INDIRECT = 1
SPECULAR_DIRECT = 2
SPECULAR_INDIRECT = 3
TRANSMISSION = 4
EMISSION = 5
BACKGROUND = 6
PATH_CLASSES = 7
LAYER_NAMES = ("diffuse_direct", "diffuse_indirect", "specular_direct", "specular_indirect",
               "transmission", "emission", "background")

SPLIT_PATHS = 1  # bits of `split`: route contributions into light-path classes,
SPLIT_GROUPS = 2  # into light groups
ENV_GROUP = 4  # env_params[ENV_GROUP]: the environment's light group (compiler.py)
OTHER_GROUP = "other"


# ------------------------------------------------------------------ the first event's shares

@njit(cache=True)
def diffuse_part(rm, woz, wiz):
    """(r, g, b): the diffuse (Lambertian base) part of the material's BSDF for a reflection
    with cosines woz, wiz > 0, without the cosine; the same terms as lobes.plastic_eval's base
    and pbr.pbr_eval's diffuse base (their docstrings give the models)."""
    t = rm[M_TYPE]
    cr, cg, cb = rm[M_COLOR], rm[M_COLOR + 1], rm[M_COLOR + 2]
    if woz <= 0.0 or wiz <= 0.0:
        return 0.0, 0.0, 0.0
    if t == DIFFUSE:
        k = 1.0 / np.pi
        return cr * k, cg * k, cb * k
    if t == PLASTIC:
        ior = rm[M_IOR]
        fdr = diffuse_fresnel(1.0 / ior)
        k = 1.0 if rm[M_ROUGHNESS] < SMOOTH_ROUGHNESS else ROUGH_COAT_BASE
        common = k * (1.0 - fresnel_dielectric(woz, ior)) * (1.0 - fresnel_dielectric(wiz, ior)) / (
            np.pi * ior * ior)
        return cr * common / (1.0 - cr * fdr), cg * common / (1.0 - cg * fdr), cb * common / (1.0 - cb * fdr)
    if t == PBR:
        a = 1.0 - rm[M_CLEARCOAT] * coat_fresnel(woz)
        k = (a * (1.0 - rm[M_METALLIC]) * (1.0 - rm[M_TRANSMISSION]) * (1.0 - dielectric_fresnel(rm, woz)[3])
             * (1.0 - dielectric_fresnel(rm, wiz)[3]) / np.pi)
        return k * cr, k * cg, k * cb
    return 0.0, 0.0, 0.0


@njit(cache=True, inline="always")
def _share(part, whole):
    if whole > 0.0:
        return min(1.0, max(0.0, part / whole))
    return 0.0


@njit(cache=True)
def shares(rm, woz, wiz, fr, fg, fb, is_delta):
    """(dr, dg, db, tr, tg, tb): the diffuse and the transmitted shares of a BSDF value
    f = (fr, fg, fb) for the direction wi (cosines woz, wiz in the shading frame). A delta lobe
    is never diffuse; a direction on the other side of the surface is all transmission."""
    if woz * wiz < 0.0:
        return 0.0, 0.0, 0.0, 1.0, 1.0, 1.0
    if is_delta:
        return 0.0, 0.0, 0.0, 0.0, 0.0, 0.0
    pr, pg, pb = diffuse_part(rm, abs(woz), abs(wiz))
    return _share(pr, fr), _share(pg, fg), _share(pb, fb), 0.0, 0.0, 0.0


# ------------------------------------------------------------------ light groups of emitters

@njit(cache=True, inline="always")
def env_group(S):
    if S.env_params.shape[0] > ENV_GROUP:
        return int(S.env_params[ENV_GROUP])
    return 0


@njit(cache=True, inline="always")
def material_group(S, mid):
    return int(S.mats[mid, M_GROUP])


@borrowing()
def sampled_group(S, u_sel):
    """The light group of the light `lights.sample_light` picks with the number u_sel (the same
    choice, made again)."""
    p_env = S.env_params[3]
    if u_sel < p_env or S.light_inst.shape[0] == 0:
        return env_group(S)
    light = _search(S.light_cdf, min((u_sel - p_env) / (1.0 - p_env), 0.99999999))
    inst = S.light_inst[light]
    if inst < 0:
        return int(S.punct[S.light_prim[light], L_GROUP])
    return material_group(S, _light_material(S, inst, S.light_prim[light]))


# ------------------------------------------------------------------ routing

@njit(cache=True)
def deposit(lay, split, events, env, cr, cg, cb, dr, dg, db, tr, tg, tb, group):
    """Add the contribution (cr, cg, cb) of light that met `events` scattering events (env: it
    came from the environment) into its light-path class and its light group."""
    if split & SPLIT_PATHS:
        if events == 0:
            k = BACKGROUND if env else EMISSION
            lay[k, 0] += cr
            lay[k, 1] += cg
            lay[k, 2] += cb
        else:
            kd = DIFFUSE_DIRECT if events == 1 else DIFFUSE_INDIRECT
            ks = SPECULAR_DIRECT if events == 1 else SPECULAR_INDIRECT
            xr, xg, xb = cr * dr, cg * dg, cb * db
            yr, yg, yb = cr * tr, cg * tg, cb * tb
            lay[kd, 0] += xr
            lay[kd, 1] += xg
            lay[kd, 2] += xb
            lay[TRANSMISSION, 0] += yr
            lay[TRANSMISSION, 1] += yg
            lay[TRANSMISSION, 2] += yb
            lay[ks, 0] += cr - xr - yr
            lay[ks, 1] += cg - xg - yg
            lay[ks, 2] += cb - xb - yb
    if split & SPLIT_GROUPS:
        k = PATH_CLASSES + group
        lay[k, 0] += cr
        lay[k, 1] += cg
        lay[k, 2] += cb


# ------------------------------------------------------------------ what a shot asks for

def layer_plan(shot) -> tuple[tuple[str, ...], np.ndarray, int]:
    """(names, slots, split) for a shot's `[output]`: the film's layer names in order, the film
    slot of every row of a sample's `lay` (-1: not kept), and the `split` bits. Rows are the
    PATH_CLASSES classes, then group 0 (`group_other`) and the shot's groups in order."""
    wanted = tuple(getattr(shot, "layers", ()) or ())
    groups = shot.light_group_names() if getattr(shot, "light_groups", False) else ()
    names = [n for n in LAYER_NAMES if n in wanted]
    slots = np.full(PATH_CLASSES + 1 + len(shot.light_group_names()), -1, np.int64)
    for i, n in enumerate(LAYER_NAMES):
        if n in wanted:
            slots[i] = names.index(n)
    split = SPLIT_PATHS if wanted else 0
    if getattr(shot, "light_groups", False):
        split |= SPLIT_GROUPS
        for g, name in enumerate((OTHER_GROUP,) + tuple(groups)):
            slots[PATH_CLASSES + g] = len(names)
            names.append(f"group_{name}")
    if not split:
        slots = np.zeros(0, np.int64)
    return tuple(names), slots, split
