"""Fresnel reflectance and Snell's law against optics, written out independently here.

Reference: the Fresnel equations in the angle form of Hecht, *Optics* (section numbers cited
below are from memory):
    r_s = -sin(θi - θt) / sin(θi + θt),     r_p = tan(θi - θt) / tan(θi + θt),
with θt from Snell's law n1 sin θi = n2 sin θt. The engine uses the cosine form instead.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

from lampyr.engine.bsdf import GLASS, bsdf_sample, material_row
from lampyr.engine.fresnel import (
    diffuse_fresnel,
    fresnel_dielectric,
    fresnel_dielectric_sp,
    fresnel_schlick,
    refract_cos,
)

N_GLASS = 1.5


def hecht_rs_rp(theta_i, n1, n2):
    """(Rs, Rp) from Hecht's angle form; (1, 1) past the critical angle."""
    s = n1 / n2 * math.sin(theta_i)
    if s >= 1.0:
        return 1.0, 1.0
    theta_t = math.asin(s)
    if theta_i == 0.0:  # the limit of both ratios at normal incidence
        r = (n1 - n2) / (n1 + n2)
        return r * r, r * r
    rs = -math.sin(theta_i - theta_t) / math.sin(theta_i + theta_t)
    rp = math.tan(theta_i - theta_t) / math.tan(theta_i + theta_t)
    return rs * rs, rp * rp


def test_normal_incidence_reflects_four_percent():
    # ((n - 1) / (n + 1))² = 0.04 for n = 1.5 (Hecht §4.6; the familiar 4 % of window glass)
    assert fresnel_dielectric(1.0, N_GLASS) == pytest.approx(0.04, abs=1e-15)
    assert fresnel_dielectric_sp(1.0, 1.0, N_GLASS) == pytest.approx((0.04, 0.04), abs=1e-15)


def test_normal_incidence_is_the_same_from_inside():
    # the normal-incidence reflectance is symmetric in n1, n2 (Hecht §4.6)
    assert fresnel_dielectric(1.0, 1.0 / N_GLASS) == pytest.approx(0.04, abs=1e-15)


@pytest.mark.parametrize("n1, n2", [(1.0, 1.5), (1.0, 1.33), (1.0, 2.4), (1.5, 1.0)])
def test_p_polarisation_vanishes_at_brewsters_angle(n1, n2):
    # Brewster's angle tan θB = n2 / n1 (Hecht §8.6)
    theta_b = math.atan2(n2, n1)
    rs, rp = fresnel_dielectric_sp(math.cos(theta_b), n1, n2)
    assert rp < 1e-28
    assert rs > 0.01


@pytest.mark.parametrize("theta_deg", [41.9, 45.0, 60.0, 80.0, 89.9])
def test_total_internal_reflection_past_the_critical_angle(theta_deg):
    # critical angle asin(1/1.5) = 41.81° from inside the glass (Hecht §4.7)
    assert math.radians(theta_deg) > math.asin(1.0 / N_GLASS)
    cos_i = math.cos(math.radians(theta_deg))
    assert fresnel_dielectric(cos_i, 1.0 / N_GLASS) == 1.0
    assert fresnel_dielectric_sp(cos_i, N_GLASS, 1.0) == (1.0, 1.0)
    assert refract_cos(cos_i, 1.0 / N_GLASS) < 0.0


def test_just_below_the_critical_angle_light_is_transmitted():
    theta = math.asin(1.0 / N_GLASS) - 1e-3
    assert fresnel_dielectric(math.cos(theta), 1.0 / N_GLASS) < 1.0


@pytest.mark.parametrize("n1, n2", [(1.0, 1.5), (1.5, 1.0), (1.0, 1.33), (1.0, 2.4), (2.4, 1.0)])
def test_polarised_reflectance_matches_hechts_angle_form(n1, n2):
    thetas = np.radians(np.linspace(0.0, 89.9, 300))
    got = np.array([fresnel_dielectric_sp(math.cos(t), n1, n2) for t in thetas])
    ref = np.array([hecht_rs_rp(t, n1, n2) for t in thetas])
    np.testing.assert_allclose(got, ref, rtol=1e-10, atol=1e-14)


@pytest.mark.parametrize("eta", [1.5, 1.0 / 1.5, 1.33, 2.4])
def test_unpolarised_reflectance_is_the_mean_of_rs_and_rp(eta):
    # natural light is an equal incoherent mix of s and p (Hecht §8.6)
    for t in np.radians(np.linspace(0.0, 89.9, 50)):
        rs, rp = hecht_rs_rp(t, 1.0, eta)
        assert fresnel_dielectric(math.cos(t), eta) == pytest.approx(0.5 * (rs + rp), rel=1e-10, abs=1e-14)


@pytest.mark.parametrize("n", [1.33, 1.5, 2.4])
def test_abeles_relation_at_45_degrees(n):
    # Abelès: at 45° incidence r_p = r_s² for any index (from memory), so Rp = Rs²
    rs, rp = fresnel_dielectric_sp(math.cos(math.radians(45.0)), 1.0, n)
    assert rp == pytest.approx(rs * rs, rel=1e-12)


def test_reflectance_at_45_degrees_against_the_handbook_value():
    # n = 1.5, 45°: Rs = 0.0920, Rp = 0.0085 (commonly tabulated values, from memory)
    rs, rp = fresnel_dielectric_sp(math.cos(math.radians(45.0)), 1.0, 1.5)
    assert rs == pytest.approx(0.0920, abs=5e-5)
    assert rp == pytest.approx(0.0085, abs=5e-5)


