"""The environment map's orientation, on R, G and B separately, with diffuse planes facing ±x, ±y
and ±z, against the cosine integral of the map taken in the convention docs/shot-file.md states.

The map is coloured by the axis a direction is closest to, with a different colour for each of
the six, so that a swapped pair of channels, a map mirrored left to right, turned the wrong way or
upside down gives other numbers on some plane. A Lambertian plane of albedo ρ under it shows
L = ρ/π ∫ L_env(ω) max(0, n·ω) dω (the reflected radiance of a Lambertian surface, e.g. Pharr,
Jakob & Humphreys, PBRT 3rd ed. §5.6 and §8.3, section numbers from memory); one bounce, so
nothing else reaches it.

Tolerance: 4 standard errors of the image mean (the render's own per-pixel variance, independent
sampler), plus the integral's own error (its change from 8 × 8 to 16 × 16 points per map pixel).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from .closed_forms import render
from .scenes import load, shot_text, write_quad

RHO = 0.8
# colour of the directions closest to each axis: (axis, sign) -> (R, G, B)
FACE_COLOURS = {
    (0, +1): (3.0, 0.2, 0.1), (0, -1): (0.1, 0.4, 1.5),
    (1, +1): (0.5, 2.0, 0.3), (1, -1): (0.2, 0.1, 0.6),
    (2, +1): (0.1, 0.8, 2.5), (2, -1): (1.2, 1.0, 0.1),
}


def map_direction(u, v):
    """World direction of the point (u, v) of a latitude-longitude map (u across from the left
    edge, v down from the top, both in [0, 1]), as docs/shot-file.md states it: the top row looks
    up (+y), the bottom row down, the middle row along the horizon; along a row, the left edge
    looks towards +z, a quarter across towards −x, the middle towards −z, three quarters across
    towards +x (the map is seen from inside the sphere, as a panorama, not mirrored)."""
    theta = np.pi * v  # from +y
    phi = 2 * np.pi * u  # from +z, turning towards −x (a turn of −90° about +y, right-handed, per quarter)
    st = np.sin(theta)
    return np.stack(np.broadcast_arrays(-st * np.sin(phi), np.cos(theta), st * np.cos(phi)), -1)


def face_map(h=32, w=64):
    """(h, w, 3) float32: every map pixel coloured by the axis its centre direction is closest to."""
    v = (np.arange(h) + 0.5) / h
    u = (np.arange(w) + 0.5) / w
    d = map_direction(u[None, :], v[:, None])
    axis = np.argmax(np.abs(d), axis=-1)
    sign = np.where(np.take_along_axis(d, axis[..., None], -1)[..., 0] > 0, 1, -1)
    out = np.zeros((h, w, 3), np.float32)
    for (a, s), colour in FACE_COLOURS.items():
        out[(axis == a) & (sign == s)] = colour
    return out


def cosine_integral(env, normal, sub, turn_deg=0.0):
    """∫ L(ω) max(0, n·ω) dω over the map, per channel (3,), with sub × sub points in each map
    pixel (the map is piecewise constant, so only the cosine and the solid angle vary inside a
    pixel). turn_deg: the map turned by that angle about +y, right-handed (a direction d of the
    map is seen in the world at Ry(turn) d)."""
    h, w, _ = env.shape
    v = (np.arange(h * sub) + 0.5) / (h * sub)
    u = (np.arange(w * sub) + 0.5) / (w * sub)
    d = map_direction(u[None, :], v[:, None])
    a = math.radians(turn_deg)
    ry = np.array([[math.cos(a), 0, math.sin(a)], [0, 1, 0], [-math.sin(a), 0, math.cos(a)]])
    d = d @ ry.T
    cos = np.maximum(0.0, d @ np.asarray(normal, float))
    d_omega = (np.pi / (h * sub)) * (2 * np.pi / (w * sub)) * np.sin(np.pi * v)[:, None]
    radiance = np.repeat(np.repeat(env, sub, axis=0), sub, axis=1)
    return np.einsum("hw,hwc->c", cos * d_omega, radiance)


# the plane (the floor quad of scenes.write_quad, normal +y) turned to face each way, and a
# camera looking at it head on
PLANES = {
    "+x": ("[0, 0, -90]", (1, 0, 0), "position = [1, 0, 0]\ntarget = [0, 0, 0]"),
    "-x": ("[0, 0, 90]", (-1, 0, 0), "position = [-1, 0, 0]\ntarget = [0, 0, 0]"),
    "+y": ("[0, 0, 0]", (0, 1, 0), "position = [0, 1, 0]\ntarget = [0, 0, 0]\nup = [0, 0, -1]"),
    "-y": ("[180, 0, 0]", (0, -1, 0), "position = [0, -1, 0]\ntarget = [0, 0, 0]\nup = [0, 0, -1]"),
    "+z": ("[90, 0, 0]", (0, 0, 1), "position = [0, 0, 1]\ntarget = [0, 0, 0]"),
    "-z": ("[-90, 0, 0]", (0, 0, -1), "position = [0, 0, -1]\ntarget = [0, 0, 0]"),
}


def _render_plane(tmp_path, facing, environment_extra=""):
    from examples.make_assets import write_exr  # the project's EXR writer (OpenEXR library)

    write_exr(tmp_path / "sky.exr", face_map())
    write_quad(tmp_path / "plane.obj", half=10.0)
    rotate, _, camera = PLANES[facing]
    shot = load(tmp_path, shot_text(f"""
