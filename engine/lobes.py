"""The BSDF of each material type: evaluation (f without the cosine, and the sampling density)
and sampling (direction, weight f |cos| / pdf, pdf, is_delta). bsdf.py documents the frame,
the material row and the conventions, and dispatches here.

Models and sources:
  * diffuse: Lambert, f = ρ/π, cosine-weighted sampling by Malley's method (a uniform point on
    the disk, concentric mapping of Shirley & Chiu 1997, "A low distortion map between disk
    and square", JGT 2(3), lifted onto the hemisphere).
  * metal: GGX microfacet reflection f = F D G2 / (4 cos θo cos θi) (Walter et al. 2007, eq. 20)
    with Schlick's Fresnel from F0 = colour, height-correlated Smith G2, sampled by visible
    normals (see microfacet.py). Weight = F G2 / G1(wo).
  * glass: exact dielectric Fresnel. Smooth: reflect with probability F, else refract (Snell).
    Rough: Walter et al. 2007 (equation numbers from memory) — half vector h_t ∝ -(η_o wo + η_i wi) (eq. 16), BTDF eq. 21
    with η_o² in the numerator, i.e. the radiance convention (1/eta² relative to the symmetric
    form), and the refraction Jacobian |∂ω_h/∂ω_i| = η_i² |wi·h| / (η_o wo·h + η_i wi·h)²
    (eq. 17). Reflection is untinted; transmission is tinted by the colour.
  * plastic: a Lambertian base of albedo ρ under a dielectric coat of index η. Coat: smooth
    (delta, reflectance F(θo)) or GGX with the dielectric Fresnel. Base, as seen through the
    coat, including the light bounced back and forth between base and coat:
        f_d = k ρ (1 - F(θo)) (1 - F(θi)) / (π η² (1 - ρ F_dr,int))
    F_dr,int is the coat's hemispherical reflectance from inside (fresnel.diffuse_fresnel).
    Because (1/η²) ∫ (1 - F(θi)) cos θi dωi / π = 1 - F_dr,int, the base reflects in total
    (1 - F(θo)) ρ (1 - F_dr,int) / (1 - ρ F_dr,int) <= 1 - F(θo): with a smooth coat and ρ = 1
    the white furnace gives exactly 1. It is symmetric in (wo, wi), so reciprocal.
    k = 1 for a smooth coat. A rough coat's directional albedo exceeds F(θo) by up to 0.08 %
    of 1 - F(θo) (measured by Monte Carlo for η in [1.05, 3], roughness in [0.05, 1]), so the
    base is scaled by k = ROUGH_COAT_BASE = 0.995 to stay strictly energy conserving.
    Lobe choice: the coat with probability F(θo) / (F(θo) + E_base), E_base the mean over
    channels of the base's total reflectance; the density is the mixture of both lobes'.
"""

from __future__ import annotations

import math

from numba import njit

from .fresnel import diffuse_fresnel, fresnel_dielectric, fresnel_schlick, refract_cos
from .microfacet import ggx_d, ggx_g1, ggx_g2, ggx_sample_vndf

# roughness below this is a perfectly smooth surface (alpha < 1e-6)
SMOOTH_ROUGHNESS = 1e-3
# base scale under a rough coat (see the module docstring)
ROUGH_COAT_BASE = 0.995

INV_PI = 1.0 / math.pi
NO_SAMPLE = (0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 0.0, False)


@njit(cache=True)
def concentric_disk(u1, u2):
    """Shirley-Chiu concentric map of [0, 1)² onto the unit disk: (x, y)."""
    a = 2.0 * u1 - 1.0
    b = 2.0 * u2 - 1.0
    if a == 0.0 and b == 0.0:
        return 0.0, 0.0
    if abs(a) > abs(b):
        r = a
        phi = 0.25 * math.pi * (b / a)
    else:
        r = b
        phi = 0.5 * math.pi - 0.25 * math.pi * (a / b)
    return r * math.cos(phi), r * math.sin(phi)


