"""The glTF 2.0 metallic-roughness BSDF (pbr.py) against the formulas that define it, written out
again here, against scipy's numerical integration of them, and against Fresnel's and
Beer-Lambert's laws.

Sources: the glTF 2.0 specification, Appendix B "BRDF Implementation" (D, the height-correlated
visibility ν, Schlick's Fresnel, conductor_fresnel, fresnel_mix, and its discussion "Coupling
Diffuse and Specular Reflection", which names the energy-conserving base weight
(1 - F(n·l))(1 - F(n·v)) used by lampyr); the READMEs of KHR_materials_specular ("Implementation":
f0 = min(f0_ior specularColor, 1) s, f90 = s, base weighted with the largest channel),
KHR_materials_clearcoat (`fresnel_coat`: mix(material, coat, clearcoat Fc(n·v)), coat ior 1.5),
KHR_materials_transmission and KHR_materials_volume (sigma = -ln(c) / d); Hecht, *Optics*, §4.6,
for the Fresnel equations; Snell's law.

Statistics: numpy Generators with fixed seeds; a mean passes within 3.3 of its standard errors
(3.3 sigma: about one false alarm in a thousand per check, rule of thumb) plus the stated
quadrature error.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate

from lampyr.engine.bsdf import (
    DIFFUSE,
    GLASS,
    bsdf_eval,
    bsdf_sample,
    has_delta_lobe,
    has_nonspecular_lobe,
    material_row,
    needs_outward_normal,
)
from lampyr.engine.pbr import pbr_absorption, pbr_row, pbr_thin_transmittance
from tests.engine.test_bsdf import _eval_many, _pdf_over_bins, _sample_many

GOLD = (1.0, 0.78, 0.34)  # a gold-ish base colour (rule of thumb, linear RGB)
WHITE = (1.0, 1.0, 1.0)


def direction(cos_theta, phi=0.3):
    s = math.sqrt(max(0.0, 1.0 - cos_theta * cos_theta))
    return s * math.cos(phi), s * math.sin(phi), cos_theta


# --------------------------------------------------------------------------- the formulas, again

def appendix_b(p, wo, wi):
    """f(wo, wi) per channel of a row from pbr_row's keywords `p`, both directions above the
    surface, written from the glTF 2.0 Appendix B and the extensions' READMEs (not from pbr.py).
    A smooth (roughness 0) layer or coat is a mirror: no function part (see `mirrors`)."""
    base = np.asarray(p.get("base", WHITE), float)
    metallic, roughness = p.get("metallic", 1.0), p.get("roughness", 1.0)
    ior, s = p.get("ior", 1.5), p.get("specular", 1.0)
    spec_color = np.asarray(p.get("specular_color", WHITE), float)
    cc, cc_rough = p.get("clearcoat", 0.0), p.get("clearcoat_roughness", 0.0)
    transmission = p.get("transmission", 0.0)
    wo, wi = np.asarray(wo, float), np.asarray(wi, float)
    nv, nl = wo[2], wi[2]
    h = (wo + wi) / np.linalg.norm(wo + wi)
    vh, nh = float(wo @ h), h[2]

    def microfacet(alpha):  # Appendix B, "Specular BRDF": ν D
        if alpha == 0.0:
            return 0.0
        a2 = alpha * alpha
        d = a2 / (math.pi * (nh * nh * (a2 - 1.0) + 1.0) ** 2)  # Trowbridge-Reitz / GGX
        # the height-correlated Smith visibility ν
        v = 1.0 / (2.0 * (nv * math.sqrt(a2 + (1 - a2) * nl * nl) + nl * math.sqrt(a2 + (1 - a2) * nv * nv)))
        return v * d

    def schlick(f0, f90, c):  # Appendix B, "Fresnel" (Schlick 1994)
        return f0 + (f90 - f0) * (1.0 - abs(c)) ** 5

    specular_brdf = microfacet(roughness ** 2)
    metal = schlick(base, 1.0, vh) * specular_brdf  # conductor_fresnel(f0 = baseColor)
    f0 = np.minimum(((ior - 1) / (ior + 1)) ** 2 * spec_color, 1.0) * s  # KHR_materials_specular
    layer = schlick(f0, s, vh) * specular_brdf
    # the discussion's coupling (1 - F(n·v))(1 - F(n·l)), with the largest channel (specular README)
    base_weight = (1 - schlick(f0, s, nv).max()) * (1 - schlick(f0, s, nl).max())
    dielectric = layer + base_weight * (1 - transmission) * base / math.pi  # transmission: not a function
    material = (1 - metallic) * dielectric + metallic * metal
    fc = schlick(0.04, 1.0, nv)  # fresnel_coat, ior 1.5, n·v
    return (1 - cc * fc) * material + cc * fc * microfacet(cc_rough ** 2)


def mirrors(p, cos_o):
    """Reflectance of the smooth (delta) specular layer and coat at cos θo, from the same
    formulas (the microfacet term of a smooth surface is a mirror of reflectance 1)."""
    base = np.asarray(p.get("base", WHITE), float)
    metallic, ior, s = p.get("metallic", 1.0), p.get("ior", 1.5), p.get("specular", 1.0)
    spec_color = np.asarray(p.get("specular_color", WHITE), float)
    cc = p.get("clearcoat", 0.0)
    w = (1 - cos_o) ** 5
    fc = 0.04 + 0.96 * w
    out = np.zeros(3)
    if p.get("roughness", 1.0) == 0.0:
        f0 = np.minimum(((ior - 1) / (ior + 1)) ** 2 * spec_color, 1.0) * s
        out += (1 - cc * fc) * ((1 - metallic) * (f0 + (s - f0) * w) + metallic * (base + (1 - base) * w))
    if cc > 0.0 and p.get("clearcoat_roughness", 0.0) == 0.0:
        out += cc * fc
    return out


def albedo_integral(p, cos_o):
    """∫ f(wo, wi) cos θi dωi over the upper hemisphere by scipy's adaptive quadrature
    (dblquad), per channel, plus the mirrors' reflectance."""
    wo = np.array(direction(cos_o, 0.0))

    def integrand(cos_i, phi, ch):
        s = math.sqrt(max(0.0, 1 - cos_i * cos_i))
        return appendix_b(p, wo, (s * math.cos(phi), s * math.sin(phi), cos_i))[ch] * cos_i

    out = mirrors(p, cos_o)
    for ch in range(3):
        # the lobes peak at the mirror direction φ = π: split there; symmetric in φ -> π
        out[ch] += 2.0 * integrate.dblquad(integrand, 0.0, math.pi, 0.0, 1.0, args=(ch,),
                                           epsabs=1e-7, epsrel=1e-7)[0]
    return out


