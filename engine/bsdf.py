"""Materials: the material table row, the shading frame, and BSDF evaluation and sampling.

A material is one row `params: (MATERIAL_SIZE,) float64` of the scene's material table; its
columns are named in material_table.py. The legacy types read only these:

  [0]     type: DIFFUSE = 0, METAL = 1, GLASS = 2, PLASTIC = 3 (PBR = 4: pbr.py, which reads
          the other columns; `needs_outward_normal` says which normal it wants)
  [1:4]   colour r, g, b in [0, 1]: diffuse albedo; metal reflectance at normal incidence (F0);
          glass transmission tint; plastic base albedo
  [4]     roughness in [0, 1], perceptual: the GGX width is alpha = roughness². Below
          SMOOTH_ROUGHNESS a surface is perfectly smooth (delta lobes).
  [5]     index of refraction (glass; the plastic's coat), 1.5 by default
  [6:9]   emitted radiance r, g, b (read by the integrator, not here)

Directions are in the local shading frame (z = normal), unit length, both pointing away from
the surface: wo towards the viewer, wi towards the light. For DIFFUSE, METAL and PLASTIC the
caller faces the normal towards wo (wo.z > 0); these reflect only (zero when wi.z <= 0). For
GLASS the normal is the geometric outward one: wo.z > 0 is a ray arriving from outside.

`bsdf_eval` returns f (without the cosine) and the solid-angle density with which
`bsdf_sample` would produce wi; delta lobes add nothing to either. `bsdf_sample` returns the
weight f |cos θi| / pdf. For a delta lobe the weight is the lobe's throughput divided by the
probability of having chosen that lobe, `pdf` is reported as 0.0 and `is_delta` is True. A
failed sample (direction below the surface, say) has weight 0.

Transport convention: the integrator carries radiance from the camera, so transmission through
glass scales f by (η_o / η_i)² = 1 / eta², with η_o the index on wo's side and η_i on wi's
(Veach 1997, PhD thesis §5.2, from memory: radiance is not symmetric across an interface,
L/η² is).
A ray entering glass therefore has weight T / eta² and one leaving it T * eta²; over a path that
starts and ends in air the factors cancel. The per-bounce weight of transmission out of glass
exceeds 1 for that reason alone; the flux (weight × eta²) never does.

The lobes themselves live in lobes.py; this module chooses between them.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from .fresnel import INDEX_MATCHED
from .lobes import (
    SMOOTH_ROUGHNESS,
    diffuse_eval,
    diffuse_sample,
    glass_eval,
    glass_sample,
    metal_eval,
    metal_sample,
    plastic_eval,
    plastic_sample,
)

from .material_table import (  # noqa: F401  (re-exported: the types and the row size)
    DIFFUSE, GLASS, M_COLOR, M_EMISSION, M_IOR, M_ROUGHNESS, M_TYPE, MATERIAL_SIZE, METAL, PBR, PLASTIC, blank_row,
)
from .pbr import is_volume, pbr_eval, pbr_has_delta_lobe, pbr_has_nonspecular_lobe, pbr_sample

MATERIAL_NAMES = {DIFFUSE: "diffuse", METAL: "metal", GLASS: "glass", PLASTIC: "plastic"}

# column names of a material row used here (material_table.py has them all)
P_TYPE = M_TYPE
P_COLOR = M_COLOR
P_ROUGHNESS = M_ROUGHNESS
P_IOR = M_IOR
P_EMISSION = M_EMISSION


def material_row(type, color, roughness=0.0, ior=1.5, emission=(0.0, 0.0, 0.0)) -> np.ndarray:
    """One material-table row, (MATERIAL_SIZE,) float64, in the layout of material_table.py.

    type: DIFFUSE, METAL, GLASS or PLASTIC; color: 3 floats in [0, 1]; roughness in [0, 1];
    ior >= 1 (any positive value for glass); emission: 3 non-negative floats.
    Raises ValueError on a value outside those ranges.
    """
    t = int(type)
    if t not in MATERIAL_NAMES or t != type:
        raise ValueError(f"material type must be one of {sorted(MATERIAL_NAMES)}, got {type!r}")
    c = np.asarray(color, dtype=np.float64).reshape(-1)
    e = np.asarray(emission, dtype=np.float64).reshape(-1)
    if c.shape != (3,) or not np.all((c >= 0.0) & (c <= 1.0)):
        raise ValueError(f"color must be 3 values in [0, 1], got {color!r}")
    if e.shape != (3,) or not np.all(np.isfinite(e) & (e >= 0.0)):
        raise ValueError(f"emission must be 3 finite values >= 0, got {emission!r}")
    if not 0.0 <= float(roughness) <= 1.0:
        raise ValueError(f"roughness must be in [0, 1], got {roughness!r}")
    if not (math.isfinite(float(ior)) and float(ior) > 0.0) or (t != GLASS and float(ior) < 1.0):
        raise ValueError(f"ior must be >= 1 (any positive value for glass), got {ior!r}")
    row = blank_row(t)  # the other columns at the values that change nothing
    row[P_COLOR:P_COLOR + 3] = c
    row[P_ROUGHNESS] = roughness
    row[P_IOR] = ior
    row[P_EMISSION:P_EMISSION + 3] = e
    return row


# --------------------------------------------------------------------------- shading frame

@njit(cache=True)
def build_frame(nx, ny, nz):
    """Tangent t and bitangent b completing the unit normal n to a right-handed orthonormal
    basis (t × b = n): (tx, ty, tz, bx, by, bz). Branch-free in n, continuous except across
    nz = 0 (Duff, Burgess, Christensen, Hery, Kensler, Liani & Villemin 2017, "Building an
    orthonormal basis, revisited", JCGT 6(1))."""
    sign = 1.0 if nz >= 0.0 else -1.0
    a = -1.0 / (sign + nz)
    b = nx * ny * a
    return 1.0 + sign * nx * nx * a, sign * b, -sign * nx, b, sign + ny * ny * a, -ny


@njit(cache=True)
def to_local(tx, ty, tz, bx, by, bz, nx, ny, nz, vx, vy, vz):
    """World vector v in the frame (t, b, n): (v·t, v·b, v·n)."""
    return (vx * tx + vy * ty + vz * tz,
            vx * bx + vy * by + vz * bz,
            vx * nx + vy * ny + vz * nz)


@njit(cache=True)
def to_world(tx, ty, tz, bx, by, bz, nx, ny, nz, lx, ly, lz):
    """Local vector l = (lx, ly, lz) of the frame (t, b, n) in world coordinates."""
    return (lx * tx + ly * bx + lz * nx,
            lx * ty + ly * by + lz * ny,
            lx * tz + ly * bz + lz * nz)


# --------------------------------------------------------------------------- dispatch

@njit(cache=True)
def _is_smooth(params):
    """True when the material's specular lobe is a delta: roughness below SMOOTH_ROUGHNESS, or
    index-matched glass (an interface with eta = 1 bends nothing, whatever its roughness)."""
    if params[P_ROUGHNESS] < SMOOTH_ROUGHNESS:
        return True
    return params[P_TYPE] == GLASS and abs(params[P_IOR] - 1.0) < INDEX_MATCHED


@njit(cache=True)
def has_nonspecular_lobe(params):
    """True when bsdf_eval can be non-zero, i.e. next-event estimation is worth a shadow ray.
    False for smooth metal and smooth glass, which are pure delta lobes."""
    t = params[P_TYPE]
    if t == PBR:
        return pbr_has_nonspecular_lobe(params)
    if t == DIFFUSE or t == PLASTIC:
        return True
    return not _is_smooth(params)


@njit(cache=True)
def has_delta_lobe(params):
    """True when bsdf_sample can return a delta lobe (is_delta): smooth metal, smooth glass,
    and plastic with a smooth coat; for PBR see pbr.pbr_has_delta_lobe."""
    if params[P_TYPE] == PBR:
        return pbr_has_delta_lobe(params)
    return params[P_TYPE] != DIFFUSE and _is_smooth(params)


@njit(cache=True)
def needs_outward_normal(params):
    """True when the caller must pass the outward geometric normal (wo.z > 0 = arriving from
    outside) instead of the normal faced towards wo: GLASS, and PBR refracting solids
    (transmission > 0 with thickness > 0, KHR_materials_volume)."""
    t = params[P_TYPE]
    if t == GLASS:
        return True
    return t == PBR and is_volume(params)


@njit(cache=True)
def bsdf_eval(params, wox, woy, woz, wix, wiy, wiz):
    """(fr, fg, fb, pdf): the BSDF f(wo, wi) without the cosine, and the solid-angle density of
    wi under bsdf_sample (mixture density over the non-delta lobes). Delta lobes add 0."""
    t = params[P_TYPE]
    if t == PBR:
        return pbr_eval(params, wox, woy, woz, wix, wiy, wiz)
    cr, cg, cb = params[P_COLOR], params[P_COLOR + 1], params[P_COLOR + 2]
    smooth = _is_smooth(params)
    # perceptual roughness: alpha = roughness² (makes roughness closer to linear in appearance)
    alpha = params[P_ROUGHNESS] * params[P_ROUGHNESS]
    ior = params[P_IOR]
    if t == DIFFUSE:
        return diffuse_eval(cr, cg, cb, woz, wiz)
    if t == METAL:
        if smooth:
            return 0.0, 0.0, 0.0, 0.0
        return metal_eval(cr, cg, cb, alpha, wox, woy, woz, wix, wiy, wiz)
    if t == GLASS:
        if smooth:
            return 0.0, 0.0, 0.0, 0.0
        return glass_eval(cr, cg, cb, alpha, ior, wox, woy, woz, wix, wiy, wiz)
    return plastic_eval(cr, cg, cb, alpha, smooth, ior, wox, woy, woz, wix, wiy, wiz)


@njit(cache=True)
def bsdf_sample(params, wox, woy, woz, u0, u1, u2):
    """(wix, wiy, wiz, wr, wg, wb, pdf, is_delta): a direction wi drawn for wo, with weight
    f |cos θi| / pdf per channel. u0 chooses the lobe, (u1, u2) the direction; all in [0, 1).
    For a delta lobe pdf is 0.0 and is_delta True; a failed sample has weight 0."""
    t = params[P_TYPE]
    if t == PBR:
        return pbr_sample(params, wox, woy, woz, u0, u1, u2)
    cr, cg, cb = params[P_COLOR], params[P_COLOR + 1], params[P_COLOR + 2]
    smooth = _is_smooth(params)
    alpha = params[P_ROUGHNESS] * params[P_ROUGHNESS]  # perceptual roughness, as in bsdf_eval
    ior = params[P_IOR]
    if t == DIFFUSE:
        return diffuse_sample(cr, cg, cb, woz, u1, u2)
    if t == METAL:
        return metal_sample(cr, cg, cb, alpha, smooth, wox, woy, woz, u1, u2)
    if t == GLASS:
        return glass_sample(cr, cg, cb, alpha, smooth, ior, wox, woy, woz, u0, u1, u2)
    return plastic_sample(cr, cg, cb, alpha, smooth, ior, wox, woy, woz, u0, u1, u2)
