"""Smooth mirror and glass through the whole integrator, per pixel, against Fresnel's laws.

A convex object in a uniform environment of radiance Le sends towards the camera Le times its
directional albedo at the angle the camera ray meets it: every reflected ray leaves the object
for the environment and never comes back (the object is convex). The angle is computed for every
pixel from the camera's geometry (closed_forms.pinhole_rays), on a 32 × 32 grid inside the pixel,
because the renderer integrates the pixel's footprint (box filter).

Tolerances: 4.5 standard errors of each pixel's mean (the render's own per-pixel variance, with
the independent sampler), plus the sub-pixel grid's own error, estimated as the change from a
16 × 16 to the 32 × 32 grid. 4.5 sigma for hundreds of pixels: a false alarm anywhere in the
image has a probability below 1 % under a normal approximation.
"""

from __future__ import annotations

import numpy as np

from .closed_forms import (
    assert_within, fresnel_hecht, fresnel_hecht_sp, pinhole_rays, pixel_average, render, schlick,
    sphere_hit_cosine, sphere_view_expected,
)
from .scenes import load, shot_text

LE = 0.75
SIZE = 16
EYE, TARGET, FOV = (0.0, 0.0, 4.0), (0.0, 0.0, 0.0), 34.0
CAMERA = f"position = {list(EYE)}\ntarget = {list(TARGET)}\nfov = {FOV}"
SIGMAS = 4.5


def _sphere_shot(tmp_path, material, samples, bounces=8, roulette=None, name="shot.toml"):
    text = _sphere_text(material, samples, bounces)
    if roulette is not None:
        text = text.replace("[sampling]\n", f"[sampling]\nroulette = {roulette}\n")
    return load(tmp_path, text, name)


def _sphere_text(material, samples, bounces):
    return shot_text(f"""
[environment]
color = [{LE}, {LE}, {LE}]
{material}
[[object]]
name = "ball"
material = "ball"
sphere = {{ center = [0, 0, 0], radius = 1.0 }}
""", width=SIZE, height=SIZE, samples=samples, bounces=bounces, camera=CAMERA)


def _expected(first, within, n):
    return sphere_view_expected(SIZE, EYE, FOV, LE, first, within, n)


def _se(render_se, model_se):
    """The larger of the render's own standard error and the model's: a silhouette pixel whose
    few samples all missed the sphere has a sample variance of 0 though its true variance is not."""
    return np.maximum(render_se, model_se)