def row(**p):
    return pbr_row(**p)


# --------------------------------------------------------------------------- the formulas

POINTWISE = [
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.5), id="dielectric-r0.5"),
    pytest.param(dict(base=GOLD, metallic=1.0, roughness=0.3), id="metal-r0.3"),
    pytest.param(dict(base=GOLD, metallic=0.4, roughness=0.8), id="mixed-r0.8"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.6, ior=1.8, specular=0.6,
                      specular_color=(1.0, 0.4, 2.5)), id="specular-ior"),
    pytest.param(dict(base=GOLD, metallic=0.2, roughness=0.7, clearcoat=0.8, clearcoat_roughness=0.3),
                 id="clearcoat"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.4, transmission=0.6), id="thin-transmission-0.6"),
]


@pytest.mark.parametrize("p", POINTWISE)
def test_eval_is_the_appendix_b_brdf(p):
    # pbr_eval against the formulas of the spec and the extensions, written out above
    rng = np.random.default_rng(20)
    wo, wi = random_upper(rng, 300), random_upper(rng, 300)
    got = _eval_many(row(**p), wo, wi)[:, :3]
    want = np.array([appendix_b(p, a, b) for a, b in zip(wo, wi)])
    np.testing.assert_allclose(got, want, rtol=1e-10)


