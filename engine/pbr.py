"""The glTF 2.0 metallic-roughness BSDF (material type PBR) and the lobes of its extensions
KHR_materials_ior, _specular, _clearcoat, _transmission and _volume.

Reads a *resolved* material row `m: (MATERIAL_SIZE,) float64` (textures already multiplied in;
columns in material_table.py). Directions, frame, return values and the transport convention
are bsdf.py's: local frame z = shading normal, unit vectors pointing away from the surface,
`pbr_eval` -> (fr, fg, fb, pdf) with f without the cosine, `pbr_sample` -> (wix, wiy, wiz,
wr, wg, wb, pdf, is_delta) with weight f |cos θi| / pdf; delta lobes report pdf 0.0 and
is_delta True; a failed sample has weight 0.

Which normal the caller passes:
  * opaque and thin-walled materials (M_TRANSMISSION == 0 or M_THICKNESS == 0): the normal
    faced towards wo (wo.z > 0), as for the legacy opaque types; wo.z <= 0 gives nothing.
  * refracting solids (M_TRANSMISSION > 0 and M_THICKNESS > 0, `needs_outward_normal`): the
    OUTWARD geometric normal, as for GLASS; wo.z > 0 is a ray arriving from outside.

The model (glTF 2.0 specification, Appendix B "BRDF Implementation"; alpha = roughness²):
    material = (1 - metallic) dielectric + metallic metal
    metal    = F_schlick(f0 = base colour, v·h) D V
    D        = GGX / Trowbridge-Reitz; V = the height-correlated Smith visibility of the
               Appendix (microfacet.ggx_g2 / (4 |n·v| |n·l|), the same function)
    dielectric = s F_d(v·h) D V                    (specular layer; x (1 - T) for a volume)
               + (1 - s max F_d(n·v)) (1 - s max F_d(n·l)) (1 - T) base / π   (diffuse base)
               + T x (transmission, below)
    F_d(c)   = f0 + (1 - f0)(1 - c)^5 per channel, f0 = min(((ior - 1)/(ior + 1))² specularColor, 1),
               s = specular (KHR_materials_ior and the KHR_materials_specular README: F0 scaled by
               specularColor and s, F90 = s; the base weighted with max over the channels).
  The Appendix's sample `fresnel_mix` weights the base by 1 - F(v·h); its own discussion
  ("Coupling Diffuse and Specular Reflection") says that breaks energy conservation (measured
  here: a smooth white dielectric then returns 1.55 of the light at cos θo = 0.1) and names the
  form used here, (1 - F(n·l))(1 - F(n·v)), which conserves energy and is reciprocal, as the
  Appendix asks of
  a physically based renderer ("Complete Model").
  Clearcoat (KHR_materials_clearcoat README, `fresnel_coat`): the whole material below is
  scaled by (1 - cc Fc(n·v)) and a second GGX lobe cc Fc(n·v) D_c V_c (alpha_c = clearcoat
  roughness²) is added, Fc Schlick with f0 = 0.04 (ior 1.5). As in the README it depends on
  n·v only, so the coat is not reciprocal; the clearcoat normal is the shading normal.
  Transmission (KHR_materials_transmission README) replaces the diffuse base:
    * thin-walled (thickness 0): light goes straight through, wi = -wo, a delta lobe at every
      roughness (rough panes are not blurred), weight T base (1 - s max F_d(n·v)) k, with
      k = 1 for a smooth surface and ROUGH_THIN_TRANSMISSION for a rough one;
    * a volume (thickness > 0): the engine's dielectric interface (lobes.glass_*) with exact
      Fresnel for n = ior (the Appendix's discussion recommends full Fresnel for transparent
      dielectrics), tinted by the base colour on every crossing like GLASS (the volume
      README, "Base Color and Absorption": base colour acts at the boundary, "as if the
      object is covered with a colored, transparent foil"), weight (1 - metallic) T.
      KHR_materials_specular does not act on it. The coat factor applies on the outside
      direction of a crossing. Beer-Lambert absorption inside is the
      integrator's (`pbr_absorption`).
  Sampling: one lobe chosen by u0 with probabilities proportional to estimates of each lobe's
  albedo at wo (`_lobe_probabilities`); GGX lobes by visible normals (microfacet.py), the base
  by the cosine; the weight of a non-delta sample is the whole non-delta BSDF over the whole
  mixture density (one-sample MIS), so pbr_eval's pdf is exactly the density sampled.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from .fresnel import INDEX_MATCHED, fresnel_dielectric, ior_f0, schlick_weight
from .lobes import NO_SAMPLE, SMOOTH_ROUGHNESS, cosine_hemisphere, glass_eval, glass_sample
from .material_table import (
    M_ALPHA, M_ATTEN_COLOR, M_ATTEN_DIST, M_CLEARCOAT, M_CLEARCOAT_ROUGHNESS, M_COLOR, M_EMISSION, M_IOR,
    M_METALLIC, M_ROUGHNESS, M_SPECULAR, M_SPECULAR_COLOR, M_THICKNESS, M_TRANSMISSION, M_TYPE,
    MATERIAL_SIZE, PBR, TEXTURE_COLUMNS,
)
from .microfacet import ggx_d, ggx_g1, ggx_g2, ggx_sample_vndf

INV_PI = 1.0 / math.pi
# KHR_materials_clearcoat: the coat's ior is 1.5, so its Schlick f0 is ((1.5 - 1)/(1.5 + 1))² = 0.04
COAT_F0 = 0.04
# A rough specular layer reflects up to 0.25 % of (1 - F(n·v)) more than F(n·v) itself (Jensen's
# inequality on the convex Schlick curve; measured by Monte Carlo for f0 in [0, 0.3], alpha in
# [0.03, 0.3]); the thin-walled straight-through lobe under it is scaled by this to stay below 1.
ROUGH_THIN_TRANSMISSION = 0.995
# floor of a specular lobe's albedo estimate, so a lobe with f > 0 is never sampled with probability 0
LOBE_FLOOR = 0.02


@njit(cache=True)
def dielectric_fresnel(m, c):
    """(Fr, Fg, Fb, Fmax): the dielectric layer's Fresnel s (f0 + (1 - f0)(1 - c)^5) per
    channel with f0 = min(ior_f0 * specularColor, 1), and its largest channel
    (KHR_materials_specular README, "Implementation")."""
    s = m[M_SPECULAR]
    f0 = ior_f0(m[M_IOR])
    w = schlick_weight(c)
    r = min(f0 * m[M_SPECULAR_COLOR], 1.0)
    g = min(f0 * m[M_SPECULAR_COLOR + 1], 1.0)
    b = min(f0 * m[M_SPECULAR_COLOR + 2], 1.0)
    fr = s * (r + (1.0 - r) * w)
    fg = s * (g + (1.0 - g) * w)
    fb = s * (b + (1.0 - b) * w)
    return fr, fg, fb, max(fr, max(fg, fb))


@njit(cache=True)
def coat_fresnel(c):
    """Schlick Fresnel of the clearcoat (ior 1.5) at cosine c."""
    return COAT_F0 + (1.0 - COAT_F0) * schlick_weight(c)


@njit(cache=True)
def is_volume(m):
    """True for a refracting solid: transmission > 0 with a volume (thickness > 0)."""
    return m[M_TRANSMISSION] > 0.0 and m[M_THICKNESS] > 0.0


@njit(cache=True)
def _spec_smooth(m):
    return m[M_ROUGHNESS] < SMOOTH_ROUGHNESS


@njit(cache=True)
def _coat_smooth(m):
    return m[M_CLEARCOAT_ROUGHNESS] < SMOOTH_ROUGHNESS


@njit(cache=True)
def refraction_ior(m):
    """The index a volume refracts with: M_IOR, or 1 (no bending) for ior <= 0, which the
    KHR_materials_specular README uses only to reach f0 = 1 and calls unfit for volumes."""
    return m[M_IOR] if m[M_IOR] > 0.0 else 1.0


@njit(cache=True)
def _glass_smooth(m):
    return m[M_ROUGHNESS] < SMOOTH_ROUGHNESS or abs(refraction_ior(m) - 1.0) < INDEX_MATCHED


@njit(cache=True)
def layer_weight(m):
    """Weight of the dielectric specular layer: 1 - metallic, times 1 - transmission for a
    refracting solid (whose interface reflects through its own exact-Fresnel lobe)."""
    w = 1.0 - m[M_METALLIC]
    if is_volume(m):
        w *= 1.0 - m[M_TRANSMISSION]
    return w


@njit(cache=True)
def _coat_crossing(m, woz, wiz):
    """The coat's attenuation 1 - clearcoat Fc(n·w) of the outside direction w of a crossing
    (wo if it is outside, else wi; 1 for a reflection inside)."""
    if woz > 0.0:
        return 1.0 - m[M_CLEARCOAT] * coat_fresnel(woz)
    if wiz > 0.0:
        return 1.0 - m[M_CLEARCOAT] * coat_fresnel(wiz)
    return 1.0


@njit(cache=True)
def thin_factor(m, c):
    """Scalar part of the thin-walled straight-through weight at cosine c (times base colour
    gives the lobe): (1 - metallic) T k (1 - s max F_d(c)) (1 - clearcoat Fc(c)); 0 for
    materials that are not thin-walled transmissive."""
    t = m[M_TRANSMISSION]
    if t <= 0.0 or m[M_THICKNESS] > 0.0:
        return 0.0
    k = 1.0 if _spec_smooth(m) else ROUGH_THIN_TRANSMISSION
    fmax = dielectric_fresnel(m, c)[3]
    return (1.0 - m[M_METALLIC]) * t * k * (1.0 - fmax) * (1.0 - m[M_CLEARCOAT] * coat_fresnel(c))


@njit(cache=True)
def _lobe_probabilities(m, woz):
    """(p_spec, p_diffuse, p_coat, p_thin, p_glass): the probability of choosing each lobe for
    wo, proportional to an estimate of its albedo; all 0 when the material reflects nothing."""
    metal = m[M_METALLIC]
    t = m[M_TRANSMISSION]
    cc = m[M_CLEARCOAT]
    volume = is_volume(m)
    if woz <= 0.0:
        if volume and (1.0 - metal) * t > 0.0:
            return 0.0, 0.0, 0.0, 0.0, 1.0
        return 0.0, 0.0, 0.0, 0.0, 0.0
    br, bg, bb = m[M_COLOR], m[M_COLOR + 1], m[M_COLOR + 2]
    mean_base = (br + bg + bb) / 3.0
    w = schlick_weight(woz)
    fm = (br + (1.0 - br) * w + bg + (1.0 - bg) * w + bb + (1.0 - bb) * w) / 3.0
    fr, fg, fb, fmax = dielectric_fresnel(m, woz)
    a = 1.0 - cc * coat_fresnel(woz)
    e_layer = max((fr + fg + fb) / 3.0, LOBE_FLOOR * m[M_SPECULAR])
    e_spec = a * (metal * max(fm, LOBE_FLOOR) + layer_weight(m) * e_layer)
    e_diff = a * (1.0 - metal) * (1.0 - t) * (1.0 - fmax) * mean_base
    e_coat = cc * coat_fresnel(woz)
    e_thin = 0.0
    e_glass = 0.0
    if volume:
        f = fresnel_dielectric(woz, refraction_ior(m))
        e_glass = a * (1.0 - metal) * t * (f + (1.0 - f) * mean_base)
    else:
        e_thin = thin_factor(m, woz) * mean_base
    total = e_spec + e_diff + e_coat + e_thin + e_glass
    if not total > 0.0:
        return 0.0, 0.0, 0.0, 0.0, 0.0
    inv = 1.0 / total
    return e_spec * inv, e_diff * inv, e_coat * inv, e_thin * inv, e_glass * inv


@njit(cache=True)
def pbr_eval(m, wox, woy, woz, wix, wiy, wiz):
    """(fr, fg, fb, pdf): the non-delta part of the BSDF f(wo, wi) without the cosine, and the
    solid-angle density with which pbr_sample draws wi (its mixture over the non-delta lobes)."""
    p_spec, p_diff, p_coat, p_thin, p_glass = _lobe_probabilities(m, woz)
    fr = 0.0
    fg = 0.0
    fb = 0.0
    pdf = 0.0
    metal = m[M_METALLIC]
    alpha = m[M_ROUGHNESS] * m[M_ROUGHNESS]
    br, bg, bb = m[M_COLOR], m[M_COLOR + 1], m[M_COLOR + 2]
    if woz > 0.0 and wiz > 0.0:
        cc = m[M_CLEARCOAT]
        a = 1.0 - cc * coat_fresnel(woz)
        hx, hy, hz = wox + wix, woy + wiy, woz + wiz
        inv = 1.0 / math.sqrt(hx * hx + hy * hy + hz * hz)
        hz *= inv
        voh = (wox * hx + woy * hy) * inv + woz * hz
        if not _spec_smooth(m):
            d = ggx_d(hz, alpha)
            spec = a * d * ggx_g2(woz, wiz, alpha) / (4.0 * woz * wiz)
            w = schlick_weight(voh)
            lw = layer_weight(m)
            dr, dg, db, _ = dielectric_fresnel(m, voh)
            fr += spec * (metal * (br + (1.0 - br) * w) + lw * dr)
            fg += spec * (metal * (bg + (1.0 - bg) * w) + lw * dg)
            fb += spec * (metal * (bb + (1.0 - bb) * w) + lw * db)
            pdf += p_spec * ggx_g1(woz, alpha) * d / (4.0 * woz)
        k = (a * (1.0 - metal) * (1.0 - m[M_TRANSMISSION]) * (1.0 - dielectric_fresnel(m, woz)[3])
             * (1.0 - dielectric_fresnel(m, wiz)[3]) * INV_PI)
        fr += k * br
        fg += k * bg
        fb += k * bb
        pdf += p_diff * wiz * INV_PI
        if cc > 0.0 and not _coat_smooth(m):
            ac = m[M_CLEARCOAT_ROUGHNESS] * m[M_CLEARCOAT_ROUGHNESS]
            dc = ggx_d(hz, ac)
            v = cc * coat_fresnel(woz) * dc * ggx_g2(woz, wiz, ac) / (4.0 * woz * wiz)
            fr += v
            fg += v
            fb += v
            pdf += p_coat * ggx_g1(woz, ac) * dc / (4.0 * woz)
    if is_volume(m) and not _glass_smooth(m):
        gr, gg, gb, gp = glass_eval(br, bg, bb, alpha, refraction_ior(m), wox, woy, woz, wix, wiy, wiz)
        w = (1.0 - metal) * m[M_TRANSMISSION] * _coat_crossing(m, woz, wiz)
        fr += w * gr
        fg += w * gg
        fb += w * gb
        pdf += p_glass * gp
    return fr, fg, fb, pdf


@njit(cache=True)
def _mirror_weight(m, woz, p_spec):
    """Weight of the smooth specular layer's mirror sample: coat-attenuated Fresnel over p."""
    metal = m[M_METALLIC]
    a = (1.0 - m[M_CLEARCOAT] * coat_fresnel(woz)) / p_spec
    w = schlick_weight(woz)
    lw = layer_weight(m)
    dr, dg, db, _ = dielectric_fresnel(m, woz)
    br, bg, bb = m[M_COLOR], m[M_COLOR + 1], m[M_COLOR + 2]
    return (a * (metal * (br + (1.0 - br) * w) + lw * dr),
            a * (metal * (bg + (1.0 - bg) * w) + lw * dg),
            a * (metal * (bb + (1.0 - bb) * w) + lw * db))


