"""The whole integrator against closed-form radiometry.

Tolerances are standard errors computed from the renders' own per-pixel variance (the EXR's
`var` channel), with the independent sampler so that samples really are independent.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from .scenes import load, render_through_exr, shot_text, write_quad


def _mean_and_se(ch):
    """Image-average radiance (3,), its standard error (3,), and per pixel the mean (h, w, 3)
    and the variance of the mean (h, w, 3), from a frame file's channels."""
    mean = np.stack([ch["R"], ch["G"], ch["B"]], -1)
    var = np.stack([ch["var.R"], ch["var.G"], ch["var.B"]], -1)
    spp = ch["spp"][..., None]
    npx = mean.shape[0] * mean.shape[1]
    se = np.sqrt((var / spp).sum(axis=(0, 1))) / npx
    return mean.mean(axis=(0, 1)), se, mean, var / spp


@pytest.mark.parametrize("albedo", [0.3, 0.7])
def test_furnace_closed_diffuse_sphere_gives_le_over_one_minus_albedo(tmp_path, albedo):
    # Furnace identity: inside a closed surface of albedo ρ emitting Le everywhere, the radiance
    # is the geometric series Le Σ ρ^k = Le / (1 − ρ) (e.g. Pharr et al., PBRT 3rd ed. §14.4
    # white furnace; the series itself is elementary). 128 bounces leave ρ^129 ≈ 0 behind.
    le = 0.5
    shot = load(tmp_path, shot_text(f"""
[[material]]
name = "shell"
type = "diffuse"
color = [{albedo}, {albedo}, {albedo}]
emission = [{le}, {le}, {le}]
[[object]]
name = "room"
material = "shell"
sphere = {{ center = [0.3, -0.2, 0.1], radius = 2.0 }}
""", samples=64, bounces=128))
    mean, se, _, _ = _mean_and_se(render_through_exr(shot, tmp_path))
    expected = le / (1.0 - albedo)
    assert np.all(se > 0)
    assert np.all(np.abs(mean - expected) < 3 * se), (mean, se, expected)


def test_sphere_light_over_diffuse_floor_follows_configuration_factor(tmp_path):
    # A planar element facing a sphere of radius r at centre distance D, with the sphere wholly
    # above the element's plane, sees the configuration factor F = (r/D)² cos θ (the planar-
    # element-to-sphere case of J. R. Howell's catalogue of configuration factors; formula from
    # memory, and it follows from the sphere's projected solid angle). The irradiance is
    # E = π L F, and a Lambertian floor of albedo ρ leaves L_o = ρ E / π = ρ L (r/D)² cos θ.
    rho, L, r = 0.6, 10.0, 0.25
    centre = np.array([1.5, 1.0, 0.0])
    write_quad(tmp_path / "floor.obj", half=20.0)
    camera = "position = [0, 4, 0]\ntarget = [0, 0, 0]\nup = [0, 0, -1]\nfov = 60"
    shot = load(tmp_path, shot_text(f"""
[[material]]
name = "floor"
type = "diffuse"
color = [{rho}, {rho}, {rho}]
[[material]]
name = "lamp"
type = "diffuse"
color = [0, 0, 0]
emission = [{L}, {L}, {L}]
[[object]]
name = "floor"
material = "floor"
mesh = "floor.obj"
[[object]]
name = "lamp"
material = "lamp"
sphere = {{ center = [{centre[0]}, {centre[1]}, {centre[2]}], radius = {r} }}
""", width=24, height=24, samples=256, bounces=1, camera=camera))
    _, _, mean, var_mean = _mean_and_se(render_through_exr(shot, tmp_path))

    tan_half = math.tan(math.radians(60) / 2)
    sub = (np.arange(16) + 0.5) / 16  # the pixel's footprint, sampled finely

    def expected_radiance(px, py):
        # camera looks down −y from height 4 with up = −z: raster x → +x, raster y → +z
        sx = (2 * (px + sub[None, :]) / 24 - 1) * tan_half
        sy = (1 - 2 * (py + sub[:, None]) / 24) * tan_half
        p = np.stack(np.broadcast_arrays(4.0 * sx, 0.0 * sx, -4.0 * sy), -1)
        to_c = centre - p
        d = np.linalg.norm(to_c, axis=-1)
        return float(np.mean(rho * L * (r / d) ** 2 * (to_c[..., 1] / d)))

    for (py, px) in [(12, 4), (6, 6), (18, 8), (12, 12), (3, 20), (20, 3), (12, 2), (16, 14)]:
        expected = expected_radiance(px, py)
        got = mean[py, px]
        se = np.sqrt(var_mean[py, px])
        assert np.all(se > 0)
        assert np.all(np.abs(got - expected) < 3.5 * se), (px, py, got, expected, se)