def random_upper(rng, n):
    v = rng.normal(size=(n, 3))
    v /= np.linalg.norm(v, axis=1, keepdims=True)
    v[:, 2] = np.abs(v[:, 2])
    return v


# --------------------------------------------------------------------------- white furnace

FURNACE = [
    pytest.param(dict(base=WHITE, metallic=0.0, roughness=1.0), id="white-dielectric-r1"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.5), id="dielectric-r0.5"),
    pytest.param(dict(base=GOLD, metallic=1.0, roughness=0.3), id="metal-r0.3"),
    pytest.param(dict(base=GOLD, metallic=0.5, roughness=1.0), id="mixed-r1"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.0), id="dielectric-smooth"),
    pytest.param(dict(base=GOLD, metallic=1.0, roughness=0.0), id="metal-smooth"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.6, ior=1.8, specular=0.6,
                      specular_color=(1.0, 0.4, 2.5)), id="specular-ior"),
    pytest.param(dict(base=GOLD, metallic=0.3, roughness=0.7, clearcoat=1.0, clearcoat_roughness=0.4),
                 id="clearcoat"),
]


@pytest.mark.parametrize("cos_o", [1.0, 0.5, 0.15])
@pytest.mark.parametrize("p", FURNACE)
def test_white_furnace_matches_scipy_integration_of_appendix_b(p, cos_o):
    # the check: directional albedo (mean sample weight) = ∫ f cos dωi of the
    # Appendix B BRDF, integrated by scipy (dblquad, error target 1e-7 per channel)
    n = 200_000
    s = _sample_many(row(**p), *direction(cos_o, 0.0), np.random.default_rng(21).random((n, 3)))
    w = s[:, 3:6]
    se = w.std(axis=0) / math.sqrt(n)
    ref = albedo_integral(p, cos_o)
    assert np.all(np.abs(w.mean(axis=0) - ref) <= 3.3 * se + 1e-6), (w.mean(axis=0), ref, se)


# --------------------------------------------------------------------------- energy

def flux(p, wo, n, seed):
    """Sample weights (n, 3) with the radiance scaling of refraction undone (weight x eta² on
    entering a volume from outside), i.e. the fraction of flux each sample carries."""
    s = _sample_many(row(**p), *wo, np.random.default_rng(seed).random((n, 3)))
    w = s[:, 3:6].copy()
    if p.get("thickness", 0.0) > 0.0:
        w[s[:, 2] * wo[2] < 0.0] *= p.get("ior", 1.5) ** 2
    return w


ENERGY_VARIANTS = {
    "opaque": dict(),
    "thin-pane": dict(transmission=1.0),
    "clearcoat": dict(clearcoat=1.0, clearcoat_roughness=0.3),
    "thin-half-coated": dict(transmission=0.5, clearcoat=1.0, clearcoat_roughness=0.0),
    "volume": dict(transmission=1.0, thickness=1.0),
    "volume-half": dict(transmission=0.5, thickness=1.0),
}


@pytest.mark.parametrize("variant", list(ENERGY_VARIANTS))
@pytest.mark.parametrize("cos_o", [1.0, 0.5, 0.1, 0.02])
@pytest.mark.parametrize("roughness", [0.0, 0.1, 0.4, 1.0])
@pytest.mark.parametrize("metallic", [0.0, 1.0])
def test_white_material_does_not_create_energy(metallic, roughness, cos_o, variant):
    # a white surface in a white furnace returns at most what it receives (energy conservation;
    # the spec's Appendix B requires it of a physically based renderer)
    p = dict(base=WHITE, metallic=metallic, roughness=roughness, **ENERGY_VARIANTS[variant])
    w = flux(p, direction(cos_o), 40_000, seed=22)
    m = w.mean(axis=0)
    assert np.all(m <= 1.0 + 3.3 * w.std(axis=0) / math.sqrt(len(w)) + 1e-12), m


