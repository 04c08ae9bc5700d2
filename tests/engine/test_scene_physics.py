"""Render-level physics of glTF scenes: each check renders a real shot whose `scene` is a glTF
file written with examples/gltf_builder.py and passed by the Khronos glTF-Validator (0 errors),
and compares pixels with a closed form from an outside source named beside it.

Common set-up: tiny images, black environment, the fewest bounces the check needs. "Lambertian"
surfaces are glTF metallic-roughness materials with metallic 0 and KHR_materials_specular
`specularFactor` 0: the README of that extension scales the dielectric specular lobe and its
Fresnel weight on the diffuse base by that factor, so what is left is base / π (glTF 2.0
specification, Appendix B, `diffuse_brdf`). Such a surface of albedo ρ under irradiance E shows
radiance ρ E / π (Lambert's law; e.g. Pharr, Jakob & Humphreys, Physically Based Rendering, 3rd
ed., section 5.6, from memory), and a directional light of intensity E gives E cos θ (the shot
file's unit contract, docs/shot-file.md).

Deterministic estimators (one delta light, one bounce) are compared to float rounding; random
ones (lobe choice, stochastic coverage) within a few standard errors taken from the film
(`film.std_error()`), sampler "random" so that the film's variance is the estimator's.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from examples.gltf_builder import CLAMP_TO_EDGE, REPEAT, GltfBuilder, quat_xyzw, tex, texture_transform
from lampyr.engine.render import render_frame
from tests.engine.gltf_files import QUAD_FACES, QUAD_NORMALS, QUAD_POSITIONS, QUAD_UVS, save_valid
from tests.engine.scenes import load, shot_text

SPECULAR_OFF = {"KHR_materials_specular": {"specularFactor": 0.0}}


# --------------------------------------------------------------------------------------------
# helpers: files, shots, closed forms


def render(tmp_path, b: GltfBuilder, camera: str, *, size=8, samples=4, bounces=1, body=""):
    """Save `b` as scene.glb (validated), render frame 1 of a shot that names it; the Film."""
    save_valid(b, tmp_path / "scene.glb")
    text = 'scene = "scene.glb"\n' + shot_text(body, width=size, height=size, samples=samples, bounces=bounces,
                                               camera=camera, sampler="random")
    return render_frame(load(tmp_path, text), 1)


def lambert(b: GltfBuilder, name: str, rho, **kw) -> int:
    """A Lambertian glTF material of albedo rho (see the module docstring)."""
    ext = dict(SPECULAR_OFF)
    ext.update(kw.pop("extensions", {}))
    return b.add_material(name, base_color=[*rho, 1.0], metallic=0.0, roughness=1.0, extensions=ext, **kw)


def emitter(b: GltfBuilder, name: str, factor, strength: float = 1.0, **kw) -> int:
    """A black, emitting material: radiance = emissiveFactor × KHR_materials_emissive_strength."""
    ext = {"KHR_materials_emissive_strength": {"emissiveStrength": float(strength)}} if strength != 1.0 else None
    return b.add_material(name, base_color=kw.pop("base_color", [0.0, 0.0, 0.0, 1.0]), metallic=0.0, roughness=1.0,
                          emissive=factor, extensions=ext, **kw)


def horizontal_quad(b: GltfBuilder, material: int, half: float, y: float, tangent_w: float = 1.0) -> int:
    """A mesh: the square |x|, |z| <= half at height y, facing +y, with normals, UVs
    (u = (x + half) / 2 half, v = (z + half) / 2 half) and tangents (1, 0, 0, tangent_w)."""
    p = np.array([[-half, y, -half], [half, y, -half], [half, y, half], [-half, y, half]])
    uv = (p[:, [0, 2]] + half) / (2 * half)
    n = np.tile([0.0, 1.0, 0.0], (4, 1))
    t = np.tile([1.0, 0.0, 0.0, tangent_w], (4, 1))
    faces = np.array([[0, 2, 1], [0, 3, 2]])  # counter-clockwise seen from +y
    return b.add_mesh([b.primitive(p, n, uv, tangents=t, indices=faces, material=material)])


def facing_quad(b: GltfBuilder, material: int, half: float, z: float, name: str) -> int:
    """A node: the square |x|, |y| <= half in the plane z, facing +z (the shared unit quad, scaled)."""
    mesh = b.add_mesh([b.primitive(QUAD_POSITIONS, QUAD_NORMALS, QUAD_UVS, indices=QUAD_FACES, material=material)])
    return b.add_node(name, mesh=mesh, translation=[-half, -half, z], scale=[2 * half, 2 * half, 1.0])


def sun(b: GltfBuilder, towards_light, intensity: float) -> None:
    """A KHR_lights_punctual directional light shining along -towards_light (the light points
    down its node's local -z, KHR_lights_punctual README)."""
    travel = -np.asarray(towards_light, float) / np.linalg.norm(towards_light)
    down_z = np.array([0.0, 0.0, -1.0])
    axis = np.cross(down_z, travel)
    if np.linalg.norm(axis) < 1e-12:
        q = [0.0, 0.0, 0.0, 1.0] if travel @ down_z > 0 else [1.0, 0.0, 0.0, 0.0]
    else:
        q = quat_xyzw(axis, math.atan2(np.linalg.norm(axis), travel @ down_z))
    np.testing.assert_allclose(Rotation.from_quat(q).apply(down_z), travel, atol=1e-12)  # scipy's check
    b.add_node("sun", light=b.add_light("directional", intensity=intensity), rotation=q)


def srgb_decode(byte):
    """IEC 61966-2-1:1999 section 5.2: c = byte/255; c/12.92 if c <= 0.04045 else ((c+0.055)/1.055)^2.4."""
    c = np.asarray(byte, np.float64) / 255.0
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def fresnel_normal(n: float) -> float:
    """Reflectance at normal incidence from air into index n: ((n - 1)/(n + 1))² (Fresnel
    equations, Hecht, Optics, 4th ed., section 4.6.2, from memory)."""
    r = ((n - 1.0) / (n + 1.0)) ** 2
    assert abs(r - fresnel_unpolarised(1.0, n)) < 1e-15  # the general form at cos = 1
    return r


def fresnel_unpolarised(cos_i: float, n: float) -> float:
    """(Rs + Rp) / 2 from air into index n at incidence cosine cos_i (Fresnel equations and
    Snell's law, Hecht, Optics, 4th ed., section 4.6.2, from memory)."""
    cos_t = math.sqrt(1.0 - (1.0 - cos_i**2) / n**2)
    rs = (cos_i - n * cos_t) / (cos_i + n * cos_t)
    rp = (n * cos_i - cos_t) / (n * cos_i + cos_t)
    return 0.5 * (rs**2 + rp**2)


def pooled(film):
    """(mean (3,), standard error (3,)) of the whole image's mean, pixels independent."""
    m = film.mean().reshape(-1, 3)
    se = film.std_error().reshape(-1, 3)
    return m.mean(axis=0), np.sqrt((se**2).sum(axis=0)) / len(m)


def assert_pooled(film, expected, sigmas=5.0):
    got, se = pooled(film)
    expected = np.broadcast_to(np.asarray(expected, float), (3,))
    assert np.all(se < 0.02 * expected), (se, expected)  # the check resolves 2 % of the value
    assert np.all(np.abs(got - expected) < sigmas * se + 1e-12), (got, expected, se)


# A camera at distance D looking straight at a plane with tan(fov/2) = half / D sees exactly the
# square |x|, |y| <= half of that plane; pixel (row i, column j) of an n×n image covers the
# plane's [-half + 2 half j/n, ...] × [half - 2 half i/n, ...] (pinhole projection onto a
# parallel plane is affine; rows top to bottom, docs/shot-file.md).
def camera_fitting(position, target, up, half: float) -> str:
    d = float(np.linalg.norm(np.subtract(target, position)))
    fov = math.degrees(2 * math.atan(half / d))
    vec = lambda v: list(map(float, v))  # noqa: E731
    return f"position = {vec(position)}\ntarget = {vec(target)}\nup = {vec(up)}\nfov = {fov!r}"


LOOK_DOWN = "up = [0, 0, -1]"  # looking down -y with up -z: image columns run +x, rows run +z


# --------------------------------------------------------------------------------------------
# 1. Lambert's law on a normal-mapped flat floor


def tilted_normal(channel: str, tilt: float, scale: float, w: float):
    """(texel bytes (3,), world normal (3,)) of a constant normal map tilting by `tilt` radians
    along the tangent (channel "r") or the bitangent ("g"), on the floor of `horizontal_quad`.

    glTF 2.0 specification, section 3.9.3 (normalTexture): the texel maps to
    normalize((2 c - 1) × (scale, scale, 1)) in the frame (T, B, N), B = cross(N, T.xyz) × T.w;
    the values are taken from the bytes actually stored (8-bit quantised)."""
    m = np.array([math.sin(tilt), 0.0, math.cos(tilt)]) if channel == "r" else \
        np.array([0.0, math.sin(tilt), math.cos(tilt)])
    byte = np.round((m + 1.0) / 2.0 * 255.0).astype(np.uint8)
    t_space = (2.0 * byte / 255.0 - 1.0) * np.array([scale, scale, 1.0])
    t_space /= np.linalg.norm(t_space)
    T, N = np.array([1.0, 0.0, 0.0]), np.array([0.0, 1.0, 0.0])
    B = np.cross(N, T) * w
    return byte, t_space[0] * T + t_space[1] * B + t_space[2] * N


def normal_mapped_floor(tmp_path, channel, scale, w, towards_light, rho=0.6, e=2.0):
    byte, n_world = tilted_normal(channel, math.radians(30), scale, w)
    b = GltfBuilder()
    img = b.add_image(np.tile(byte, (2, 2, 1)))
    mat = lambert(b, "bumped", [rho] * 3,
                  normal_tex=tex(b.add_texture(img), scale=None if scale == 1.0 else scale))
    b.add_node("floor", mesh=horizontal_quad(b, mat, 5.0, 0.0, tangent_w=w))
    sun(b, towards_light, e)
    film = render(tmp_path, b, f"position = [0, 2, 0]\ntarget = [0, 0, 0]\n{LOOK_DOWN}\nfov = 10")
    l = np.asarray(towards_light, float) / np.linalg.norm(towards_light)
    return film, rho * e * max(0.0, n_world @ l) / math.pi, rho * e * l[1] / math.pi


@pytest.mark.parametrize("channel, w, towards_light", [
    ("r", 1.0, [math.sin(math.radians(50)), math.cos(math.radians(50)), 0.0]),   # tilt along T = +x
    ("g", 1.0, [0.0, math.cos(math.radians(50)), -math.sin(math.radians(50))]),  # along B = N × T = -z
    ("g", -1.0, [0.0, math.cos(math.radians(50)), -math.sin(math.radians(50))]),  # w = -1: B = +z
])
def test_a_normal_mapped_floor_follows_lamberts_law_about_the_tilted_normal(tmp_path, channel, w, towards_light):
    film, expected, flat = normal_mapped_floor(tmp_path, channel, 1.0, w, towards_light)
    assert abs(expected - flat) > 0.1 * flat  # the tilt changes the answer: the check can tell
    np.testing.assert_allclose(film.mean(), expected, rtol=1e-9)


@pytest.mark.parametrize("scale", [0.5, 2.0])
def test_normal_texture_scale_scales_the_tilt(tmp_path, scale):
    towards = [math.sin(math.radians(50)), math.cos(math.radians(50)), 0.0]
    film, expected, _ = normal_mapped_floor(tmp_path, "r", scale, 1.0, towards)
    _, unscaled = tilted_normal("r", math.radians(30), 1.0, 1.0)
    assert abs(expected - 0.6 * 2.0 * unscaled @ towards / math.pi) > 0.01 * expected  # scale matters
    np.testing.assert_allclose(film.mean(), expected, rtol=1e-9)


# --------------------------------------------------------------------------------------------
# 2. Smooth shading: no black facets at the terminator, no light through the surface


def uv_sphere(segments: int, rings: int):
    """(positions, faces) of a unit UV sphere, y up, faces wound outward (checked below)."""
    pts = [[0.0, 1.0, 0.0]]
    for i in range(1, rings):
        th = math.pi * i / rings
        for j in range(segments):
            ph = 2 * math.pi * j / segments
            pts.append([math.sin(th) * math.cos(ph), math.cos(th), math.sin(th) * math.sin(ph)])
    pts.append([0.0, -1.0, 0.0])
    p = np.array(pts)
    ring = lambda i, j: 1 + (i - 1) * segments + j % segments  # noqa: E731
    faces = []
    for j in range(segments):
        faces.append([0, ring(1, j), ring(1, j + 1)])
        faces.append([len(p) - 1, ring(rings - 1, j + 1), ring(rings - 1, j)])
        for i in range(1, rings - 1):
            a, b_, c, d = ring(i, j), ring(i, j + 1), ring(i + 1, j), ring(i + 1, j + 1)
            faces += [[a, c, b_], [b_, c, d]]
    faces = np.array(faces)
    tri = p[faces]
    out = np.einsum("ij,ij->i", np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), tri.mean(axis=1))
    faces[out < 0] = faces[out < 0][:, ::-1]
    return p, faces