@pytest.mark.parametrize("eta", [1.5, 1.0 / 1.5, 1.33])
def test_snell_law_for_the_refracted_cosine(eta):
    # n1 sin θ1 = n2 sin θ2 with eta = n2 / n1 (Snell)
    for t in np.radians(np.linspace(0.0, 40.0, 20)):
        cos_t = refract_cos(math.cos(t), eta)
        assert math.sqrt(1.0 - cos_t * cos_t) * eta == pytest.approx(math.sin(t), rel=1e-12, abs=1e-15)


@pytest.mark.parametrize("eta", [1.0002, 1.01, 1.33, 1.5, 2.4, 4.0, 1 / 1.33, 1 / 1.5, 1 / 2.4])
def test_hemispherical_reflectance_matches_quadrature(eta):
    # definition: F_dr = ∫ R(θ) 2 cos θ sin θ dθ over the hemisphere, here by scipy quadrature
    # of the independent Hecht form
    crit = math.asin(min(1.0, eta)) if eta < 1.0 else math.pi / 2
    ref = integrate.quad(lambda t: 0.5 * sum(hecht_rs_rp(t, 1.0, eta)) * math.sin(2 * t),
                         0.0, math.pi / 2, points=[crit], epsabs=1e-14, epsrel=1e-12, limit=200)[0]
    assert diffuse_fresnel(eta) == pytest.approx(ref, rel=2e-6)


def test_hemispherical_reflectance_of_glass_from_outside_and_inside():
    # n = 1.5: about 9.2 % from outside, 59.6 % from inside (from memory; the internal value
    # follows from 1 - F_int = (1 - F_ext) / n²)
    assert diffuse_fresnel(1.5) == pytest.approx(0.0918, abs=1e-4)
    assert diffuse_fresnel(1 / 1.5) == pytest.approx(0.5963, abs=1e-4)


def test_index_matched_interface_reflects_nothing():
    assert diffuse_fresnel(1.0) == 0.0
    assert fresnel_dielectric(0.3, 1.0) < 1e-30


@pytest.mark.parametrize("f0", [0.04, 0.56, 0.95])
def test_schlick_hits_f0_at_normal_incidence_and_one_at_grazing(f0):
    # Schlick 1994: F(0°) = F0, F(90°) = 1
    assert fresnel_schlick(1.0, f0) == f0
    assert fresnel_schlick(0.0, f0) == 1.0


# --------------------------------------------------------------------------- smooth glass

SMOOTH_GLASS = material_row(GLASS, (1.0, 1.0, 1.0), 0.0, N_GLASS, (0.0, 0.0, 0.0))


def _wo(theta_deg, phi, inside):
    t = math.radians(theta_deg)
    z = math.cos(t)
    return math.sin(t) * math.cos(phi), math.sin(t) * math.sin(phi), -z if inside else z


@pytest.mark.parametrize("inside", [False, True])
@pytest.mark.parametrize("theta_deg", [0.0, 10.0, 30.0, 41.0, 60.0, 85.0])
def test_smooth_glass_refracts_by_snells_law(theta_deg, inside):
    wo = _wo(theta_deg, 0.7, inside)
    n1, n2 = (N_GLASS, 1.0) if inside else (1.0, N_GLASS)
    us = np.linspace(0.0, 0.999, 40)
    refracted = 0
    for u0 in us:
        wi = bsdf_sample(SMOOTH_GLASS, *wo, u0, 0.5, 0.5)[:3]
        if wi[2] * wo[2] >= 0.0:
            continue
        refracted += 1
        sin_1 = math.hypot(wo[0], wo[1])
        sin_2 = math.hypot(wi[0], wi[1])
        assert n1 * sin_1 == pytest.approx(n2 * sin_2, abs=1e-12)  # Snell
        assert np.linalg.det(np.array([wo, wi, (0.0, 0.0, 1.0)])) == pytest.approx(0.0, abs=1e-12)  # plane of incidence
        assert wo[0] * wi[0] + wo[1] * wi[1] <= 1e-15  # continues across the normal
        assert np.linalg.norm(wi) == pytest.approx(1.0, abs=1e-14)
    # the lobe is chosen as u0 < R: refraction exactly for the u0 >= R (none under total
    # internal reflection, past 41.8° from inside)
    assert refracted == np.sum(us >= 0.5 * sum(hecht_rs_rp(math.radians(theta_deg), n1, n2)))
    assert refracted > 0 or (inside and theta_deg > 41.8)


@pytest.mark.parametrize("inside", [False, True])
def test_smooth_glass_reflects_in_the_mirror_direction(inside):
    wo = _wo(35.0, 2.0, inside)
    for u0 in np.linspace(0.0, 0.999, 200):
        wi = bsdf_sample(SMOOTH_GLASS, *wo, u0, 0.5, 0.5)[:3]
        if wi[2] * wo[2] > 0.0:
            assert wi == pytest.approx((-wo[0], -wo[1], wo[2]), abs=1e-15)


@pytest.mark.parametrize("theta_deg, inside", [(0.0, False), (60.0, False), (80.0, False),
                                                (30.0, True), (40.0, True)])
def test_smooth_glass_reflects_with_the_fresnel_probability(theta_deg, inside):
    # the fraction of reflected samples is binomial with p = R from Hecht's equations
    n1, n2 = (N_GLASS, 1.0) if inside else (1.0, N_GLASS)
    r = 0.5 * sum(hecht_rs_rp(math.radians(theta_deg), n1, n2))
    wo = _wo(theta_deg, 0.2, inside)
    rng = np.random.default_rng(12)
    n = 20_000
    k = sum(bsdf_sample(SMOOTH_GLASS, *wo, u, 0.5, 0.5)[2] * wo[2] > 0.0 for u in rng.random(n))
    assert stats.binomtest(int(k), n, r).pvalue > 1e-3