@njit(cache=True)
def pbr_sample(m, wox, woy, woz, u0, u1, u2):
    """(wix, wiy, wiz, wr, wg, wb, pdf, is_delta): a direction wi for wo with weight
    f |cos θi| / pdf per channel. u0 chooses the lobe (and, inside the volume lobe, reflection
    or refraction), (u1, u2) the direction; all in [0, 1)."""
    p_spec, p_diff, p_coat, p_thin, p_glass = _lobe_probabilities(m, woz)
    c1 = p_spec
    c2 = c1 + p_diff
    c3 = c2 + p_coat
    c4 = c3 + p_thin
    if c4 + p_glass <= 0.0:
        return NO_SAMPLE
    if u0 < c1:  # the specular layer (metal and dielectric share one GGX lobe)
        if _spec_smooth(m):
            wr, wg, wb = _mirror_weight(m, woz, p_spec)
            return -wox, -woy, woz, wr, wg, wb, 0.0, True
        alpha = m[M_ROUGHNESS] * m[M_ROUGHNESS]
        hx, hy, hz = ggx_sample_vndf(wox, woy, woz, alpha, u1, u2)
        woh = wox * hx + woy * hy + woz * hz
        if woh <= 0.0:
            return NO_SAMPLE
        wix, wiy, wiz = 2.0 * woh * hx - wox, 2.0 * woh * hy - woy, 2.0 * woh * hz - woz
    elif u0 < c2:  # the diffuse base
        wix, wiy, wiz = cosine_hemisphere(u1, u2)
    elif u0 < c3:  # the clearcoat
        if _coat_smooth(m):
            v = m[M_CLEARCOAT] * coat_fresnel(woz) / p_coat
            return -wox, -woy, woz, v, v, v, 0.0, True
        ac = m[M_CLEARCOAT_ROUGHNESS] * m[M_CLEARCOAT_ROUGHNESS]
        hx, hy, hz = ggx_sample_vndf(wox, woy, woz, ac, u1, u2)
        woh = wox * hx + woy * hy + woz * hz
        if woh <= 0.0:
            return NO_SAMPLE
        wix, wiy, wiz = 2.0 * woh * hx - wox, 2.0 * woh * hy - woy, 2.0 * woh * hz - woz
    elif u0 < c4:  # thin-walled: straight through
        k = thin_factor(m, woz) / p_thin
        return -wox, -woy, -woz, k * m[M_COLOR], k * m[M_COLOR + 1], k * m[M_COLOR + 2], 0.0, True
    else:  # the volume's interface (both sides)
        if p_glass <= 0.0:
            return NO_SAMPLE
        u = min((u0 - c4) / p_glass, 1.0 - 1e-16)
        alpha = m[M_ROUGHNESS] * m[M_ROUGHNESS]
        wix, wiy, wiz, gr, gg, gb, gp, delta = glass_sample(
            m[M_COLOR], m[M_COLOR + 1], m[M_COLOR + 2], alpha, _glass_smooth(m), refraction_ior(m),
            wox, woy, woz, u, u1, u2)
        if not (gr > 0.0 or gg > 0.0 or gb > 0.0):
            return NO_SAMPLE
        if delta:
            k = (1.0 - m[M_METALLIC]) * m[M_TRANSMISSION] * _coat_crossing(m, woz, wiz) / p_glass
            return wix, wiy, wiz, k * gr, k * gg, k * gb, 0.0, True
    if u0 < c3 and wiz <= 0.0:  # a reflection lobe's direction below the surface
        return NO_SAMPLE
    fr, fg, fb, pdf = pbr_eval(m, wox, woy, woz, wix, wiy, wiz)
    if not pdf > 0.0:
        return NO_SAMPLE
    c = abs(wiz) / pdf
    return wix, wiy, wiz, fr * c, fg * c, fb * c, pdf, False