def test_smooth_gold_metal_at_normal_incidence_reflects_its_base_colour():
    # Schlick (1994): F(0°) = F0, and the metal's F0 is the base colour (Appendix B, "Metals")
    wix, wiy, wiz, wr, wg, wb, pdf, delta = bsdf_sample(row(base=GOLD, metallic=1.0, roughness=0.0),
                                                        0.0, 0.0, 1.0, 0.5, 0.5, 0.5)
    assert (wix, wiy, wiz) == (0.0, 0.0, 1.0)
    assert (wr, wg, wb) == pytest.approx(GOLD, rel=1e-14)
    assert delta and pdf == 0.0


def test_rough_white_dielectric_is_not_dark():
    # a rough white dielectric reflects most light: ~0.9 at normal view by the integral of
    # the Appendix B BRDF (scipy); a grey result would pass an upper bound alone
    p = dict(base=WHITE, metallic=0.0, roughness=1.0)
    w = flux(p, direction(1.0), 100_000, seed=23)
    ref = albedo_integral(p, 1.0)
    assert ref[0] > 0.85
    assert abs(w.mean() - ref[0]) <= 3.3 * w.std() / math.sqrt(len(w)) + 1e-6


# --------------------------------------------------------------------------- sampling against eval

def pdf_bins(m, wo, order=10):
    """∫ pdf over the bins of a (cos θ, φ) grid by Gauss-Legendre quadrature (test_bsdf's
    _pdf_over_bins), the cos θ range split where a volume's refraction lobe ends."""
    nodes, weights = np.polynomial.legendre.leggauss(order)
    breaks = np.zeros(0)
    if m[15] > 0.0 and m[14] > 0.0:  # M_THICKNESS, M_TRANSMISSION: a volume (as GLASS in test_bsdf)
        eta = m[5] if wo[2] > 0.0 else 1.0 / m[5]
        breaks = np.array([-wo[2] / eta])
    return _pdf_over_bins(m, *wo, N_COS, N_PHI, nodes, weights, breaks)


N_COS, N_PHI = 16, 32

SAMPLING = [
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.5), direction(0.7), id="dielectric-r0.5"),
    pytest.param(dict(base=GOLD, metallic=1.0, roughness=0.3), direction(0.3), id="metal-r0.3"),
    pytest.param(dict(base=GOLD, metallic=0.5, roughness=0.9), direction(0.9), id="mixed-r0.9"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.0, clearcoat=1.0, clearcoat_roughness=0.5),
                 direction(0.6), id="smooth-under-rough-coat"),
    pytest.param(dict(base=GOLD, metallic=0.2, roughness=0.6, transmission=0.5), direction(0.5),
                 id="thin-half-r0.6"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.5, transmission=1.0, thickness=1.0),
                 direction(0.7), id="volume-r0.5-out"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.6, transmission=0.5, thickness=1.0,
                      clearcoat=0.5, clearcoat_roughness=0.3), direction(0.4), id="volume-half-coated-out"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.7, transmission=1.0, thickness=1.0),
                 direction(-0.8), id="volume-r0.7-in"),
    pytest.param(dict(base=GOLD, metallic=0.3, roughness=1.0, transmission=1.0, thickness=1.0,
                      clearcoat=1.0, clearcoat_roughness=0.4), direction(-0.3), id="volume-r1-in-tir"),
]