@pytest.mark.parametrize("turn", [0.0, 15.0])
def test_a_smooth_low_poly_sphere_has_no_black_facets_at_its_terminator(tmp_path, turn):
    """A 12 × 6 UV sphere with vertex normals (its positions) under a directional light from
    the side (+x), seen from +z: every fully covered pixel whose mean shading normal N (the
    film's normal AOV) faces the light (N·l > 0.25) shows ρ E (N·l) / π: Lambert's law with the
    interpolated normal, which is linear in N where N·l > 0 over the pixel, so the pixel mean
    of the samples' radiance is that of their mean normal. A facet shadowed by its neighbours
    or by itself (the terminator artefact Hanika 2021 removes) would show far less.

    turn: the sphere's turn about y. At 0° a column of vertices lies on the terminator, so no
    facet straddles it; at 15° (half a facet) the terminator runs through the middle of a
    column of facets whose flat faces look away from the light while their lit corners' normals
    face it (N·l up to sin 15° = 0.26 there) - the case the terminator methods are about."""
    rho, e = 0.8, math.pi
    p, faces = uv_sphere(12, 6)
    b = GltfBuilder()
    mat = lambert(b, "matte", [rho] * 3)
    b.add_node("ball", mesh=b.add_mesh([b.primitive(p, p, indices=faces, material=mat)]),
               rotation=quat_xyzw([0.0, 1.0, 0.0], math.radians(turn)))
    light = np.array([1.0, 0.0, 0.0])
    sun(b, light, e)
    film = render(tmp_path, b, "position = [0, 0, 4]\ntarget = [0, 0, 0]\nfov = 32", size=16, samples=16)
    full = film.hits == film.n
    cos_l = film.normal_mean() @ light
    lit = full & (cos_l > 0.25)
    assert lit.sum() >= 30 and (lit & (cos_l < 0.45)).sum() >= 4  # pixels close to the terminator are checked
    expected = rho * e * cos_l / math.pi
    got = film.mean()[..., 1]
    np.testing.assert_allclose(got[lit], expected[lit], rtol=1e-6,
                               err_msg="lit pixels darker than Lambert's law with their shading normal: "
                                       "facets shadowed at the terminator")