@njit(cache=True)
def cosine_hemisphere(u1, u2):
    """Malley's method: (x, y, z) with density cos θ / π on the upper hemisphere."""
    x, y = concentric_disk(u1, u2)
    return x, y, math.sqrt(max(0.0, 1.0 - x * x - y * y))


# --------------------------------------------------------------------------- diffuse

@njit(cache=True)
def diffuse_eval(cr, cg, cb, woz, wiz):
    if woz <= 0.0 or wiz <= 0.0:
        return 0.0, 0.0, 0.0, 0.0
    return cr * INV_PI, cg * INV_PI, cb * INV_PI, wiz * INV_PI


@njit(cache=True)
def diffuse_sample(cr, cg, cb, woz, u1, u2):
    if woz <= 0.0:
        return NO_SAMPLE
    x, y, z = cosine_hemisphere(u1, u2)
    if z <= 0.0:
        return NO_SAMPLE
    return x, y, z, cr, cg, cb, z * INV_PI, False


# --------------------------------------------------------------------------- metal

@njit(cache=True)
def metal_eval(cr, cg, cb, alpha, wox, woy, woz, wix, wiy, wiz):
    if woz <= 0.0 or wiz <= 0.0:
        return 0.0, 0.0, 0.0, 0.0
    hx, hy, hz = wox + wix, woy + wiy, woz + wiz
    inv = 1.0 / math.sqrt(hx * hx + hy * hy + hz * hz)
    hz *= inv
    woh = (wox * hx + woy * hy) * inv + woz * hz
    d = ggx_d(hz, alpha)
    s = d * ggx_g2(woz, wiz, alpha) / (4.0 * woz * wiz)
    pdf = ggx_g1(woz, alpha) * d / (4.0 * woz)
    return (fresnel_schlick(woh, cr) * s, fresnel_schlick(woh, cg) * s,
            fresnel_schlick(woh, cb) * s, pdf)


@njit(cache=True)
def metal_sample(cr, cg, cb, alpha, smooth, wox, woy, woz, u1, u2):
    if woz <= 0.0:
        return NO_SAMPLE
    if smooth:
        return (-wox, -woy, woz, fresnel_schlick(woz, cr), fresnel_schlick(woz, cg),
                fresnel_schlick(woz, cb), 0.0, True)
    hx, hy, hz = ggx_sample_vndf(wox, woy, woz, alpha, u1, u2)
    woh = wox * hx + woy * hy + woz * hz
    if woh <= 0.0:
        return NO_SAMPLE
    wix, wiy, wiz = 2.0 * woh * hx - wox, 2.0 * woh * hy - woy, 2.0 * woh * hz - woz
    if wiz <= 0.0:
        return NO_SAMPLE
    g1 = ggx_g1(woz, alpha)
    w = ggx_g2(woz, wiz, alpha) / g1
    pdf = g1 * ggx_d(hz, alpha) / (4.0 * woz)
    return (wix, wiy, wiz, fresnel_schlick(woh, cr) * w, fresnel_schlick(woh, cg) * w,
            fresnel_schlick(woh, cb) * w, pdf, False)


# --------------------------------------------------------------------------- glass