@pytest.mark.parametrize("p, wo", SAMPLING)
def test_sampled_pdf_and_weight_are_eval_at_the_sampled_direction(p, wo):
    # pdf reported by sample = eval's pdf there; weight = f |cos| / pdf (bsdf.py's convention)
    m = row(**p)
    s = _sample_many(m, *wo, np.random.default_rng(24).random((3000, 3)))
    s = s[(s[:, 3:6].max(axis=1) > 0.0) & (s[:, 7] == 0.0)]
    assert len(s) > 500
    e = _eval_many(m, np.tile(wo, (len(s), 1)), s[:, :3])
    np.testing.assert_allclose(e[:, 3], s[:, 6], rtol=1e-9)
    np.testing.assert_allclose(e[:, :3] * np.abs(s[:, 2:3]) / e[:, 3:4], s[:, 3:6], rtol=1e-9)


@pytest.mark.parametrize("p, wo", SAMPLING)
def test_pdf_integrates_to_the_probability_of_the_non_delta_lobes(p, wo):
    # ∫ pdf dω = the fraction of samples from non-delta lobes (binomial standard error);
    # 1e-3 allows for the quadrature's own error on narrow lobes (as in test_bsdf)
    m = row(**p)
    n = 50_000
    s = _sample_many(m, *wo, np.random.default_rng(25).random((n, 3)))
    frac = np.mean((s[:, 3:6].max(axis=1) > 0.0) & (s[:, 7] == 0.0))
    total = pdf_bins(m, wo).sum()
    se = math.sqrt(max(total * (1.0 - total), 1e-12) / n)
    assert total <= 1.0 + 1e-3
    assert abs(frac - total) <= 3.3 * se + 1e-3


@pytest.mark.parametrize("p, wo", SAMPLING)
def test_sampled_directions_follow_the_evaluated_pdf(p, wo):
    # Pearson's chi-square of sampled directions against the binned pdf, significance 1e-3
    # (scipy.stats.chi2); delta samples and failures share one bin; bins expected < 5 pooled
    from scipy import stats

    m = row(**p)
    n = 100_000
    s = _sample_many(m, *wo, np.random.default_rng(26).random((n, 3)))
    ok = (s[:, 3:6].max(axis=1) > 0.0) & (s[:, 7] == 0.0)
    phi = np.mod(np.arctan2(s[ok, 1], s[ok, 0]), 2.0 * np.pi)
    obs, _, _ = np.histogram2d(s[ok, 2], phi, bins=[N_COS, N_PHI], range=[[-1.0, 1.0], [0.0, 2.0 * np.pi]])
    exp = n * pdf_bins(m, wo)
    obs = np.append(obs.ravel(), n - ok.sum())
    exp = np.append(exp.ravel(), max(0.0, n - exp.sum()))
    small = exp < 5.0
    obs = np.append(obs[~small], obs[small].sum())
    exp = np.append(exp[~small], exp[small].sum())
    if exp[-1] < 5.0:
        k = np.argmin(exp[:-1])
        obs[k] += obs[-1]
        exp[k] += exp[-1]
        obs, exp = obs[:-1], exp[:-1]
    assert stats.chi2.sf(np.sum((obs - exp) ** 2 / exp), len(exp) - 1) > 1e-3


# --------------------------------------------------------------------------- reciprocity

@pytest.mark.parametrize("p", [
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.5), id="dielectric"),
    pytest.param(dict(base=GOLD, metallic=1.0, roughness=0.3), id="metal"),
    pytest.param(dict(base=GOLD, metallic=0.4, roughness=0.8, ior=1.8, specular=0.6,
                      specular_color=(1.0, 0.4, 2.5)), id="mixed-specular"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.4, transmission=0.6), id="thin-transmissive"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.4, transmission=0.6, thickness=1.0),
                 id="volume-reflection"),
])
def test_reflection_is_reciprocal(p):
    # Helmholtz reciprocity f(wo, wi) = f(wi, wo) (e.g. Veach 1997 §6.2, from memory). The
    # clearcoat is left out: its README weights it by Fresnel at n·v only, not reciprocal.
    rng = np.random.default_rng(27)
    a, b = random_upper(rng, 500), random_upper(rng, 500)
    m = row(**p)
    fab, fba = _eval_many(m, a, b), _eval_many(m, b, a)
    assert np.all(fab[:, :3] > 0.0)
    np.testing.assert_allclose(fab[:, :3], fba[:, :3], rtol=1e-10)