[environment]
map = "sky.exr"
{environment_extra}
[[material]]
name = "plane"
type = "diffuse"
color = [{RHO}, {RHO}, {RHO}]
[[object]]
name = "plane"
material = "plane"
mesh = "plane.obj"
rotate = {rotate}
""", width=4, height=4, samples=512, bounces=1, camera=camera + "\nfov = 20"))
    mean, se, _ = render(shot)
    return mean.mean(axis=(0, 1)), np.sqrt(np.sum(se ** 2, axis=(0, 1))) / (se.shape[0] * se.shape[1])


def test_the_face_map_has_six_colours_where_the_convention_puts_them():
    env = face_map()
    h, w, _ = env.shape
    # middle row: left edge +z, a quarter −x, the middle −z, three quarters +x; top +y, bottom −y
    assert tuple(env[h // 2, 0]) == pytest.approx(FACE_COLOURS[(2, +1)])
    assert tuple(env[h // 2, w // 4]) == pytest.approx(FACE_COLOURS[(0, -1)])
    assert tuple(env[h // 2, w // 2]) == pytest.approx(FACE_COLOURS[(2, -1)])
    assert tuple(env[h // 2, 3 * w // 4]) == pytest.approx(FACE_COLOURS[(0, +1)])
    assert tuple(env[0, 0]) == pytest.approx(FACE_COLOURS[(1, +1)])
    assert tuple(env[-1, 0]) == pytest.approx(FACE_COLOURS[(1, -1)])


@pytest.mark.parametrize("facing", list(PLANES))
def test_environment_map_orientation_per_channel(tmp_path, facing):
    env = face_map()
    normal = PLANES[facing][1]
    fine = cosine_integral(env, normal, 16)
    quad_err = np.abs(fine - cosine_integral(env, normal, 8))
    expected = RHO / math.pi * fine
    mean, se = _render_plane(tmp_path, facing)
    assert np.all(se > 0)
    assert np.all(np.abs(mean - expected) < 4 * se + RHO / math.pi * quad_err), (mean, expected, se)
    # power: the plane facing the other way sees other colours, far outside the tolerance
    opposite = RHO / math.pi * cosine_integral(env, -np.asarray(normal, float), 16)
    assert np.all(np.abs(opposite - expected) > 20 * se)


def test_environment_rotate_turns_the_map_right_handed_about_y(tmp_path):
    # rotate = 90 turns the map like an object's rotate = [0, 90, 0] (right-handed about +y):
    # what lay towards −z is seen towards −x, what lay towards +x now lies towards −z
    env = face_map()
    normal = (0, 0, -1)
    expected = RHO / math.pi * cosine_integral(env, normal, 16, turn_deg=90.0)
    quad_err = RHO / math.pi * np.abs(cosine_integral(env, normal, 16, 90.0) - cosine_integral(env, normal, 8, 90.0))
    mean, se = _render_plane(tmp_path, "-z", "rotate = 90")
    assert np.all(np.abs(mean - expected) < 4 * se + quad_err), (mean, expected, se)
    # and that is the unturned map's +x face, not its −x face
    plus_x = RHO / math.pi * cosine_integral(env, (1, 0, 0), 16)
    np.testing.assert_allclose(expected, plus_x, rtol=1e-6)