def leaning_quad(b: GltfBuilder, material: int) -> None:
    """A unit quad facing +z whose vertex normals lean 60° towards +x."""
    lean = math.radians(60)
    n = np.tile([math.sin(lean), 0.0, math.cos(lean)], (4, 1))
    mesh = b.add_mesh([b.primitive(QUAD_POSITIONS, n, QUAD_UVS, indices=QUAD_FACES, material=material)])
    b.add_node("leaning", mesh=mesh, translation=[-1, -1, 0], scale=[2, 2, 1])


def smooth_box(b: GltfBuilder, material: int) -> None:
    """A closed cube |x|, |y|, |z| <= 1 of 8 shared corners whose vertex normals point along
    the diagonals (one normal per corner: the classic over-smoothed box)."""
    corners = np.array([[x, y, z] for x in (-1.0, 1.0) for y in (-1.0, 1.0) for z in (-1.0, 1.0)])
    quads = [[0, 1, 3, 2], [4, 6, 7, 5], [0, 4, 5, 1], [2, 3, 7, 6], [0, 2, 6, 4], [1, 5, 7, 3]]
    faces = np.array([f for a, b_, c, d in quads for f in ([a, b_, c], [a, c, d])])
    tri = corners[faces]
    out = np.einsum("ij,ij->i", np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), tri.mean(axis=1))
    faces[out < 0] = faces[out < 0][:, ::-1]
    normals = corners / math.sqrt(3.0)
    b.add_node("box", mesh=b.add_mesh([b.primitive(corners, normals, indices=faces, material=material)]))