@pytest.mark.parametrize("clearcoat", [0.0, 0.7])
def test_volume_transmission_obeys_the_generalised_reciprocity(clearcoat):
    # radiance-convention BTDF: f(wo, wi) / η_o² = f(wi, wo) / η_i² (Veach 1997 §5.2, from
    # memory); wo outside (η 1), wi inside (η = ior); the coat acts on the outside direction
    rng = np.random.default_rng(28)
    a, b = random_upper(rng, 2000), -random_upper(rng, 2000)
    m = row(base=GOLD, metallic=0.2, roughness=0.6, transmission=0.8, thickness=1.0, ior=1.4,
            clearcoat=clearcoat, clearcoat_roughness=0.3)
    fab, fba = _eval_many(m, a, b), _eval_many(m, b, a)
    live = fab[:, 0] > 0.0
    assert live.sum() > 100
    np.testing.assert_allclose(fab[live, :3], fba[live, :3] / 1.4 ** 2, rtol=1e-9, atol=1e-15)


# --------------------------------------------------------------------------- transmission

def hecht_reflectance(cos_i, n):
    """Unpolarised reflectance of an air | n interface from the Fresnel equations (Hecht,
    *Optics*, §4.6): r_s = (cos i - n cos t)/(cos i + n cos t), r_p = (n cos i - cos t)/(n cos i + cos t)."""
    sin_t = math.sqrt(1.0 - cos_i * cos_i) / n
    cos_t = math.sqrt(1.0 - sin_t * sin_t)
    rs = (cos_i - n * cos_t) / (cos_i + n * cos_t)
    rp = (n * cos_i - cos_t) / (n * cos_i + cos_t)
    return 0.5 * (rs * rs + rp * rp)


@pytest.mark.parametrize("n", [1.33, 1.5])
def test_thin_pane_at_normal_incidence_transmits_one_minus_fresnel(n):
    # Schlick's F0 = ((n - 1)/(n + 1))² is the Fresnel reflectance at normal incidence exactly
    # (Hecht §4.6), so the glTF thin-walled pane (one interface) transmits 1 - R to rounding
    m = row(base=WHITE, metallic=0.0, roughness=0.0, transmission=1.0, ior=n)
    assert pbr_thin_transmittance(m, 1.0) == pytest.approx((1 - hecht_reflectance(1.0, n),) * 3, abs=1e-12)


@pytest.mark.parametrize("theta_deg", [30.0, 45.0, 60.0, 75.0])
def test_thin_pane_at_oblique_incidence_transmits_one_minus_fresnel(theta_deg):
    # The spec's Fresnel is Schlick's approximation: for n = 1.5 it stays within 0.02 of the
    # exact Fresnel equations up to 75° (largest gap 0.0192 near 60°; 0.036 at 85°, computed
    # with numpy over 1e5 angles when this test was written), hence the tolerance 0.02
    c = math.cos(math.radians(theta_deg))
    m = row(base=WHITE, metallic=0.0, roughness=0.0, transmission=1.0, ior=1.5)
    assert pbr_thin_transmittance(m, c) == pytest.approx((1 - hecht_reflectance(c, 1.5),) * 3, abs=0.02)


@pytest.mark.parametrize("roughness", [0.0, 0.5])
@pytest.mark.parametrize("cos_o", [1.0, 0.6, 0.2])
def test_shadow_transmittance_is_what_the_straight_through_lobe_carries(roughness, cos_o):
    # the shadow ray's factor equals the expected weight of sampled straight-through paths
    # (binomial standard error: each such sample carries the same weight)
    m = row(base=GOLD, metallic=0.1, roughness=roughness, transmission=0.7, clearcoat=0.5)
    wo = direction(cos_o)
    n = 40_000
    s = _sample_many(m, *wo, np.random.default_rng(29).random((n, 3)))
    through = (s[:, 7] == 1.0) & np.all(np.isclose(s[:, :3], -np.array(wo), atol=1e-15), axis=1)
    assert through.sum() > 100
    w = s[through, 3:6][0]
    frac = through.mean()
    expected = np.array(pbr_thin_transmittance(m, cos_o))
    assert np.all(np.abs(w * frac - expected) <= 3.3 * w * math.sqrt(frac * (1 - frac) / n))


