"""The GGX distribution and its Smith masking against the identities that define them."""

from __future__ import annotations

import math

import pytest
from scipy import integrate

from lampyr.engine.microfacet import ggx_d, ggx_g1, ggx_g2, ggx_lambda, ggx_vndf_pdf


@pytest.mark.parametrize("alpha", [0.1, 0.3, 0.7, 1.0])
def test_ndf_projects_to_the_unit_area(alpha):
    # normalisation of any microfacet distribution: ∫ D(h) cos θh dω_h = 1
    # (Walter et al. 2007, §3.1; also Heitz 2014, eq. 4 — equation numbers from memory)
    val = integrate.quad(lambda c: 2.0 * math.pi * ggx_d(c, alpha) * c, 0.0, 1.0,
                         points=[1.0 - alpha * alpha], epsabs=1e-12, limit=200)[0]
    assert val == pytest.approx(1.0, abs=1e-8)


@pytest.mark.parametrize("alpha", [0.2, 0.5, 1.0])
@pytest.mark.parametrize("theta_deg", [0.0, 30.0, 60.0, 85.0])
def test_visible_normals_project_to_the_macro_surface(alpha, theta_deg):
    # Smith's G1 is defined by G1(wo) ∫ max(0, wo·h) D(h) dω_h = cos θo: the visible
    # microfacets project onto the same area as the macro-surface (Heitz 2014, §2-3).
    # The same statement: the visible-normal density integrates to one.
    t = math.radians(theta_deg)
    wox, woz = math.sin(t), math.cos(t)

    def inner(hz):
        s = math.sqrt(max(0.0, 1.0 - hz * hz))
        return integrate.quad(lambda phi: ggx_vndf_pdf(wox, 0.0, woz, s * math.cos(phi), s * math.sin(phi), hz, alpha),
                              0.0, 2.0 * math.pi, epsabs=1e-11, limit=200)[0]

    val = integrate.quad(inner, 0.0, 1.0, epsabs=1e-9, limit=200)[0]
    assert val == pytest.approx(1.0, abs=2e-6)


@pytest.mark.parametrize("alpha", [0.1, 0.5, 1.0])
def test_lambda_matches_the_ggx_closed_form(alpha):
    # Λ = (-1 + sqrt(1 + 1/a²)) / 2 with a = 1 / (α tan θ) (Heitz 2014, §5.3; Walter 2007 eq. 34)
    for theta_deg in (1.0, 30.0, 60.0, 89.0):
        t = math.radians(theta_deg)
        a = 1.0 / (alpha * math.tan(t))
        ref = 0.5 * (-1.0 + math.sqrt(1.0 + 1.0 / (a * a)))
        assert ggx_lambda(math.cos(t), alpha) == pytest.approx(ref, rel=1e-12)


def test_masking_is_one_at_normal_incidence_and_zero_at_grazing():
    # a surface seen head-on hides none of its facets; at grazing it hides all (Smith)
    assert ggx_g1(1.0, 0.5) == 1.0
    assert ggx_g1(0.0, 0.5) == 0.0


@pytest.mark.parametrize("alpha", [0.1, 0.5, 1.0])
def test_height_correlated_shadowing_is_below_both_maskings(alpha):
    # Heitz 2014 §6: G2 = 1 / (1 + Λo + Λi) <= min(G1(wo), G1(wi)), and symmetric
    for co, ci in ((0.9, 0.2), (0.5, 0.5), (0.1, 0.99)):
        g2 = ggx_g2(co, ci, alpha)
        assert g2 <= min(ggx_g1(co, alpha), ggx_g1(ci, alpha))
        assert g2 == pytest.approx(ggx_g2(ci, co, alpha), rel=1e-15)