@pytest.mark.parametrize("shape", [leaning_quad, smooth_box])
def test_no_light_leaks_to_the_side_facing_away_from_the_light(tmp_path, shape):
    """The light is behind the surface the camera sees (geometric normal · l < 0) while the
    vertex normals lean towards it: the near side must stay black (it is in the surface's own
    shadow; Veach 1997, PhD thesis, section 5.3)."""
    b = GltfBuilder()
    shape(b, lambert(b, "matte", [0.8] * 3))
    light = np.array([1.0, 0.0, -0.15]) / math.hypot(1.0, 0.15)
    sun(b, light, math.pi)
    film = render(tmp_path, b, "position = [0, 0, 6]\ntarget = [0, 0, 0]\nfov = 16", size=8, samples=8)
    seen = film.hits > 0
    # the check can fail: many seen pixels' shading normals face the light
    assert seen.sum() >= 40 and (film.normal_mean()[seen] @ light > 0.1).sum() >= 8
    assert film.mean().max() == 0.0


# --------------------------------------------------------------------------------------------
# 3. Thin-walled pane (KHR_materials_transmission without KHR_materials_volume)

PANE_TINT = np.array([0.9, 0.6, 0.3])


def pane_material(b: GltfBuilder, transmission: float, ior: float) -> int:
    return b.add_material("pane", base_color=[*PANE_TINT, 1.0], metallic=0.0, roughness=0.0,
                          extensions={"KHR_materials_transmission": {"transmissionFactor": transmission},
                                      "KHR_materials_ior": {"ior": ior}})


