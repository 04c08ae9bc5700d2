"""Triangle lights and environment maps through the whole integrator, against closed forms.

Each check renders a flat diffuse surface seen straight on, with one bounce (direct light
only), and compares pixel radiances with an independent integral, within 3.5 standard errors
from the render's own variance plus the integral's own error where it is numerical.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate

from .scenes import load, render_through_exr, shot_text, write_quad


def _write_square(path, half, y):
    """A square light of side 2·half at height y, parallel to the floor."""
    import trimesh

    v = np.array([[-half, y, -half], [half, y, -half], [half, y, half], [-half, y, half]])
    trimesh.Trimesh(v, np.array([[0, 1, 2], [0, 2, 3]]), process=False).export(path)


def _corner_factor(a, b, c):
    """Configuration factor from a differential area to a parallel a × b rectangle whose corner
    lies straight above it at height c (Howell's catalogue of configuration factors, the
    differential-element-to-parallel-rectangle case; the formula is from memory and is checked
    against direct quadrature in `test_corner_factor_matches_quadrature`)."""
    x, y = a / c, b / c
    return (x / math.sqrt(1 + x * x) * math.atan(y / math.sqrt(1 + x * x))
            + y / math.sqrt(1 + y * y) * math.atan(x / math.sqrt(1 + y * y))) / (2 * math.pi)


def _square_factor(px, pz, half, c):
    """Factor to the square [-half, half]² at height c from the floor point (px, 0, pz) inside
    its shadow: the sum over the four corner rectangles the point splits it into."""
    return sum(_corner_factor(a, b, c) for a in (half - px, half + px) for b in (half - pz, half + pz))


def test_corner_factor_matches_quadrature():
    # F = ∫∫ cos θ1 cos θ2 / (π d²) dA, both cosines c/d for parallel surfaces
    a, b, c = 0.7, 0.4, 1.3
    q, _ = integrate.dblquad(lambda y, x: c * c / (math.pi * (x * x + y * y + c * c) ** 2), 0, a, 0, b)
    assert _corner_factor(a, b, c) == pytest.approx(q, rel=1e-8)


def _render_channels(shot, tmp_path):
    """Green mean and its standard error per pixel, (h, w) each, read from the frame file."""
    ch = render_through_exr(shot, tmp_path)
    return ch["G"], np.sqrt(ch["var.G"] / ch["spp"])


def _floor_point(px, py, size, height, tan_half):
    """Floor point under pixel centre (px, py) for a camera at `height` looking down −y, up −z."""
    sx = (2 * (px + 0.5) / size - 1) * tan_half
    sy = (1 - 2 * (py + 0.5) / size) * tan_half
    return height * sx, -height * sy


PIXELS = [(2, 2), (8, 3), (13, 13), (5, 11), (8, 8), (14, 1)]


def test_square_light_over_floor_follows_configuration_factor(tmp_path):
    rho, L, half, c = 0.5, 5.0, 0.5, 1.6
    write_quad(tmp_path / "floor.obj", half=10.0)
    _write_square(tmp_path / "light.obj", half, c)
    camera = "position = [0, 1, 0]\ntarget = [0, 0, 0]\nup = [0, 0, -1]\nfov = 40"
    shot = load(tmp_path, shot_text(f"""