def test_thin_pane_reflects_and_transmits_everything():
    # a smooth white pane with transmission 1 has no diffuse part: each sample is the mirror
    # (weight F) or the straight-through path (weight 1 - F) over its probability; the flux
    # adds to 1 (R + T = 1 of a lossless interface, Hecht §4.6)
    w = flux(dict(base=WHITE, metallic=0.0, roughness=0.0, transmission=1.0), direction(0.5), 20_000, seed=30)
    assert abs(w.mean() - 1.0) <= 3.3 * w.std() / math.sqrt(len(w)) + 1e-12


@pytest.mark.parametrize("cos_o, n", [(0.8, 1.5), (0.3, 1.5), (0.5, 2.4), (-0.9, 1.5), (-0.8, 1.33)])
def test_volume_refracts_by_snells_law(cos_o, n):
    # n_o sin θo = n_i sin θi in the plane of incidence, on the other side of the surface
    # (Snell); the weight is the base colour over (n_i / n_o)² (radiance convention, bsdf.py)
    m = row(base=GOLD, metallic=0.0, roughness=0.0, transmission=1.0, thickness=1.0, ior=n)
    wo = np.array(direction(cos_o, 1.1))
    s = _sample_many(m, *wo, np.random.default_rng(31).random((400, 3)))
    t = s[(s[:, 2] * cos_o < 0.0) & (s[:, 3] > 0.0)]
    assert len(t) > 0
    n_o, n_i = (1.0, n) if cos_o > 0 else (n, 1.0)
    sin_o = math.sqrt(1 - cos_o * cos_o)
    np.testing.assert_allclose(np.hypot(t[:, 0], t[:, 1]) * n_i, n_o * sin_o, rtol=1e-12)
    np.testing.assert_allclose(t[:, 0] * wo[1] - t[:, 1] * wo[0], 0.0, atol=1e-12)  # same plane
    assert np.all(t[:, 0] * wo[0] + t[:, 1] * wo[1] < 0.0)  # continues across the normal
    np.testing.assert_allclose(t[:, 3:6], np.tile(np.array(GOLD) * (n_o / n_i) ** 2, (len(t), 1)), rtol=1e-12)


def test_absorption_is_beer_lambert():
    # KHR_materials_volume: sigma = -ln(c) / d_att, T = exp(-sigma d); c = (0.5, 0.25, 1),
    # d_att = 2, d = 1: (0.5^0.5, 0.25^0.5, 1) = (0.70710678..., 0.5, 1) by hand
    m = row(transmission=1.0, thickness=1.0, attenuation_color=(0.5, 0.25, 1.0), attenuation_distance=2.0)
    assert pbr_absorption(m, 1.0) == pytest.approx((1 / math.sqrt(2.0), 0.5, 1.0), rel=1e-14)
    assert pbr_absorption(m, 6.0) == pytest.approx((0.5 ** 3, 0.25 ** 3, 1.0), rel=1e-14)


def test_infinite_attenuation_distance_absorbs_nothing():
    # KHR_materials_volume: attenuationDistance defaults to +infinity, "no attenuation"
    m = row(transmission=1.0, thickness=1.0, attenuation_color=(0.5, 0.5, 0.5))
    assert pbr_absorption(m, 10.0) == (1.0, 1.0, 1.0)


# --------------------------------------------------------------------------- for the integrator