@pytest.mark.parametrize("transmission, ior", [(1.0, 1.5), (0.6, 2.0)])
def test_a_thin_pane_transmits_its_tint_times_one_minus_fresnel(tmp_path, transmission, ior):
    """Camera → pane at normal incidence → emissive wall of radiance L_b: the pane shows
    transmission × baseColor × (1 − F) L_b (KHR_materials_transmission README: thin-walled,
    straight through, the specular layer's Fresnel taken off), F = ((n − 1)/(n + 1))² at normal
    incidence (Hecht), where the specification's Schlick form F0 + (1 − F0)(1 − cos)^5 equals
    it (engine/pbr.py uses Schlick; the views here are within 7.1° of normal incidence, where
    (1 − cos)^5 < 3e-11)."""
    wall = np.array([0.8, 0.9, 0.5]) * 2.0
    b = GltfBuilder()
    facing_quad(b, pane_material(b, transmission, ior), 2.0, 0.0, "pane")
    facing_quad(b, emitter(b, "wall", [0.8, 0.9, 0.5], 2.0), 3.0, -1.0, "wall")
    film = render(tmp_path, b, "position = [0, 0, 3]\ntarget = [0, 0, 0]\nfov = 10", samples=64)
    assert_pooled(film, wall * transmission * PANE_TINT * (1.0 - fresnel_normal(ior)))


def schlick(cos_i: float, f0: float) -> float:
    """Schlick's approximation F0 + (1 − F0)(1 − cos)^5 (glTF 2.0 specification, Appendix B)."""
    return f0 + (1.0 - f0) * (1.0 - cos_i) ** 5


@pytest.mark.parametrize("incidence", [0.0, 60.0])
def test_shadow_rays_pass_a_thin_pane_with_its_fresnel_loss(tmp_path, incidence):
    """A Lambertian floor under a horizontal pane, lit by a directional light through it: the
    floor gets E cos θ × transmission × baseColor × (1 − F(cos θ)) (KHR_materials_transmission
    README), not 0. At normal incidence F is Hecht's ((n − 1)/(n + 1))²; at 60° the
    specification's Schlick form is the expected value: for n = 1.5 it gives 0.0700 where the
    full Fresnel equations (Hecht, unpolarised) give 0.0892, and the test tells them apart."""
    rho, e, ior, transmission = 0.7, 3.0, 1.5, 0.8
    th = math.radians(incidence)
    b = GltfBuilder()
    b.add_node("floor", mesh=horizontal_quad(b, lambert(b, "floor", [rho] * 3), 5.0, 0.0))
    b.add_node("pane", mesh=horizontal_quad(b, pane_material(b, transmission, ior), 50.0, 1.0))
    light = np.array([math.sin(th), math.cos(th), 0.0])
    sun(b, light, e)
    film = render(tmp_path, b, f"position = [0, 0.5, 0]\ntarget = [0, 0, 0]\n{LOOK_DOWN}\nfov = 10")
    f = fresnel_normal(ior) if incidence == 0.0 else schlick(math.cos(th), fresnel_normal(ior))
    if incidence > 0.0:  # the two forms differ by more than the check's tolerance here
        assert abs(f - fresnel_unpolarised(math.cos(th), ior)) > 0.01
    expected = rho / math.pi * e * math.cos(th) * transmission * PANE_TINT * (1.0 - f)
    np.testing.assert_allclose(film.mean(), np.broadcast_to(expected, film.mean().shape), rtol=1e-9)


def test_an_area_light_seen_through_a_thin_pane_counts_once(tmp_path):
    """A Lambertian floor under a horizontal pane, lit through it by an emissive sphere (an area
    light, so light samples and BSDF samples both find it and are weighed by MIS): the floor gets
    ρ Le (r/d)² × transmission × baseColor × (1 − F) — a sphere of radiance Le subtending the
    half-angle asin(r/d) gives irradiance π Le (r/d)² to a point facing it (configuration factor
    of a sphere, Howell's catalogue, from memory), and within 4° of normal incidence Schlick's F
    is F0 = ((n − 1)/(n + 1))² to 2e-8. Counting the light both ways would nearly double it.
    One bounce keeps out the light the floor and the pane's diffuse part pass back and forth."""
    rho, le, r, d, ior, transmission = 0.7, 40.0, 0.2, 3.0, 1.5, 0.8
    b = GltfBuilder()
    b.add_node("floor", mesh=horizontal_quad(b, lambert(b, "floor", [rho] * 3), 5.0, 0.0))
    b.add_node("pane", mesh=horizontal_quad(b, pane_material(b, transmission, ior), 50.0, 1.0))
    lamp = (f'[[material]]\nname = "lamp"\ntype = "diffuse"\ncolor = [0, 0, 0]\nemission = {le}\n'
            f'[[object]]\nname = "lamp"\nmaterial = "lamp"\nsphere = {{ center = [0, {d}, 0], radius = {r} }}')
    film = render(tmp_path, b, f"position = [0, 0.5, 0]\ntarget = [0, 0, 0]\n{LOOK_DOWN}\nfov = 10",
                  samples=256, bounces=1, body=lamp)  # one bounce: the pane itself is not one
    # points off the axis (up to 0.045 away, 1.5 % of d) see the sphere up to 0.05 % smaller
    expected = rho * le * (r / d) ** 2 * transmission * PANE_TINT * (1.0 - fresnel_normal(ior))
    got, se = pooled(film)
    assert np.all(se < 0.02 * expected)
    assert np.all(np.abs(got - expected) < 5 * se + 5e-4 * expected), (got, expected, se)