[[material]]
name = "floor"
type = "diffuse"
color = [{rho}, {rho}, {rho}]
[[material]]
name = "panel"
type = "diffuse"
color = [0, 0, 0]
emission = [{L}, {L}, {L}]
[[object]]
name = "floor"
material = "floor"
mesh = "floor.obj"
[[object]]
name = "panel"
material = "panel"
mesh = "light.obj"
""", width=16, height=16, samples=128, bounces=1, camera=camera))
    mean, se = _render_channels(shot, tmp_path)
    tan_half = math.tan(math.radians(20))
    for px, py in PIXELS:
        # the factor varies slowly over one pixel's footprint: average it on a 4 × 4 grid
        sub = [(px - 0.5 + (i + 0.5) / 4, py - 0.5 + (j + 0.5) / 4) for i in range(4) for j in range(4)]
        expected = rho * L * np.mean([_square_factor(*_floor_point(x, y, 16, 1.0, tan_half), half, c)
                                      for x, y in sub])
        assert abs(mean[py, px] - expected) < 3.5 * se[py, px], (px, py, mean[py, px], expected, se[py, px])


def _sky(h=16, w=32):
    """A sky with a vertical gradient, a warm band and one bright spot: (h, w, 3) float32."""
    v = (np.arange(h) + 0.5) / h
    sky = np.zeros((h, w, 3), np.float32)
    sky[...] = (0.2 + 0.6 * (1 - v))[:, None, None]
    sky[:, : w // 4, 0] += 0.5
    sky[h // 2 - 2, w // 2] = [20.0, 20.0, 20.0]  # just above the horizon, towards −z
    return sky


def _hemisphere_integral(sky, normal, sub=32):
    """∫ L(ω) max(0, n·ω) dω over the lat-long map, by a fine midpoint rule within each pixel
    (the map is piecewise constant, so only the cosine is approximated)."""
    h, w, _ = sky.shape
    v = (np.arange(h * sub) + 0.5) / (h * sub)
    u = (np.arange(w * sub) + 0.5) / (w * sub)
    theta = v * np.pi
    phi = (u - 0.5) * 2 * np.pi  # the middle column looks towards −z (lights.py convention)
    st, ct = np.sin(theta)[:, None], np.cos(theta)[:, None]
    d = np.stack(np.broadcast_arrays(st * np.sin(phi)[None, :], ct, -st * np.cos(phi)[None, :]), -1)
    cos = np.maximum(0.0, d @ np.asarray(normal, float))
    radiance = np.repeat(np.repeat(sky[..., 1], sub, axis=0), sub, axis=1)
    d_omega = (np.pi / (h * sub)) * (2 * np.pi / (w * sub)) * st
    return float(np.sum(radiance * cos * d_omega))


@pytest.mark.parametrize("facing", ["up", "towards -z", "towards +z"])
def test_environment_map_lights_a_diffuse_plane_by_its_cosine_integral(tmp_path, facing):
    from examples.make_assets import write_exr

    rho = 0.8
    sky = _sky()
    write_exr(tmp_path / "sky.exr", sky)
    write_quad(tmp_path / "plane.obj", half=10.0)
    # the plane is rotated to face the chosen way; the camera looks at it head on
    rotate, normal, camera = {
        "up": ("[0, 0, 0]", (0, 1, 0), "position = [0, 1, 0]\ntarget = [0, 0, 0]\nup = [0, 0, -1]"),
        "towards -z": ("[-90, 0, 0]", (0, 0, -1), "position = [0, 0, -1]\ntarget = [0, 0, 0]"),
        "towards +z": ("[90, 0, 0]", (0, 0, 1), "position = [0, 0, 1]\ntarget = [0, 0, 0]"),
    }[facing]
    shot = load(tmp_path, shot_text(f"""
[environment]
map = "sky.exr"
[[material]]
name = "plane"
type = "diffuse"
color = [{rho}, {rho}, {rho}]
[[object]]
name = "plane"
material = "plane"
mesh = "plane.obj"
rotate = {rotate}
""", width=4, height=4, samples=512, bounces=1, camera=camera + "\nfov = 20"))
    mean, se = _render_channels(shot, tmp_path)
    fine = _hemisphere_integral(sky, normal, 32)
    quad_err = abs(fine - _hemisphere_integral(sky, normal, 16))
    expected = rho / math.pi * fine
    img_mean = mean.mean()
    img_se = math.sqrt(np.sum(se ** 2)) / se.size
    assert abs(img_mean - expected) < 3.5 * img_se + rho / math.pi * quad_err, (img_mean, expected, img_se)