def test_the_view_covers_sphere_and_environment():
    # the sub-pixel geometry the other tests rely on: the sphere fills the middle and the
    # corners see the environment (angular radius asin(1/4) = 14.5° < 17° = fov/2)
    cos = sphere_hit_cosine(EYE, pinhole_rays(SIZE, SIZE, EYE, TARGET, (0, 1, 0), FOV, 4), TARGET, 1.0)
    hit = ~np.isnan(pixel_average(cos))
    assert hit[SIZE // 2, SIZE // 2] and not hit[0, 0] and not hit[-1, -1]
    assert 0.4 < np.mean(hit) < 0.9  # pixels wholly on the sphere


def test_smooth_metal_sphere_reflects_schlick_fresnel_per_pixel(tmp_path):
    # the metal lobe's documented model (docs/shot-file.md: colour = tint of the reflection;
    # lobes.py: Schlick's Fresnel with F0 = colour): a smooth metal sphere shows
    # Le · [F0 + (1 − F0)(1 − cos θ)⁵] per channel (Schlick 1994)
    f0 = np.array([0.9, 0.55, 0.2])
    shot = _sphere_shot(tmp_path, f"""
[[material]]
name = "ball"
type = "metal"
roughness = 0
color = {f0.tolist()}""", samples=32)
    mean, se, _ = render(shot)
    expected, grid_err, model_se = _expected(lambda c: schlick(c[..., None], f0),
                                             lambda c: np.zeros(c.shape + (1,)), shot.samples)
    assert_within(mean, expected, _se(se, model_se), SIGMAS, 2 * grid_err, "metal mirror")


GLASS = """
[[material]]
name = "ball"
type = "glass"
roughness = 0
ior = 1.5
color = [1, 0, 0]"""


def test_smooth_glass_sphere_reflects_hecht_fresnel_and_returns_le_in_a_furnace(tmp_path):
    # colour = tint of transmission. Red 1: the red channel is clear glass, which in a uniform
    # environment returns Le exactly, for every pixel (a lossless dielectric: R + T = 1 at each
    # interface, radiance scaled by 1/η² going in and η² coming out: the white furnace identity,
    # which follows from energy conservation). Green and blue 0: every path that is transmitted
    # once carries nothing, so those channels keep only the first reflection, Le · R(θ) with R
    # from Fresnel's equations for air → glass of index 1.5 (Hecht, Optics §4.6).
    # Russian roulette is put off past the last bounce here, so that every red sample is Le
    # itself (to rounding): the identity is checked exactly, not statistically.
    ior = 1.5
    shot = _sphere_shot(tmp_path, GLASS, samples=512, bounces=128, roulette=128)
    mean, se, film = render(shot)
    assert np.all(film.dropped == 0)
    np.testing.assert_allclose(mean[..., 0], LE, rtol=1e-12)
    # a sample of green or blue is Le (reflected, probability R) or 0: variance R (1 − R) Le²
    r = lambda c: fresnel_hecht(c, 1.0, ior)[..., None]  # noqa: E731
    expected, grid_err, model_se = _expected(r, lambda c: r(c) * (1 - r(c)), shot.samples)
    assert_within(mean[..., 1:], expected, _se(se[..., 1:], model_se), SIGMAS, 2 * grid_err,
                  "glass reflection")
    # the check can tell Fresnel from a constant: R ≈ 0.04 at the centre, nearly twice that in
    # the last pixel wholly on the sphere (and, at 512 samples, index 1.5 from 1.45 or 1.55, and
    # Hecht's Fresnel from Schlick's approximation, by the sum over the image: tried when written)
    assert expected[SIZE // 2, 2, 0] > 1.8 * expected[SIZE // 2, SIZE // 2, 0]


def test_clear_glass_in_a_furnace_with_russian_roulette_stays_unbiased(tmp_path):
    # the same furnace with the default roulette: unbiased (Arvo & Kirk 1990, "Particle transport
    # and image synthesis", SIGGRAPH; from memory), so the image mean of red stays at Le within 4 standard errors. Per
    # pixel the errors are not checked: paths that meet roulette are the few reflected inside the
    # sphere, too few per pixel for the pixel's sample variance to be a trustworthy error.
    shot = _sphere_shot(tmp_path, GLASS, samples=256, bounces=128)
    mean, se, _ = render(shot)
    img_se = np.sqrt(np.sum(se[..., 0] ** 2)) / se[..., 0].size
    assert img_se > 0
    assert abs(mean[..., 0].mean() - LE) < 4 * img_se


def _write_box(path, size, centre=(0.0, 0.0, 0.0)):
    import trimesh

    box = trimesh.creation.box(extents=size)
    box.apply_translation(centre)
    box.export(path)


def _slab_transmittance(cos_i, n):
    """A non-absorbing plane-parallel plate in air, every internal reflection summed:
    T = (1 − R)² Σ R^(2k) = (1 − R) / (1 + R), for each polarisation on its own and then averaged
    (Hecht, Optics §4.6 for R; the plate's multiple reflections added as intensities, without
    interference, as geometric optics does: the geometric series of Stokes 1862, "On the intensity
    of the light reflected from or transmitted through a pile of plates", from memory)."""
    rs, rp = fresnel_hecht_sp(cos_i, 1.0, n)
    return 0.5 * ((1 - rs) / (1 + rs) + (1 - rp) / (1 + rp))


def test_thin_glass_slab_transmits_the_multiple_reflection_sum(tmp_path):
    # A thin plate of index 2.5 between the camera and an emitting wall (Le = 1, black otherwise);
    # the camera looks through it within 4.2° of its normal. R = 0.184 per face, so the plate
    # passes (1 − R)/(1 + R) = 0.690 while one pass through two faces would be (1 − R)² = 0.666:
    # the check tells the internal reflections apart.
    n, le = 2.5, 1.0
    _write_box(tmp_path / "slab.obj", (6.0, 6.0, 0.1))
    _write_box(tmp_path / "wall.obj", (30.0, 30.0, 0.2), centre=(0.0, 0.0, -3.0))
    eye, fov, size = (0.0, 0.0, 3.0), 6.0, 16
    shot = load(tmp_path, shot_text(f"""
[[material]]
name = "glass"
type = "glass"
roughness = 0
ior = {n}
color = [1, 1, 1]
[[material]]
name = "wall"
type = "diffuse"
color = [0, 0, 0]
emission = [{le}, {le}, {le}]
[[object]]
name = "slab"
material = "glass"
mesh = "slab.obj"
[[object]]
name = "wall"
material = "wall"
mesh = "wall.obj"
""", width=size, height=size, samples=256, bounces=64,
        camera=f"position = {list(eye)}\ntarget = [0, 0, 0]\nfov = {fov}"))
    mean, se, _ = render(shot)
    d = pinhole_rays(size, size, eye, (0, 0, 0), (0, 1, 0), fov, 8)
    cos = -d[..., 2]  # the slab's normal is +z
    expected = le * pixel_average(_slab_transmittance(cos, n))
    # the renderer carries no polarisation: per face it uses R = (Rs + Rp)/2, which gives the
    # plate (1 − R)/(1 + R); within 4.2° of normal incidence the two differ by far less than
    # the noise, and that difference is added to the tolerance
    r = fresnel_hecht(cos, 1.0, n)
    unpolarised = le * pixel_average((1 - r) / (1 + r))
    extra = np.abs(unpolarised - expected)
    assert extra.max() < 1e-4
    g = mean[..., 1]
    assert_within(g, expected, se[..., 1], SIGMAS, extra, "slab per pixel")
    img_se = np.sqrt(np.sum(se[..., 1] ** 2)) / se[..., 1].size
    assert abs(g.mean() - expected.mean()) < 4 * img_se + extra.max()
    # power of the check: the single-pass value is many standard errors away
    single = le * pixel_average((1 - r) ** 2).mean()
    assert abs(single - expected.mean()) > 8 * img_se