@njit(cache=True)
def glass_eval(cr, cg, cb, alpha, ior, wox, woy, woz, wix, wiy, wiz):
    """Rough dielectric. Works in a frame flipped so that wo.z > 0; eta = η(wi side of the
    transmission) / η(wo side)."""
    if woz == 0.0 or wiz == 0.0:
        return 0.0, 0.0, 0.0, 0.0
    if woz > 0.0:
        eta = ior
    else:
        eta = 1.0 / ior
        woz = -woz
        wiz = -wiz
    g1 = ggx_g1(woz, alpha)
    if wiz > 0.0:  # reflection
        hx, hy, hz = wox + wix, woy + wiy, woz + wiz
        inv = 1.0 / math.sqrt(hx * hx + hy * hy + hz * hz)
        hx *= inv
        hy *= inv
        hz *= inv
        woh = wox * hx + woy * hy + woz * hz
        f = fresnel_dielectric(woh, eta)
        d = ggx_d(hz, alpha)
        v = f * d * ggx_g2(woz, wiz, alpha) / (4.0 * woz * wiz)
        return v, v, v, f * g1 * d / (4.0 * woz)
    # transmission: h ∝ -(wo + eta wi), turned to the +z side
    hx, hy, hz = -(wox + eta * wix), -(woy + eta * wiy), -(woz + eta * wiz)
    ln = math.sqrt(hx * hx + hy * hy + hz * hz)
    if ln < 1e-12:
        return 0.0, 0.0, 0.0, 0.0
    if hz < 0.0:
        ln = -ln
    hx /= ln
    hy /= ln
    hz /= ln
    woh = wox * hx + woy * hy + woz * hz
    wih = wix * hx + wiy * hy + wiz * hz
    if woh <= 0.0 or wih >= 0.0:  # wo and wi must lie on opposite sides of the microfacet
        return 0.0, 0.0, 0.0, 0.0
    t = 1.0 - fresnel_dielectric(woh, eta)
    d = ggx_d(hz, alpha)
    den = woh + eta * wih
    den2 = den * den
    v = t * d * ggx_g2(woz, wiz, alpha) * woh * -wih / (woz * -wiz * den2)
    pdf = t * g1 * d * woh / woz * eta * eta * -wih / den2
    return cr * v, cg * v, cb * v, pdf


@njit(cache=True)
def glass_sample(cr, cg, cb, alpha, smooth, ior, wox, woy, woz, u0, u1, u2):
    if woz == 0.0:
        return NO_SAMPLE
    s = 1.0 if woz > 0.0 else -1.0
    eta = ior if woz > 0.0 else 1.0 / ior
    woz = s * woz  # flipped frame: wo.z > 0
    scale = 1.0 / (eta * eta)  # radiance scaling on transmission (see bsdf.py)
    if smooth:
        f = fresnel_dielectric(woz, eta)
        if u0 < f:
            return -wox, -woy, s * woz, 1.0, 1.0, 1.0, 0.0, True
        cos_t = refract_cos(woz, eta)
        if cos_t < 0.0:
            return NO_SAMPLE
        return (-wox / eta, -woy / eta, -s * cos_t, cr * scale, cg * scale, cb * scale,
                0.0, True)
    hx, hy, hz = ggx_sample_vndf(wox, woy, woz, alpha, u1, u2)
    woh = wox * hx + woy * hy + woz * hz
    if woh <= 0.0:
        return NO_SAMPLE
    f = fresnel_dielectric(woh, eta)
    g1 = ggx_g1(woz, alpha)
    d = ggx_d(hz, alpha)
    if u0 < f:
        wix, wiy, wiz = 2.0 * woh * hx - wox, 2.0 * woh * hy - woy, 2.0 * woh * hz - woz
        if wiz <= 0.0:
            return NO_SAMPLE
        w = ggx_g2(woz, wiz, alpha) / g1
        return wix, wiy, s * wiz, w, w, w, f * g1 * d / (4.0 * woz), False
    cos_t = refract_cos(woh, eta)
    if cos_t < 0.0:
        return NO_SAMPLE
    # Snell about the microfacet normal: wi = -wo/eta + (cos_o/eta - cos_t) h
    k = woh / eta - cos_t
    wix, wiy, wiz = -wox / eta + k * hx, -woy / eta + k * hy, -woz / eta + k * hz
    if wiz >= 0.0:
        return NO_SAMPLE
    wih = -cos_t
    den = woh + eta * wih
    pdf = (1.0 - f) * g1 * d * woh / woz * eta * eta * cos_t / (den * den)
    w = ggx_g2(woz, wiz, alpha) / g1 * scale
    return wix, wiy, s * wiz, cr * w, cg * w, cb * w, pdf, False


# --------------------------------------------------------------------------- plastic

@njit(cache=True)
def _base_albedo(c, fdr):
    """Total reflectance of the base seen through the coat, per unit light entering it."""
    return c * (1.0 - fdr) / (1.0 - c * fdr)


