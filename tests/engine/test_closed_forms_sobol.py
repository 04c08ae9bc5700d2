"""Radiometry with the default sampler (`sampler = "sobol"`, docs/shot-file.md) against closed
forms, with the tolerance taken from the independent sampler's standard error.

Each scene is rendered twice at the same sample count: once with `sampler = "random"`, whose
samples are independent, so its per-pixel variance gives an honest standard error σ of an n-sample
mean; once with the default Sobol sampler, whose own sample variance says nothing about its error
(its samples are stratified, not independent). The Sobol render must be within 4 σ of the closed
form everywhere. Scrambled nets are unbiased and, for the square-integrable integrands of
rendering, their error is not larger than independent sampling's by more than a small constant
(Owen 1997, "Monte Carlo variance of scrambled net quadrature", SIAM J. Numer. Anal. 34(5):
at most e ≈ 2.72 times the variance for (0, m, s)-nets in base b ≥ s; from memory), and in
practice smaller; 4 σ is the rule-of-thumb margin for that. The checks also compare the Sobol
render's root-mean-square error with σ's, which a sampler with a bias or correlated pixels fails.
"""

from __future__ import annotations

import math

import numpy as np

from .closed_forms import render, sphere_hit_cosine
from .scenes import load, shot_text, write_quad


def _both(tmp_path, text_for):
    """Means of the Sobol render, and means and standard errors of the random one: (h, w, 3)."""
    sobol, _, film_s = render(load(tmp_path, text_for("sobol"), "sobol.toml"))
    random, se, _ = render(load(tmp_path, text_for("random"), "random.toml"))
    assert np.all(film_s.dropped == 0)
    return sobol, random, se


def test_default_sampler_is_sobol(tmp_path):
    # the checks below are about the default: a shot that names no sampler gets Sobol
    text = shot_text("", sampler="random").replace('sampler = "random"\n', "")
    assert "sampler" not in text
    assert load(tmp_path, text).sampler == "sobol"


def test_furnace_with_the_default_sampler(tmp_path):
    # inside a closed diffuse sphere of albedo ρ emitting Le the radiance is Le / (1 − ρ)
    # everywhere (the furnace series; e.g. Pharr et al., PBRT 3rd ed. §14.4)
    rho, le = 0.6, 0.4

    def text(sampler):
        return shot_text(f"""
[[material]]
name = "shell"
type = "diffuse"
color = [{rho}, {rho}, {rho}]
emission = [{le}, {le}, {le}]
[[object]]
name = "room"
material = "shell"
sphere = {{ center = [0.2, -0.1, 0.3], radius = 2.0 }}
""", width=12, height=12, samples=64, bounces=64, sampler=sampler)

    sobol, random, se = _both(tmp_path, text)
    expected = le / (1 - rho)
    assert np.all(se > 0)
    # the independent render itself agrees (the yardstick is sound)
    assert abs(random.mean() - expected) < 4 * math.sqrt(np.sum(se ** 2)) / se.size
    assert np.all(np.abs(sobol - expected) < 4 * se), np.max(np.abs(sobol - expected) / se)
    img_se = math.sqrt(np.sum(se ** 2)) / se.size
    assert abs(sobol.mean() - expected) < 4 * img_se
    # Sobol's root-mean-square error over the pixels is no larger than σ's
    assert math.sqrt(np.mean((sobol - expected) ** 2)) < math.sqrt(np.mean(se ** 2))


def test_sphere_light_over_a_floor_with_the_default_sampler(tmp_path):
    # A planar element facing a sphere of radius r at centre distance D, the sphere wholly above
    # its plane, sees the configuration factor F = (r/D)² cos θ (Howell's catalogue of
    # configuration factors, the planar-element-to-sphere case; from memory), so a Lambertian
    # floor of albedo ρ shows L = ρ Le (r/D)² cos θ (one bounce: direct light only).
    rho, le, r, size = 0.6, 10.0, 0.25, 16
    centre = np.array([1.0, 1.0, 0.5])
    write_quad(tmp_path / "floor.obj", half=20.0)
    camera = "position = [0, 4, 0]\ntarget = [0, 0, 0]\nup = [0, 0, -1]\nfov = 60"

    def text(sampler):
        return shot_text(f"""
[[material]]
name = "floor"
type = "diffuse"
color = [{rho}, {rho}, {rho}]
[[material]]
name = "lamp"
type = "diffuse"
color = [0, 0, 0]
emission = [{le}, {le}, {le}]
[[object]]
name = "floor"
material = "floor"
mesh = "floor.obj"
[[object]]
name = "lamp"
material = "lamp"
sphere = {{ center = {centre.tolist()}, radius = {r} }}
""", width=size, height=size, samples=128, bounces=1, camera=camera, sampler=sampler)

    sobol, random, se = _both(tmp_path, text)
    # expected per pixel, averaged over a 16 × 16 grid in the pixel's footprint on the floor;
    # the camera looks down −y from height 4 with up = −z: raster x → +x, raster y → +z
    tan_half = math.tan(math.radians(30))
    sub = (np.arange(16) + 0.5) / 16
    f = (np.arange(size)[:, None] + sub[None, :]).ravel()
    x = 4.0 * (2 * f / size - 1) * tan_half
    z = -4.0 * (1 - 2 * f / size) * tan_half
    p = np.stack(np.broadcast_arrays(x[None, :], 0.0, z[:, None]), -1)
    to_c = centre - p
    d = np.linalg.norm(to_c, axis=-1)
    value = rho * le * (r / d) ** 2 * (to_c[..., 1] / d)
    expected = value.reshape(size, 16, size, 16).mean(axis=(1, 3))[..., None]
    # pixels where the sphere hides any of the footprint from the camera are left out
    eye = np.array([0.0, 4.0, 0.0])
    ray = (p - eye) / np.linalg.norm(p - eye, axis=-1, keepdims=True)
    hidden = ~np.isnan(sphere_hit_cosine(eye, ray, centre, r))
    seen = ~hidden.reshape(size, 16, size, 16).any(axis=(1, 3))
    assert seen.sum() > 200
    assert np.all(se[seen] > 0)
    err = np.abs(sobol - expected)[seen]
    assert np.all(err < 4 * se[seen]), np.max(err / se[seen])
    assert math.sqrt(np.mean(err ** 2)) < math.sqrt(np.mean(se[seen] ** 2))
    # the independent render agrees too, on the whole image
    n = se[seen].size
    assert abs(np.mean((random - expected)[seen])) < 4 * math.sqrt(np.sum(se[seen] ** 2)) / n