# --------------------------------------------------------------------------- for the integrator

@njit(cache=True)
def pbr_has_nonspecular_lobe(m):
    """True when pbr_eval can be non-zero (a shadow ray towards a light is worth tracing)."""
    if (1.0 - m[M_METALLIC]) * (1.0 - m[M_TRANSMISSION]) > 0.0:
        return True  # the diffuse base
    if not _spec_smooth(m):
        return True
    if m[M_CLEARCOAT] > 0.0 and not _coat_smooth(m):
        return True
    return is_volume(m) and not _glass_smooth(m)


@njit(cache=True)
def pbr_has_delta_lobe(m):
    """True when pbr_sample can return a delta lobe: a smooth specular layer or coat, a
    thin-walled transmission, or a smooth (or index-matched) volume interface."""
    if _spec_smooth(m):
        return True
    if m[M_CLEARCOAT] > 0.0 and _coat_smooth(m):
        return True
    if m[M_TRANSMISSION] > 0.0 and m[M_METALLIC] < 1.0:
        return m[M_THICKNESS] <= 0.0 or _glass_smooth(m)
    return False


@njit(cache=True)
def pbr_thin_transmittance(m, cos_theta):
    """(tr, tg, tb): the fraction of radiance a shadow ray keeps when it crosses a thin-walled
    transmissive PBR surface at incidence cosine cos_theta (either side): the straight-through
    lobe's weight, base colour x thin_factor. (0, 0, 0) for anything else (opaque, refracting
    solids, other material types): such surfaces block shadow rays."""
    if m[M_TYPE] != PBR:
        return 0.0, 0.0, 0.0
    k = thin_factor(m, cos_theta)
    return k * m[M_COLOR], k * m[M_COLOR + 1], k * m[M_COLOR + 2]


