"""Punctual lights (point, spot, directional) against the inverse-square and cosine laws and the
KHR_lights_punctual README's spot falloff.

Set-up shared by the render checks: a white-ish Lambertian floor (albedo ρ) at y = 0 seen
straight down by a narrow camera, nothing else, black environment, one bounce. Each pixel then
records ρ/π · E with E the irradiance the light gives at the floor point it sees (Lambert's law:
radiance of a diffuse surface L = ρ E / π, e.g. Pharr, Jakob & Humphreys, PBR 3rd ed. §5.6,
from memory). The camera looks straight down from height H with vertical fov φ, so pixel (i, j)
of an n×n image covers the floor square [x0 + j s, x0 + (j+1) s] × [z0 + i s, z0 + (i+1) s]
with s = 2 H tan(φ/2) / n: the expected pixel value is ρ/π times E averaged over that square,
computed here on a fine grid with numpy.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from lampyr.engine.punctual import (
    LIGHT_DIRECTIONAL, LIGHT_POINT, LIGHT_SPOT, light_row, sample_punctual, sample_punctual_reference,
)
from lampyr.engine.render import render_frame
from tests.engine.scenes import load, shot_text, write_quad

RHO = 0.5
HEIGHT = 10.0
FOV = 4.0  # degrees
N = 8


def floor_shot(tmp_path, light_toml: str, samples: int = 16, sampler: str = "random"):
    write_quad(tmp_path / "floor.obj", half=50.0)
    body = f"""
[[material]]
name = "floor"
type = "diffuse"
color = [{RHO}, {RHO}, {RHO}]

[[object]]
name = "floor"
material = "floor"
mesh = "floor.obj"

{light_toml}
"""
    camera = f"position = [0, {HEIGHT}, 0]\ntarget = [0, 0, 0]\nup = [0, 0, -1]\nfov = {FOV}"
    return load(tmp_path, shot_text(body, width=N, height=N, samples=samples, bounces=1, camera=camera,
                                    sampler=sampler))


def pixel_means(irradiance) -> np.ndarray:
    """(N, N) expected pixel values: ρ/π × irradiance(x, z) averaged over each pixel's footprint.

    With up = -z, image rows run towards +z and columns towards +x."""
    half = HEIGHT * math.tan(math.radians(FOV) / 2.0)
    fine = 32
    edges = np.linspace(-half, half, N * fine + 1)
    centres = 0.5 * (edges[:-1] + edges[1:])
    x, z = np.meshgrid(centres, centres)  # rows: z, columns: x
    e = irradiance(x, z)
    return RHO / math.pi * e.reshape(N, fine, N, fine).mean(axis=(1, 3))


def rendered(shot) -> np.ndarray:
    film = render_frame(shot, 1)
    return film.mean()[..., 1]  # green channel; the lights are white


def assert_within_error(shot, expected, sigmas=4.0, resolving=True):
    """Each pixel within `sigmas` standard errors of its expected value (the pixel's own spread
    of samples over its footprint; float rounding aside)."""
    film = render_frame(shot, 1)
    got = film.mean()[..., 1]
    se = film.std_error()[..., 1]
    if resolving:  # the check has resolving power: errors well below the values
        assert np.all(se < 0.05 * np.abs(expected) + 1e-12)
    np.testing.assert_array_less(np.abs(got - expected), sigmas * se + 1e-9 * np.abs(expected) + 1e-12)


def test_point_light_follows_the_inverse_square_and_cosine_laws(tmp_path):
    pos = np.array([0.4, 2.0, -0.3])
    intensity = 30.0
    shot = floor_shot(tmp_path, f"""[[light]]
name = "bulb"
type = "point"
position = [{pos[0]}, {pos[1]}, {pos[2]}]
intensity = {intensity}""")

    def irradiance(x, z):  # E = I cos θ / d², cos θ = height / d (inverse-square and cosine laws)
        d2 = (x - pos[0]) ** 2 + pos[1] ** 2 + (z - pos[2]) ** 2
        return intensity * pos[1] / d2**1.5

    assert_within_error(shot, pixel_means(irradiance))


def test_directional_light_gives_e_cos_theta(tmp_path):
    d = np.array([1.0, -2.0, 0.5])
    d /= np.linalg.norm(d)
    shot = floor_shot(tmp_path, f"""[[light]]
name = "sun"
type = "directional"
direction = [{d[0]}, {d[1]}, {d[2]}]
intensity = 3.0""")
    expected = RHO / math.pi * 3.0 * (-d[1])  # E cos θ on the floor
    np.testing.assert_allclose(rendered(shot), expected, rtol=1e-9)


def test_spot_light_falls_off_as_the_extension_readme_says(tmp_path):
    pos = np.array([0.0, 1.0, 0.0])
    inner, outer = 5.0, 20.0  # degrees; the spot points straight down; the view reaches 26°
    shot = floor_shot(tmp_path, f"""[[light]]
name = "spot"
type = "spot"
position = [0, 1, 0]
direction = [0, -1, 0]
intensity = 5.0
inner_cone = {inner}
outer_cone = {outer}""", samples=256)

    def irradiance(x, z):
        # KHR_lights_punctual README: scale = 1 / max(0.001, cos(inner) - cos(outer)),
        # offset = -cos(outer) scale, falloff = clamp(cd scale + offset, 0, 1)²
        d2 = x**2 + 1.0 + z**2
        cd = 1.0 / np.sqrt(d2)  # cosine between the axis (straight down) and the ray to the point
        scale = 1.0 / max(0.001, math.cos(math.radians(inner)) - math.cos(math.radians(outer)))
        falloff = np.clip(cd * scale - math.cos(math.radians(outer)) * scale, 0.0, 1.0) ** 2
        return 5.0 * cd / d2 * falloff  # cos θ on the floor equals cd here

    expected = pixel_means(irradiance)
    assert expected.max() > 0 and expected.min() < expected.max() * 0.5  # the cone edge is in view
    assert_within_error(shot, expected, resolving=False)


def test_a_light_below_the_floor_does_not_light_its_top(tmp_path):
    shot = floor_shot(tmp_path, """[[light]]
name = "cellar"
type = "point"
position = [0, -1, 0]
intensity = 100.0""")
    assert rendered(shot).max() == 0.0


@pytest.mark.parametrize("kind", [LIGHT_POINT, LIGHT_SPOT, LIGHT_DIRECTIONAL])
def test_kernel_matches_its_reference(kind):
    rng = np.random.default_rng(kind)
    for _ in range(50):
        row = light_row(kind, rng.random(3) * 10, rng.normal(size=3), rng.normal(size=3), rng.normal(size=3),
                        rng.normal(size=3), 0.2, 0.9)
        p = rng.normal(size=3) * 3
        u = float(rng.random())
        got = sample_punctual(row, p[0], p[1], p[2], u)
        w, dist, e = sample_punctual_reference(row, p, u)
        np.testing.assert_allclose(got[0:3], w, rtol=1e-12, atol=1e-12)
        assert got[3] == dist or abs(got[3] - dist) <= 1e-12 * dist
        np.testing.assert_allclose(got[4:7], e, rtol=1e-12, atol=1e-15)