@njit(cache=True)
def _plastic_coat_prob(cr, cg, cb, fdr, fo):
    """Probability of sampling the coat lobe rather than the base; fdr = diffuse_fresnel(1 / ior)."""
    e_base = (1.0 - fo) * (_base_albedo(cr, fdr) + _base_albedo(cg, fdr) + _base_albedo(cb, fdr)) / 3.0
    tot = fo + e_base
    return fo / tot if tot > 0.0 else 0.5


@njit(cache=True)
def plastic_eval(cr, cg, cb, alpha, smooth, ior, wox, woy, woz, wix, wiy, wiz):
    if woz <= 0.0 or wiz <= 0.0:
        return 0.0, 0.0, 0.0, 0.0
    return _plastic_eval(cr, cg, cb, alpha, smooth, ior, diffuse_fresnel(1.0 / ior), wox, woy, woz, wix, wiy, wiz)


@njit(cache=True)
def _plastic_eval(cr, cg, cb, alpha, smooth, ior, fdr, wox, woy, woz, wix, wiy, wiz):
    """`plastic_eval` given the coat's hemispherical reflectance fdr = diffuse_fresnel(1 / ior),
    which costs two logarithms: computed once per call of plastic_eval or plastic_sample."""
    if woz <= 0.0 or wiz <= 0.0:
        return 0.0, 0.0, 0.0, 0.0
    fo = fresnel_dielectric(woz, ior)
    fi = fresnel_dielectric(wiz, ior)
    k = 1.0 if smooth else ROUGH_COAT_BASE
    common = k * (1.0 - fo) * (1.0 - fi) / (math.pi * ior * ior)
    fr = cr * common / (1.0 - cr * fdr)
    fg = cg * common / (1.0 - cg * fdr)
    fb = cb * common / (1.0 - cb * fdr)
    p_coat = _plastic_coat_prob(cr, cg, cb, fdr, fo)
    pdf = (1.0 - p_coat) * wiz * INV_PI
    if not smooth:
        hx, hy, hz = wox + wix, woy + wiy, woz + wiz
        inv = 1.0 / math.sqrt(hx * hx + hy * hy + hz * hz)
        hz *= inv
        woh = (wox * hx + woy * hy) * inv + woz * hz
        d = ggx_d(hz, alpha)
        spec = fresnel_dielectric(woh, ior) * d * ggx_g2(woz, wiz, alpha) / (4.0 * woz * wiz)
        fr += spec
        fg += spec
        fb += spec
        pdf += p_coat * ggx_g1(woz, alpha) * d / (4.0 * woz)
    return fr, fg, fb, pdf


@njit(cache=True)
def plastic_sample(cr, cg, cb, alpha, smooth, ior, wox, woy, woz, u0, u1, u2):
    if woz <= 0.0:
        return NO_SAMPLE
    fo = fresnel_dielectric(woz, ior)
    fdr = diffuse_fresnel(1.0 / ior)
    p_coat = _plastic_coat_prob(cr, cg, cb, fdr, fo)
    if u0 < p_coat:
        if smooth:
            w = fo / p_coat
            return -wox, -woy, woz, w, w, w, 0.0, True
        hx, hy, hz = ggx_sample_vndf(wox, woy, woz, alpha, u1, u2)
        woh = wox * hx + woy * hy + woz * hz
        if woh <= 0.0:
            return NO_SAMPLE
        wix, wiy, wiz = 2.0 * woh * hx - wox, 2.0 * woh * hy - woy, 2.0 * woh * hz - woz
    else:
        wix, wiy, wiz = cosine_hemisphere(u1, u2)
    if wiz <= 0.0:
        return NO_SAMPLE
    # the weight of a mixture sample is the whole (non-delta) BSDF over the mixture density
    fr, fg, fb, pdf = _plastic_eval(cr, cg, cb, alpha, smooth, ior, fdr, wox, woy, woz, wix, wiy, wiz)
    if pdf <= 0.0:
        return NO_SAMPLE
    c = wiz / pdf
    return wix, wiy, wiz, fr * c, fg * c, fb * c, pdf, False