@njit(cache=True)
def pbr_absorption(m, distance):
    """(ar, ag, ab) = exp(-sigma d) per channel, the Beer-Lambert transmittance over a path of
    length `distance` inside the material's volume, with sigma = -ln(attenuationColor) /
    attenuationDistance (KHR_materials_volume README). An infinite distance absorbs nothing."""
    dist = m[M_ATTEN_DIST]
    if not (dist < math.inf) or distance <= 0.0 or dist <= 0.0:
        return 1.0, 1.0, 1.0
    ar = 0.0
    ag = 0.0
    ab = 0.0
    c = m[M_ATTEN_COLOR]
    if c > 0.0:
        ar = math.exp(math.log(c) / dist * distance)
    c = m[M_ATTEN_COLOR + 1]
    if c > 0.0:
        ag = math.exp(math.log(c) / dist * distance)
    c = m[M_ATTEN_COLOR + 2]
    if c > 0.0:
        ab = math.exp(math.log(c) / dist * distance)
    return ar, ag, ab


# --------------------------------------------------------------------------- rows

def pbr_row(base=(1.0, 1.0, 1.0), metallic=1.0, roughness=1.0, *, ior=1.5, transmission=0.0,
            thickness=0.0, attenuation_color=(1.0, 1.0, 1.0), attenuation_distance=math.inf,
            clearcoat=0.0, clearcoat_roughness=0.0, specular=1.0, specular_color=(1.0, 1.0, 1.0),
            emission=(0.0, 0.0, 0.0)) -> np.ndarray:
    """A resolved PBR material row, (MATERIAL_SIZE,) float64, with the glTF defaults
    (pbrMetallicRoughness: base 1, metallic 1, roughness 1; the extensions' defaults), opaque,
    no textures. Values are stored as given (no range checks: the glTF reader checks)."""
    row = np.zeros(MATERIAL_SIZE, dtype=np.float64)
    row[M_ALPHA] = 1.0
    row[list(TEXTURE_COLUMNS)] = -1.0
    row[M_TYPE] = PBR
    row[M_COLOR:M_COLOR + 3] = base
    row[M_METALLIC] = metallic
    row[M_ROUGHNESS] = roughness
    row[M_IOR] = ior
    row[M_TRANSMISSION] = transmission
    row[M_THICKNESS] = thickness
    row[M_ATTEN_COLOR:M_ATTEN_COLOR + 3] = attenuation_color
    row[M_ATTEN_DIST] = attenuation_distance
    row[M_CLEARCOAT] = clearcoat
    row[M_CLEARCOAT_ROUGHNESS] = clearcoat_roughness
    row[M_SPECULAR] = specular
    row[M_SPECULAR_COLOR:M_SPECULAR_COLOR + 3] = specular_color
    row[M_EMISSION:M_EMISSION + 3] = emission
    return row
