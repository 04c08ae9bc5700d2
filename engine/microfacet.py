"""The GGX (Trowbridge-Reitz) microfacet distribution: normal distribution, Smith masking and
shadowing, and sampling of the distribution of visible normals.

All directions are in the local shading frame (z = the macro-surface normal) and unit length;
`alpha` is the GGX width (lampyr uses alpha = roughness², see bsdf.py). Isotropic only.

Sources:
  * D and the Smith Λ of GGX: Walter, Marschner, Li & Torrance 2007, "Microfacet models for
    refraction through rough surfaces" (EGSR), eqs. 33-34 (numbers from memory), and Heitz 2014, "Understanding the
    masking-shadowing function in microfacet-based BRDFs" (JCGT 3(2)), §5.
  * Masking-shadowing is the *height-correlated* Smith form G2 = 1 / (1 + Λ(wo) + Λ(wi))
    (Heitz 2014, §6). lampyr uses the same expression for transmission through a rough
    dielectric; Heitz derives a slightly different height-correlated form for that case,
    and this one is the common simplification. It stays at most min(G1(wo), G1(wi)), so it
    never adds energy.
  * Visible-normal sampling: Heitz 2018, "Sampling the GGX distribution of visible normals"
    (JCGT 7(4)), listing 1, specialised to alpha_x = alpha_y. Its density is
    D_wo(h) = G1(wo) max(0, wo·h) D(h) / wo.z  (Heitz 2014 §3; Heitz 2018 §1).
"""

from __future__ import annotations

import math

from numba import njit


@njit(cache=True)
def ggx_d(hz, alpha):
    """GGX normal distribution D(h) for a microfacet normal with cos θh = hz (0 if hz <= 0).

    Normalised so that ∫ D(h) cos θh dω_h = 1 over the hemisphere.
    """
    if hz <= 0.0:
        return 0.0
    a2 = alpha * alpha
    c2 = hz * hz
    # D = α² / (π cos⁴θ (α² + tan²θ)²) = α² / (π (c²(α² - 1) + 1)²); the second form written
    # as c² α² + (1 - c²) keeps precision when α is tiny
    d = c2 * a2 + (1.0 - c2)
    return a2 / (math.pi * d * d)


@njit(cache=True)
def ggx_lambda(cz, alpha):
    """Smith Λ(w) of GGX for a direction with cos θ = cz (either side of the surface):
    Λ = (-1 + sqrt(1 + α² tan²θ)) / 2, written without the cancellation at small α tan θ."""
    c2 = cz * cz
    if c2 <= 0.0:
        return math.inf
    x = alpha * alpha * max(0.0, 1.0 - c2) / c2
    return x / (2.0 * (1.0 + math.sqrt(1.0 + x)))


@njit(cache=True)
def ggx_g1(cz, alpha):
    """Smith masking G1(w) = 1 / (1 + Λ(w))."""
    return 1.0 / (1.0 + ggx_lambda(cz, alpha))


@njit(cache=True)
def ggx_g2(coz, ciz, alpha):
    """Height-correlated Smith masking-shadowing 1 / (1 + Λ(wo) + Λ(wi))."""
    return 1.0 / (1.0 + ggx_lambda(coz, alpha) + ggx_lambda(ciz, alpha))


@njit(cache=True)
def ggx_vndf_pdf(wox, woy, woz, hx, hy, hz, alpha):
    """Density over microfacet normals h of `ggx_sample_vndf` for the view direction wo."""
    if woz <= 0.0:
        return 0.0
    woh = wox * hx + woy * hy + woz * hz
    if woh <= 0.0:
        return 0.0
    return ggx_g1(woz, alpha) * woh * ggx_d(hz, alpha) / woz


@njit(cache=True)
def ggx_sample_vndf(wox, woy, woz, alpha, u1, u2):
    """A microfacet normal h (hx, hy, hz) drawn from the normals visible from wo (woz > 0),
    with density `ggx_vndf_pdf`. u1, u2 in [0, 1)."""
    # stretch the view direction to the hemisphere configuration (α = 1)
    vx = alpha * wox
    vy = alpha * woy
    vz = woz
    inv = 1.0 / math.sqrt(vx * vx + vy * vy + vz * vz)
    vx *= inv
    vy *= inv
    vz *= inv
    # orthonormal basis around v (Heitz 2018 uses T1 ⟂ z)
    lensq = vx * vx + vy * vy
    if lensq > 0.0:
        il = 1.0 / math.sqrt(lensq)
        t1x, t1y, t1z = -vy * il, vx * il, 0.0
    else:
        t1x, t1y, t1z = 1.0, 0.0, 0.0
    t2x = vy * t1z - vz * t1y
    t2y = vz * t1x - vx * t1z
    t2z = vx * t1y - vy * t1x
    # uniform point on a disk, then warp its lower half onto the projected hemisphere
    r = math.sqrt(u1)
    phi = 2.0 * math.pi * u2
    p1 = r * math.cos(phi)
    p2 = r * math.sin(phi)
    s = 0.5 * (1.0 + vz)
    p2 = (1.0 - s) * math.sqrt(max(0.0, 1.0 - p1 * p1)) + s * p2
    p3 = math.sqrt(max(0.0, 1.0 - p1 * p1 - p2 * p2))
    nx = p1 * t1x + p2 * t2x + p3 * vx
    ny = p1 * t1y + p2 * t2y + p3 * vy
    nz = p1 * t1z + p2 * t2z + p3 * vz
    # unstretch back to the ellipsoid configuration
    hx = alpha * nx
    hy = alpha * ny
    hz = max(1e-12, nz)  # the listing clamps at 0; a tiny floor keeps h normalisable
    inv = 1.0 / math.sqrt(hx * hx + hy * hy + hz * hz)
    return hx * inv, hy * inv, hz * inv