# --------------------------------------------------------------------------------------------
# 4. Beer-Lambert inside a KHR_materials_volume slab


def slab(b: GltfBuilder, material: int, half: float, thickness: float) -> None:
    """A closed box |x|, |y| <= half, |z| <= thickness/2, faces wound outward, no normals (flat)."""
    c = np.array([[x, y, z] for x in (-half, half) for y in (-half, half)
                  for z in (-thickness / 2, thickness / 2)])
    quads = [[0, 1, 3, 2], [4, 6, 7, 5], [0, 4, 5, 1], [2, 3, 7, 6], [0, 2, 6, 4], [1, 5, 7, 3]]
    faces = np.array([f for a, b_, cc, d in quads for f in ([a, b_, cc], [a, cc, d])])
    tri = c[faces]
    out = np.einsum("ij,ij->i", np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), tri.mean(axis=1))
    faces[out < 0] = faces[out < 0][:, ::-1]
    b.add_node("slab", mesh=b.add_mesh([b.primitive(c, indices=faces, material=material)]))


@pytest.mark.parametrize("ior", [1.0, 1.5])
def test_a_volume_slab_attenuates_by_beer_lambert(tmp_path, ior):
    """An emissive wall seen through a slab of geometric thickness L: exp(-σ L) per channel,
    σ = -ln(attenuationColor) / attenuationDistance (KHR_materials_volume README; Beer-Lambert
    law), times (1 - F)² for the two smooth interfaces at normal incidence (Hecht; F = 0 for
    ior 1). Bounces = 2 keeps only the path straight through (a reflection inside needs more)."""
    L, dist = 0.7, 1.5
    color = np.array([0.8, 0.5, 0.2])
    wall = np.array([1.0, 1.0, 1.0]) * 1.5
    b = GltfBuilder()
    glass = b.add_material("tinted", base_color=[1.0, 1.0, 1.0, 1.0], metallic=0.0, roughness=0.0, extensions={
        "KHR_materials_transmission": {"transmissionFactor": 1.0},
        "KHR_materials_volume": {"thicknessFactor": L, "attenuationColor": color.tolist(),
                                 "attenuationDistance": dist},
        "KHR_materials_ior": {"ior": ior}})
    slab(b, glass, 2.0, L)
    facing_quad(b, emitter(b, "wall", [1.0, 1.0, 1.0], 1.5), 3.0, -2.0, "wall")
    film = render(tmp_path, b, "position = [0, 0, 5]\ntarget = [0, 0, 0]\nfov = 4", bounces=2, samples=64)
    sigma = -np.log(color) / dist
    # the views are within 2.9° of the slab's normal: the path inside is at most 0.13 % longer
    expected = wall * np.exp(-sigma * L) * (1.0 - fresnel_normal(ior)) ** 2
    if ior == 1.0:
        np.testing.assert_allclose(film.mean(), np.broadcast_to(expected, film.mean().shape), rtol=2e-3)
    else:
        assert_pooled(film, expected)


# --------------------------------------------------------------------------------------------
# 5. alphaMode MASK and BLEND

CHECKER = 4  # texels per side; a 16-pixel image puts 4×4 pixels on each texel


def checker_alpha() -> np.ndarray:
    """(4, 4, 4) uint8: white, alpha 255 where (row + column) is even, 0 elsewhere."""
    rgba = np.full((CHECKER, CHECKER, 4), 255, np.uint8)
    r, c = np.indices((CHECKER, CHECKER))
    rgba[..., 3] = np.where((r + c) % 2 == 0, 255, 0)
    return rgba