@pytest.mark.parametrize("p, nonspecular, delta, outward", [
    (dict(metallic=0.0, roughness=0.5), True, False, False),
    (dict(metallic=1.0, roughness=0.0), False, True, False),
    (dict(metallic=0.0, roughness=0.0), True, True, False),  # smooth layer over a diffuse base
    (dict(metallic=0.0, roughness=0.0, transmission=1.0), False, True, False),  # window pane
    (dict(metallic=0.0, roughness=0.5, transmission=1.0), True, True, False),  # rough pane: delta through
    (dict(metallic=0.0, roughness=0.0, transmission=1.0, thickness=1.0), False, True, True),
    (dict(metallic=0.0, roughness=0.5, transmission=1.0, thickness=1.0), True, False, True),
    (dict(metallic=1.0, roughness=0.5, clearcoat=1.0, clearcoat_roughness=0.0), True, True, False),
])
def test_lobe_kinds_tell_the_integrator_what_to_do(p, nonspecular, delta, outward):
    m = row(**p)
    assert has_nonspecular_lobe(m) == nonspecular
    assert has_delta_lobe(m) == delta
    assert needs_outward_normal(m) == outward


@pytest.mark.parametrize("kind, outward", [(DIFFUSE, False), (GLASS, True)])
def test_legacy_glass_still_wants_the_outward_normal(kind, outward):
    assert needs_outward_normal(material_row(kind, (0.5, 0.5, 0.5), 0.3)) == outward


@pytest.mark.parametrize("p", [
    dict(metallic=0.0, roughness=0.3),
    dict(metallic=0.0, roughness=0.3, transmission=1.0, thickness=1.0),
])
def test_opaque_and_volume_materials_block_shadow_rays(p):
    # only thin-walled surfaces let light straight through; a solid refracts it elsewhere
    assert pbr_thin_transmittance(row(**p), 0.7) == (0.0, 0.0, 0.0)


def test_opaque_pbr_does_not_transmit():
    m = row(base=GOLD, metallic=0.3, roughness=0.4)
    assert bsdf_eval(m, *direction(0.7), *direction(-0.5)) == (0.0, 0.0, 0.0, 0.0)


@pytest.mark.parametrize("p", [
    pytest.param(dict(base=(0.0, 0.0, 0.0), metallic=0.0, roughness=0.5), id="black"),
    pytest.param(dict(base=(0.0, 0.0, 0.0), metallic=1.0, roughness=0.5), id="black-metal"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.5, specular=0.0), id="no-specular"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.5, ior=0.0, specular_color=(0.3, 0.5, 0.9)),
                 id="ior0-spec-gloss"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.5, ior=0.0, transmission=1.0, thickness=1.0),
                 id="ior0-volume"),
    pytest.param(dict(base=GOLD, metallic=0.0, roughness=0.5, ior=1.0, transmission=1.0, thickness=1.0),
                 id="index-matched-volume"),
    pytest.param(dict(base=GOLD, metallic=1.0, roughness=0.3, transmission=1.0), id="metal-transmission"),
    pytest.param(dict(base=WHITE, metallic=0.0, roughness=0.0, clearcoat=1.0), id="full-smooth-coat"),
])
@pytest.mark.parametrize("cos_o", [1.0, 0.3, 1e-6, -0.5])
def test_edge_materials_give_finite_non_negative_results(p, cos_o):
    # rule of thumb: a BSDF never returns NaN, infinity or a negative weight, whatever the row
    m = row(**p)
    wo = direction(cos_o)
    s = _sample_many(m, *wo, np.random.default_rng(32).random((2000, 3)))
    wi = random_upper(np.random.default_rng(33), 2000)
    wi[1::2, 2] *= -1.0  # both sides of the surface
    e = _eval_many(m, np.tile(wo, (2000, 1)), wi)
    assert np.all(np.isfinite(s)) and np.all(s[:, 3:7] >= 0.0)
    assert np.all(np.isfinite(e)) and np.all(e >= 0.0)
