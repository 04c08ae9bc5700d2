"""Materials: sampling against evaluation, energy conservation, reciprocity, the table row and
the shading frame.

Statistics: every random number comes from numpy's Generator with a fixed seed; a
goodness-of-fit test passes at significance 1e-3 (Pearson's chi-square, scipy.stats.chi2),
a mean passes within 3 of its own standard errors. Section numbers of Veach's thesis
(Veach 1997, "Robust Monte Carlo methods for light transport simulation") are from memory.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from numba import njit
from scipy import stats

from lampyr.engine.material_table import (
    M_ALPHA, M_ALPHA_MODE, M_ATTEN_DIST, M_METALLIC, M_SPECULAR, TEXTURE_COLUMNS,
)
from lampyr.engine.bsdf import (
    DIFFUSE,
    GLASS,
    MATERIAL_SIZE,
    METAL,
    PLASTIC,
    bsdf_eval,
    bsdf_sample,
    build_frame,
    has_delta_lobe,
    has_nonspecular_lobe,
    material_row,
    to_local,
    to_world,
)

IOR = 1.5
TINT = (0.9, 0.6, 0.3)
WHITE = (1.0, 1.0, 1.0)


def mat(kind, roughness, color=TINT, ior=IOR):
    return material_row(kind, color, roughness, ior, (0.0, 0.0, 0.0))


def direction(cos_theta, phi=0.3):
    """Unit vector with the given cos θ (its sign picks the side) and azimuth."""
    s = math.sqrt(max(0.0, 1.0 - cos_theta * cos_theta))
    return s * math.cos(phi), s * math.sin(phi), cos_theta


@njit(cache=True)
def _sample_many(params, wox, woy, woz, u):
    """bsdf_sample for each row of u: (n, 3) -> (n, 8) [wi xyz, weight rgb, pdf, is_delta]."""
    out = np.empty((u.shape[0], 8))
    for k in range(u.shape[0]):
        wix, wiy, wiz, wr, wg, wb, pdf, delta = bsdf_sample(params, wox, woy, woz, u[k, 0], u[k, 1], u[k, 2])
        out[k, 0], out[k, 1], out[k, 2] = wix, wiy, wiz
        out[k, 3], out[k, 4], out[k, 5] = wr, wg, wb
        out[k, 6] = pdf
        out[k, 7] = 1.0 if delta else 0.0
    return out


@njit(cache=True)
def _eval_many(params, wo, wi):
    """bsdf_eval for each pair of rows of wo, wi: (n, 3) -> (n, 4) [f rgb, pdf]."""
    out = np.empty((wo.shape[0], 4))
    for k in range(wo.shape[0]):
        fr, fg, fb, pdf = bsdf_eval(params, wo[k, 0], wo[k, 1], wo[k, 2], wi[k, 0], wi[k, 1], wi[k, 2])
        out[k, 0], out[k, 1], out[k, 2], out[k, 3] = fr, fg, fb, pdf
    return out


@njit(cache=True)
def _pdf_over_bins(params, wox, woy, woz, n_cos, n_phi, nodes, weights, breaks):
    """∫ pdf dω over each bin of a (cos θ in [-1, 1]) × (φ in [0, 2π)) grid, by tensor
    Gauss-Legendre quadrature (nodes, weights on [-1, 1]) inside every bin, each bin's cos θ
    range split at the given `breaks` (where the pdf jumps): (n_cos, n_phi)."""
    out = np.zeros((n_cos, n_phi))
    dc = 2.0 / n_cos
    dp = 2.0 * np.pi / n_phi
    for i in range(n_cos):
        lo = -1.0 + dc * i
        hi = lo + dc
        cuts = [lo]
        for c in breaks:
            if lo < c < hi:
                cuts.append(c)
        cuts.append(hi)
        for j in range(n_phi):
            acc = 0.0
            for piece in range(len(cuts) - 1):
                c0, c1 = cuts[piece], cuts[piece + 1]
                for a in range(nodes.shape[0]):
                    c = c0 + (c1 - c0) * 0.5 * (nodes[a] + 1.0)
                    s = np.sqrt(max(0.0, 1.0 - c * c))
                    for b in range(nodes.shape[0]):
                        phi = dp * (j + 0.5 * (nodes[b] + 1.0))
                        pdf = bsdf_eval(params, wox, woy, woz, s * np.cos(phi), s * np.sin(phi), c)[3]
                        acc += weights[a] * weights[b] * pdf * 0.5 * (c1 - c0)
            out[i, j] = acc * 0.5 * dp
    return out


N_COS, N_PHI = 16, 32


def pdf_bins(params, wo, order=10):
    nodes, weights = np.polynomial.legendre.leggauss(order)
    breaks = np.zeros(0)
    if params[0] == GLASS:
        # rough transmission: the refraction half vector h ∝ -(wo + eta wi) reaches the horizon
        # (where the distribution of normals ends abruptly) on the circle wi.z = -wo.z / eta
        eta = params[5] if wo[2] > 0.0 else 1.0 / params[5]
        breaks = np.array([-wo[2] / eta])
    return _pdf_over_bins(params, *wo, N_COS, N_PHI, nodes, weights, breaks)


def chi_square_pvalue(params, wo, n, seed):
    """Pearson's test of bsdf_sample's directions against bsdf_eval's pdf. Delta-lobe samples
    and failures share one extra bin, expected n (1 - ∫ pdf); bins expected below 5 are pooled
    (rule of thumb for the chi-square approximation)."""
    rng = np.random.default_rng(seed)
    s = _sample_many(params, *wo, rng.random((n, 3)))
    ok = (s[:, 3:6].max(axis=1) > 0.0) & (s[:, 7] == 0.0)
    phi = np.mod(np.arctan2(s[ok, 1], s[ok, 0]), 2.0 * np.pi)
    obs, _, _ = np.histogram2d(s[ok, 2], phi, bins=[N_COS, N_PHI], range=[[-1.0, 1.0], [0.0, 2.0 * np.pi]])
    exp = n * pdf_bins(params, wo)
    obs = np.append(obs.ravel(), n - ok.sum())
    exp = np.append(exp.ravel(), max(0.0, n - exp.sum()))
    small = exp < 5.0
    obs = np.append(obs[~small], obs[small].sum())
    exp = np.append(exp[~small], exp[small].sum())
    if exp[-1] < 5.0:  # fold a still-small pool into the smallest regular bin
        k = np.argmin(exp[:-1])
        obs[k] += obs[-1]
        exp[k] += exp[-1]
        obs, exp = obs[:-1], exp[:-1]
    stat = np.sum((obs - exp) ** 2 / exp)
    return stats.chi2.sf(stat, len(exp) - 1)


# (material, wo): every material with a non-delta lobe, several roughnesses and incidences,
# glass from both sides (inside past the critical angle too: cos 0.5 < cos 41.8°)
FIT_CASES = [
    pytest.param(mat(DIFFUSE, 0.0), direction(0.8), id="diffuse-0.8"),
    pytest.param(mat(DIFFUSE, 0.0), direction(0.2), id="diffuse-0.2"),
    pytest.param(mat(METAL, 0.3), direction(0.9), id="metal-r0.3-0.9"),
    pytest.param(mat(METAL, 0.3), direction(0.3), id="metal-r0.3-0.3"),
    pytest.param(mat(METAL, 0.6), direction(0.7), id="metal-r0.6-0.7"),
    pytest.param(mat(METAL, 1.0), direction(0.2), id="metal-r1-0.2"),
    pytest.param(mat(GLASS, 0.3), direction(0.7), id="glass-r0.3-out0.7"),
    pytest.param(mat(GLASS, 0.6), direction(0.3), id="glass-r0.6-out0.3"),
    pytest.param(mat(GLASS, 1.0), direction(0.9), id="glass-r1-out0.9"),
    pytest.param(mat(GLASS, 0.3), direction(-0.9), id="glass-r0.3-in0.9"),
    pytest.param(mat(GLASS, 0.6), direction(-0.5), id="glass-r0.6-in0.5"),
    pytest.param(mat(GLASS, 1.0), direction(-0.3), id="glass-r1-in0.3"),
    pytest.param(mat(PLASTIC, 0.0), direction(0.8), id="plastic-smooth-0.8"),
    pytest.param(mat(PLASTIC, 0.0), direction(0.2), id="plastic-smooth-0.2"),
    pytest.param(mat(PLASTIC, 0.3), direction(0.8), id="plastic-r0.3-0.8"),
    pytest.param(mat(PLASTIC, 0.7), direction(0.3), id="plastic-r0.7-0.3"),
]


@pytest.mark.parametrize("params, wo", FIT_CASES)
def test_sampled_directions_follow_the_evaluated_pdf(params, wo):
    assert chi_square_pvalue(params, wo, 100_000, seed=1) > 1e-3


@pytest.mark.parametrize("params, wo", FIT_CASES)
def test_pdf_integrates_to_at_most_one(params, wo):
    # a density over directions plus the discrete probability of delta lobes and failures;
    # 1e-3 allows for the quadrature's own error on the narrow lobes
    assert pdf_bins(params, wo).sum() <= 1.0 + 1e-3


@pytest.mark.parametrize("wo", [direction(0.9), direction(0.1)])
def test_lambert_pdf_integrates_to_exactly_one(wo):
    # cosine-weighted sampling never fails: ∫ cos θ / π dω = 1
    assert pdf_bins(mat(DIFFUSE, 0.0), wo).sum() == pytest.approx(1.0, abs=1e-12)


@pytest.mark.parametrize("params, wo", FIT_CASES)
def test_pdf_integral_is_the_fraction_of_continuous_samples(params, wo):
    n = 50_000
    s = _sample_many(params, *wo, np.random.default_rng(2).random((n, 3)))
    frac = np.mean((s[:, 3:6].max(axis=1) > 0.0) & (s[:, 7] == 0.0))
    p = pdf_bins(params, wo).sum()
    se = math.sqrt(max(p * (1.0 - p), 1e-12) / n)  # binomial standard error
    assert abs(frac - p) <= 3.3 * se + 1e-3  # 1e-3: quadrature error as above


# --------------------------------------------------------------------------- energy

def flux_weights(params, wo, n, seed):
    """Sampled weights of a white material with transmission's radiance scaling undone
    (weight × (η_i / η_o)²), i.e. the fraction of flux each sample carries."""
    s = _sample_many(params, *wo, np.random.default_rng(seed).random((n, 3)))
    w = s[:, 3].copy()
    if params[0] == GLASS:
        eta = params[5] if wo[2] > 0.0 else 1.0 / params[5]
        w[s[:, 2] * wo[2] < 0.0] *= eta * eta
    return w


@pytest.mark.parametrize("roughness", [0.0, 0.2, 0.5, 1.0])
@pytest.mark.parametrize("cos_o", [1.0, 0.5, 0.1])
@pytest.mark.parametrize("kind", [METAL, PLASTIC])
def test_white_furnace_opaque_does_not_create_energy(kind, roughness, cos_o):
    w = flux_weights(mat(kind, roughness, WHITE), direction(cos_o), 50_000, seed=3)
    assert w.mean() <= 1.0 + 3.0 * w.std() / math.sqrt(len(w)) + 1e-12


@pytest.mark.parametrize("roughness", [0.0, 0.2, 0.5, 1.0])
@pytest.mark.parametrize("cos_o", [1.0, 0.5, 0.1, -1.0, -0.5, -0.1])
def test_white_furnace_glass_does_not_create_flux(roughness, cos_o):
    w = flux_weights(mat(GLASS, roughness, WHITE), direction(cos_o), 50_000, seed=4)
    assert w.mean() <= 1.0 + 3.0 * w.std() / math.sqrt(len(w)) + 1e-12


@pytest.mark.parametrize("cos_o", [1.0, 0.5, 0.1])
def test_lambert_weight_is_the_albedo_for_every_sample(cos_o):
    # f cos / pdf = (ρ/π) cos / (cos/π) = ρ exactly (furnace identity of a Lambertian surface)
    s = _sample_many(mat(DIFFUSE, 0.0, WHITE), *direction(cos_o), np.random.default_rng(5).random((2000, 3)))
    assert np.all(s[:, 3:6] == 1.0)


@pytest.mark.parametrize("cos_o", [1.0, 0.5, 0.1, -1.0, -0.5, -0.9, -0.1])
def test_smooth_white_glass_reflects_and_transmits_everything(cos_o):
    # R + T = 1 for a lossless interface: every reflected sample carries 1, every transmitted
    # one 1 / eta² of radiance, i.e. flux 1 (Veach 1997 §5.2 for the η² law)
    w = flux_weights(mat(GLASS, 0.0, WHITE), direction(cos_o), 5000, seed=6)
    np.testing.assert_allclose(w, 1.0, rtol=1e-14)


@pytest.mark.parametrize("cos_o, eta", [(0.8, IOR), (-0.9, 1.0 / IOR)])
def test_transmission_scales_radiance_by_inverse_eta_squared(cos_o, eta):
    # radiance entering a denser medium is compressed into a narrower cone: L_t = T L_i η_t²/η_i²,
    # so the camera-side weight is T / eta² (Veach 1997, PhD thesis §5.2)
    s = _sample_many(mat(GLASS, 0.0), *direction(cos_o), np.random.default_rng(7).random((500, 3)))
    t = s[s[:, 2] * cos_o < 0.0]
    assert len(t) > 0
    np.testing.assert_allclose(t[:, 3:6], np.broadcast_to(np.array(TINT) / eta ** 2, t[:, 3:6].shape), rtol=1e-14)


@pytest.mark.parametrize("cos_o", [1.0, 0.5, 0.1])
def test_smooth_white_plastic_conserves_energy_exactly(cos_o):
    # the model of lobes.py: F(θo) + (1 - F(θo)) ρ (1 - F_dr,int) / (1 - ρ F_dr,int) = 1 at ρ = 1
    w = flux_weights(mat(PLASTIC, 0.0, WHITE), direction(cos_o), 50_000, seed=8)
    assert abs(w.mean() - 1.0) <= 3.0 * w.std() / math.sqrt(len(w)) + 1e-12


# --------------------------------------------------------------------------- consistency

CONSISTENCY_CASES = [
    pytest.param(mat(DIFFUSE, 0.0), direction(0.6), id="diffuse"),
    pytest.param(mat(METAL, 0.2), direction(0.6), id="metal-r0.2"),
    pytest.param(mat(METAL, 1.0), direction(0.1), id="metal-r1"),
    pytest.param(mat(GLASS, 0.2), direction(0.6), id="glass-r0.2-out"),
    pytest.param(mat(GLASS, 0.7), direction(-0.8), id="glass-r0.7-in"),
    pytest.param(mat(GLASS, 1.0), direction(-0.3), id="glass-r1-in-tir"),
    pytest.param(mat(PLASTIC, 0.0), direction(0.6), id="plastic-smooth"),
    pytest.param(mat(PLASTIC, 0.2), direction(0.6), id="plastic-r0.2"),
    pytest.param(mat(PLASTIC, 0.8), direction(0.2), id="plastic-r0.8"),
]


@pytest.mark.parametrize("params, wo", CONSISTENCY_CASES)
def test_sample_weight_equals_evaluated_f_cos_over_pdf(params, wo):
    s = _sample_many(params, *wo, np.random.default_rng(9).random((2000, 3)))
    s = s[(s[:, 3:6].max(axis=1) > 0.0) & (s[:, 7] == 0.0)]
    assert len(s) > 1000
    e = _eval_many(params, np.tile(wo, (len(s), 1)), s[:, :3])
    np.testing.assert_allclose(e[:, 3], s[:, 6], rtol=1e-7)
    np.testing.assert_allclose(e[:, :3] * np.abs(s[:, 2:3]) / e[:, 3:4], s[:, 3:6], rtol=1e-7)


def random_upper(rng, n):
    v = rng.normal(size=(n, 3))
    v /= np.linalg.norm(v, axis=1, keepdims=True)
    v[:, 2] = np.abs(v[:, 2])
    return v


@pytest.mark.parametrize("params", [
    pytest.param(mat(DIFFUSE, 0.0), id="diffuse"),
    pytest.param(mat(METAL, 0.2), id="metal-r0.2"),
    pytest.param(mat(METAL, 0.7), id="metal-r0.7"),
    pytest.param(mat(PLASTIC, 0.0), id="plastic-smooth"),
    pytest.param(mat(PLASTIC, 0.3), id="plastic-r0.3"),
    pytest.param(mat(PLASTIC, 1.0), id="plastic-r1"),
    pytest.param(mat(GLASS, 0.4), id="glass-r0.4-reflection"),
])
def test_reflection_is_reciprocal(params):
    # Helmholtz reciprocity f(wo, wi) = f(wi, wo) (e.g. Veach 1997 §6.2)
    rng = np.random.default_rng(10)
    a, b = random_upper(rng, 500), random_upper(rng, 500)
    fab, fba = _eval_many(params, a, b), _eval_many(params, b, a)
    assert np.all(fab[:, :3] > 0.0)
    np.testing.assert_allclose(fab[:, :3], fba[:, :3], rtol=1e-10)


@pytest.mark.parametrize("roughness", [0.3, 1.0])
def test_rough_transmission_obeys_the_generalised_reciprocity(roughness):
    # for radiance-convention BTDFs f(wo, wi) / η_o² = f(wi, wo) / η_i² (Veach 1997 §5.2,
    # from memory); wo outside (η = 1), wi inside (η = ior)
    rng = np.random.default_rng(11)
    a, b = random_upper(rng, 2000), -random_upper(rng, 2000)
    p = mat(GLASS, roughness)
    fab, fba = _eval_many(p, a, b), _eval_many(p, b, a)
    live = fab[:, 0] > 0.0
    assert live.sum() > 100
    np.testing.assert_array_equal(live, fba[:, 0] > 0.0)
    np.testing.assert_allclose(fab[live, :3] / 1.0, fba[live, :3] / IOR ** 2, rtol=1e-9)


# --------------------------------------------------------------------------- lobes, table, frame

def test_smooth_metal_is_a_schlick_weighted_mirror():
    # mirror direction; weight = F0 + (1 - F0)(1 - cos)^5 per channel (Schlick 1994)
    wo = direction(0.4, 1.1)
    wix, wiy, wiz, wr, wg, wb, pdf, delta = bsdf_sample(mat(METAL, 0.0), *wo, 0.5, 0.5, 0.5)
    assert (wix, wiy, wiz) == pytest.approx((-wo[0], -wo[1], wo[2]), abs=1e-15)
    assert (wr, wg, wb) == pytest.approx([c + (1 - c) * 0.6 ** 5 for c in TINT], rel=1e-14)
    assert delta and pdf == 0.0


@pytest.mark.parametrize("params, nonspecular, delta", [
    (mat(DIFFUSE, 0.0), True, False),
    (mat(METAL, 0.0), False, True),
    (mat(METAL, 0.5), True, False),
    (mat(GLASS, 0.0), False, True),
    (mat(GLASS, 0.5), True, False),
    (mat(GLASS, 0.5, ior=1.0), False, True),  # index-matched: passes straight through
    (mat(PLASTIC, 0.0), True, True),
    (mat(PLASTIC, 0.5), True, False),
])
def test_lobe_kinds_tell_the_integrator_when_light_sampling_helps(params, nonspecular, delta):
    assert has_nonspecular_lobe(params) == nonspecular
    assert has_delta_lobe(params) == delta


@pytest.mark.parametrize("kind", [DIFFUSE, METAL, PLASTIC])
def test_opaque_materials_do_not_transmit(kind):
    p = mat(kind, 0.4)
    assert bsdf_eval(p, *direction(0.7), *direction(-0.5)) == (0.0, 0.0, 0.0, 0.0)


def test_delta_lobes_add_nothing_to_eval():
    wo = direction(0.7)
    assert bsdf_eval(mat(METAL, 0.0), *wo, -wo[0], -wo[1], wo[2]) == (0.0, 0.0, 0.0, 0.0)
    assert bsdf_eval(mat(GLASS, 0.0), *wo, -wo[0], -wo[1], wo[2]) == (0.0, 0.0, 0.0, 0.0)


def test_material_row_layout():
    row = material_row(GLASS, (0.1, 0.2, 0.3), 0.25, 1.33, (4.0, 5.0, 6.0))
    assert row.shape == (MATERIAL_SIZE,) and row.dtype == np.float64
    np.testing.assert_array_equal(row[:9], [2, 0.1, 0.2, 0.3, 0.25, 1.33, 4, 5, 6])
    # the glTF columns at the values that change nothing (material_table.py): opaque, no
    # textures, neutral specular, no absorption
    assert row[M_ALPHA] == 1.0 and row[M_ALPHA_MODE] == 0.0 and row[M_METALLIC] == 0.0
    assert all(row[c] == -1.0 for c in TEXTURE_COLUMNS)
    assert row[M_ATTEN_DIST] == np.inf and row[M_SPECULAR] == 1.0


@pytest.mark.parametrize("args", [
    (7, (0.5, 0.5, 0.5), 0.0, 1.5, (0, 0, 0)),
    (DIFFUSE, (0.5, 0.5), 0.0, 1.5, (0, 0, 0)),
    (DIFFUSE, (0.5, 0.5, 1.5), 0.0, 1.5, (0, 0, 0)),
    (METAL, (0.5, 0.5, 0.5), 1.2, 1.5, (0, 0, 0)),
    (PLASTIC, (0.5, 0.5, 0.5), 0.2, 0.9, (0, 0, 0)),
    (DIFFUSE, (0.5, 0.5, 0.5), 0.0, 1.5, (0, -1, 0)),
])
def test_material_row_rejects_values_out_of_range(args):
    with pytest.raises(ValueError):
        material_row(*args)


NORMALS = [(0, 0, 1), (0, 0, -1), (1, 0, 0), (0.3, -0.4, 0.866), (1e-9, 2e-9, -1.0),
           (0.6, 0.0, -0.8), (-0.5, 0.5, -0.7071067811865476)]


@pytest.mark.parametrize("n", NORMALS)
def test_frame_is_right_handed_and_orthonormal(n):
    n = np.array(n, float) / np.linalg.norm(n)
    f = build_frame(*n)
    t, b = np.array(f[:3]), np.array(f[3:])
    m = np.stack([t, b, n])
    np.testing.assert_allclose(m @ m.T, np.eye(3), atol=1e-12)
    assert np.linalg.det(m) == pytest.approx(1.0, abs=1e-12)


@pytest.mark.parametrize("n", NORMALS)
def test_to_local_and_to_world_are_inverse(n):
    n = np.array(n, float) / np.linalg.norm(n)
    f = build_frame(*n)
    v = (0.2, -0.7, 0.4)
    local = to_local(*f, *n, *v)
    assert local[2] == pytest.approx(float(np.dot(v, n)), abs=1e-15)
    assert to_world(*f, *n, *local) == pytest.approx(v, abs=1e-14)