def expected_by_texel(opaque_value, cut_value, size=16):
    """(size, size, 3): pixel (i, j) lies on texel (i // 4, j // 4) of the checker (see
    `camera_fitting`; UV (0, 0) is the image's first pixel, glTF 2.0 section 3.8)."""
    i, j = np.indices((size, size)) // (size // CHECKER)
    opaque = ((i + j) % 2 == 0)[..., None]
    out = np.where(opaque, np.asarray(opaque_value, float), np.asarray(cut_value, float))
    return np.broadcast_to(out, (size, size, 3))


def masked_material(b: GltfBuilder, emission=None) -> int:
    """Alpha MASK with cutoff 0.5 (glTF 2.0 section 3.9.4) over the checker. Bilinear filtering
    puts alpha 0.5 exactly on the texel edges, so the cut-outs are exactly the alpha-0 texels."""
    img = b.add_image(checker_alpha())
    t = b.add_texture(img, b.add_sampler(CLAMP_TO_EDGE, CLAMP_TO_EDGE))
    return b.add_material("stencil", base_color=[0.0, 0.0, 0.0, 1.0], base_color_tex=tex(t), metallic=0.0,
                          roughness=1.0, emissive=emission, alpha_mode="MASK", alpha_cutoff=0.5)


def test_mask_cut_outs_show_the_background_exactly(tmp_path):
    surface, wall = np.array([0.2, 0.3, 0.1]), np.array([0.9, 0.5, 0.7])
    b = GltfBuilder()
    facing_quad(b, masked_material(b, surface.tolist()), 1.0, 0.0, "stencil")
    facing_quad(b, emitter(b, "wall", wall.tolist()), 3.0, -1.0, "wall")
    film = render(tmp_path, b, camera_fitting([0, 0, 4], [0, 0, 0], [0, 1, 0], 1.0), size=16, bounces=0)
    np.testing.assert_allclose(film.mean(), expected_by_texel(surface, wall), rtol=1e-12, atol=0)


def test_a_floor_is_lit_through_the_mask_cut_outs(tmp_path):
    """Directional light straight down through the checker at y = 1 onto a floor at y = 0, seen
    from below the checker: lit (ρ E / π) under the cut-outs, 0 under the opaque texels."""
    rho, e = 0.5, 2.0
    b = GltfBuilder()
    b.add_node("floor", mesh=horizontal_quad(b, lambert(b, "floor", [rho] * 3), 5.0, 0.0))
    b.add_node("stencil", mesh=horizontal_quad(b, masked_material(b), 1.0, 1.0))
    sun(b, [0.0, 1.0, 0.0], e)
    film = render(tmp_path, b, camera_fitting([0, 0.5, 0], [0, 0, 0], [0, 0, -1], 1.0), size=16)
    np.testing.assert_allclose(film.mean(), expected_by_texel(0.0, rho * e / math.pi), rtol=1e-12, atol=0)


def blend_material(b: GltfBuilder, alpha: float, emission=None) -> int:
    return b.add_material("veil", base_color=[0.0, 0.0, 0.0, alpha], metallic=0.0, roughness=1.0,
                          emissive=emission, alpha_mode="BLEND")


@pytest.mark.parametrize("alpha", [0.3, 0.75])
def test_blend_shows_coverage_weighted_surface_and_background(tmp_path, alpha):
    """BLEND with alpha a in front of a wall: (1 − a) L_wall + a L_surface in expectation (glTF
    2.0 section 3.9.4: alpha is coverage, the "over" operator, Porter & Duff 1984)."""
    surface, wall = np.array([0.2, 0.3, 0.1]), np.array([0.9, 0.5, 0.7])
    b = GltfBuilder()
    facing_quad(b, blend_material(b, alpha, surface.tolist()), 1.0, 0.0, "veil")
    facing_quad(b, emitter(b, "wall", wall.tolist()), 3.0, -1.0, "wall")
    film = render(tmp_path, b, camera_fitting([0, 0, 4], [0, 0, 0], [0, 1, 0], 1.0), bounces=0, samples=128)
    assert_pooled(film, (1.0 - alpha) * wall + alpha * surface)


def test_a_floor_under_a_blend_surface_gets_the_uncovered_fraction(tmp_path):
    """Shadow rays through partial coverage a keep 1 − a of the light (coverage, as above)."""
    rho, e, alpha = 0.5, 2.0, 0.3
    b = GltfBuilder()
    b.add_node("floor", mesh=horizontal_quad(b, lambert(b, "floor", [rho] * 3), 5.0, 0.0))
    b.add_node("veil", mesh=horizontal_quad(b, blend_material(b, alpha), 50.0, 1.0))
    sun(b, [0.0, 1.0, 0.0], e)
    film = render(tmp_path, b, camera_fitting([0, 0.5, 0], [0, 0, 0], [0, 0, -1], 1.0))
    np.testing.assert_allclose(film.mean(), rho * e / math.pi * (1.0 - alpha), rtol=1e-12)


# --------------------------------------------------------------------------------------------
# 6. Emission: factor × sRGB texture × strength, and KHR_texture_transform


def test_emission_is_factor_times_decoded_texture_times_strength(tmp_path):
    """Seen directly, an emissive surface shows emissiveFactor × emissiveTexture ×
    emissiveStrength (glTF 2.0 section 3.9.2; KHR_materials_emissive_strength README), the
    texture decoded from sRGB (IEC 61966-2-1)."""
    byte = np.array([200, 120, 7], np.uint8)  # 7/255 sits on the linear segment of the sRGB curve
    factor, strength = np.array([0.5, 1.0, 0.8]), 4.0
    b = GltfBuilder()
    t = b.add_texture(b.add_image(np.tile(byte, (2, 2, 1))))
    facing_quad(b, emitter(b, "lamp", factor.tolist(), strength, emissive_tex=tex(t)), 2.0, 0.0, "lamp")
    film = render(tmp_path, b, "position = [0, 0, 4]\ntarget = [0, 0, 0]\nfov = 10", bounces=0)
    expected = factor * srgb_decode(byte) * strength
    np.testing.assert_allclose(film.mean(), np.broadcast_to(expected, film.mean().shape), rtol=1e-12)


BLOCKS = 4  # colour blocks per side of the transform test's texture
BLOCK_TEXELS = 4  # texels per block side


def block_image() -> np.ndarray:
    """(16, 16, 3) uint8: 4 × 4 blocks of 4 × 4 texels, block (R, C) coloured (30 + 60 C, 30 + 60 R, 100)."""
    r, c = np.indices((BLOCKS * BLOCK_TEXELS,) * 2) // BLOCK_TEXELS
    return np.stack([30 + 60 * c, 30 + 60 * r, np.full_like(r, 100)], axis=-1).astype(np.uint8)


@pytest.mark.parametrize("offset, scale, wrap", [
    ((0.5, 0.25), (0.5, 0.5), CLAMP_TO_EDGE),
    ((0.25, 0.5), (1.0, 1.0), REPEAT),
    ((0.125, 0.0), (1.5, 1.0), REPEAT),
])
def test_texture_transform_moves_the_texels_as_its_matrix_says(tmp_path, offset, scale, wrap):
    """KHR_texture_transform README: uv' = T(offset) R(rotation) S(scale) uv; with rotation 0
    u' = offset_u + scale_u u, v' = offset_v + scale_v v. The quad's UVs fill the view (pixel
    (i, j) covers u in [j, j+1]/16, v in [i, i+1]/16); a pixel whose whole footprint maps into
    the part of one colour block that bilinear filtering (glTF 2.0 section 3.8.4: texel centres
    at (k + 0.5)/n) reads from that block alone must show that block's colour."""
    factor, strength, size = np.array([1.0, 0.5, 0.25]), 2.0, 16
    img = block_image()
    b = GltfBuilder()
    t = b.add_texture(b.add_image(img), b.add_sampler(wrap, wrap))
    info = tex(t, transform=texture_transform(offset=offset, scale=scale))
    facing_quad(b, emitter(b, "atlas", factor.tolist(), strength, emissive_tex=info), 1.0, 0.0, "atlas")
    film = render(tmp_path, b, camera_fitting([0, 0, 4], [0, 0, 0], [0, 1, 0], 1.0), size=size, bounces=0)
    got = film.mean()
    n = BLOCKS * BLOCK_TEXELS
    checked = moved = 0
    for i in range(size):
        for j in range(size):
            block = []
            for axis, k in ((0, j), (1, i)):
                lo = (offset[axis] + scale[axis] * k / size) * n  # texel coordinates of the footprint
                hi = (offset[axis] + scale[axis] * (k + 1) / size) * n
                shift = math.floor(lo / n) * n if wrap == REPEAT else 0
                lo, hi = lo - shift, hi - shift
                q = math.floor(lo / BLOCK_TEXELS)
                inside = q * BLOCK_TEXELS + 0.5 <= lo and hi <= q * BLOCK_TEXELS + BLOCK_TEXELS - 0.5
                block.append(q if inside else None)
            if None in block:
                continue
            col, row = block
            expected = factor * srgb_decode(img[row * BLOCK_TEXELS, col * BLOCK_TEXELS]) * strength
            np.testing.assert_allclose(got[i, j], expected, rtol=1e-12, err_msg=f"pixel {i, j}")
            checked += 1
            moved += (row, col) != (i * BLOCKS // size, j * BLOCKS // size)
    assert checked >= 40 and moved >= 20  # many pixels checked, most of them moved by the transform
