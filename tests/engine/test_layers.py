"""Light-path layers and light groups (engine/layers.py, docs/shot-file.md `[output]`) through the
whole integrator, against the additive split of the path-space integral and closed forms.

* The split: every contribution goes whole into one light-path class and one light group, so
  each family of layers adds up to the beauty (the path integral as a sum over disjoint sets of
  paths, Veach 1997, PhD thesis, ch. 8), per pixel, to float rounding.
* Furnaces (a convex object in a uniform environment of radiance Le sends Le times its
  directional albedo, and nothing comes back to it): a Lambertian sphere's `diffuse_direct` is
  ρ·Le and its `diffuse_indirect` 0; a smooth glass sphere's `specular_direct` is F(θ)·Le with
  Fresnel's laws as Hecht gives them.
* Two sphere lights in two groups over a floor: each group's layer is its own lamp's
  configuration-factor radiance (Howell's catalogue, as test_radiometry.py uses it).

Standard errors of a layer come from batch means: the samples are rendered as B independent
batches (disjoint sample ranges of the independent sampler), and the spread of the B batch means
gives the standard error of their mean (the batch-means estimate; with B = 32 the 5-sigma bound
below leaves a false alarm per pixel near 2e-5 under Student's t with 31 degrees of freedom).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from .closed_forms import assert_within, fresnel_hecht, pinhole_rays, pixel_average, sphere_hit_cosine
from .scenes import load, shot_text, write_quad

ALL = ("diffuse_direct", "diffuse_indirect", "specular_direct", "specular_indirect",
       "transmission", "emission", "background")
LAYERS = '\n[output]\nlayers = ["' + '", "'.join(ALL) + '"]\nlight_groups = true\n'
BATCHES = 32
SIGMAS = 5.0


def _batches(shot, per_batch):
    """(whole film, {layer: (mean (h, w, 3), standard error (h, w, 3))}) from BATCHES batches of
    `per_batch` samples each, merged into the whole film."""
    from lampyr.engine.film import merge
    from lampyr.engine.render import render_frame

    films = [render_frame(shot, 1, b * per_batch, per_batch) for b in range(BATCHES)]
    whole = films[0]
    for f in films[1:]:
        whole = merge(whole, f)
    out = {}
    for name in whole.layer_names:
        means = np.stack([f.layer_mean(name) for f in films])
        out[name] = (means.mean(0), means.std(0, ddof=1) / math.sqrt(BATCHES))
    return whole, out


# --------------------------------------------------------------------------- the additive split

MIXED = """
[environment]
color = [0.3, 0.4, 0.5]
group = "sky"
[[material]]
name = "floor"
type = "plastic"
color = [0.5, 0.45, 0.4]
[[material]]
name = "glass"
type = "glass"
[[material]]
name = "metal"
type = "pbr"
metallic = 0.3
roughness = 0.4
[[material]]
name = "lamp"
type = "diffuse"
color = [0, 0, 0]
emission = [5, 4, 3]
group = "key"
[[light]]
name = "fill"
type = "point"
position = [1, 2, 1]
intensity = 3
group = "fill"
[[object]]
name = "floor"
material = "floor"
sphere = { center = [0, -100, 0], radius = 100 }
[[object]]
name = "ball"
material = "glass"
sphere = { center = [-0.6, 0.4, 0], radius = 0.4 }
[[object]]
name = "knob"
material = "metal"
sphere = { center = [0.6, 0.4, 0], radius = 0.4 }
[[object]]
name = "lamp"
material = "lamp"
sphere = { center = [0, 1.2, -1], radius = 0.3 }
"""
MIXED_CAMERA = "position = [0, 1, 4]\ntarget = [0, 0.5, 0]"


@pytest.fixture(scope="module")
def mixed(tmp_path_factory):
    from lampyr.engine.render import render_frame

    tmp = tmp_path_factory.mktemp("mixed")
    shot = load(tmp, shot_text(MIXED + LAYERS, width=16, height=16, samples=32, bounces=6,
                               camera=MIXED_CAMERA))
    return shot, render_frame(shot, 1)


def test_light_path_layers_add_up_to_the_beauty(mixed):
    # Veach 1997, ch. 8: disjoint sets of paths whose integrals add up to the whole
    _, film = mixed
    assert film.layer_names[:7] == ALL
    total = film.layers[:, :, :7].sum(axis=2)
    scale = np.abs(film.rgb_sum).max()
    assert np.abs(total - film.rgb_sum).max() <= 1e-12 * scale
    # and the split is not degenerate: this scene puts light into every class
    for i, name in enumerate(ALL):
        assert film.layers[:, :, i].sum() > 1e-3 * film.rgb_sum.sum(), name


def test_light_groups_add_up_to_the_beauty(mixed):
    shot, film = mixed
    assert shot.light_group_names() == ("fill", "key", "sky")
    assert film.layer_names[7:] == ("group_other", "group_fill", "group_key", "group_sky")
    groups = film.layers[:, :, 7:].sum(axis=2)
    assert np.abs(groups - film.rgb_sum).max() <= 1e-12 * np.abs(film.rgb_sum).max()
    # every emitter of this shot carries a group: nothing is left for group_other
    assert not film.layers[:, :, 7].any()
    for i in (8, 9, 10):
        assert film.layers[:, :, i].sum() > 1e-3 * film.rgb_sum.sum(), film.layer_names[i]


def test_layers_survive_the_frame_file(mixed, tmp_path):
    # the EXR keeps each layer as <name>.R/G/B means, and reading it back rebuilds the sums
    import OpenEXR

    from lampyr.engine.exr import read_frame, write_frame

    _, film = mixed
    path = tmp_path / "f.exr"
    write_frame(path, film, {"shot": "t"})
    with OpenEXR.File(str(path), separate_channels=True) as f:
        names = set(f.channels())
    for layer in film.layer_names:
        assert {f"{layer}.R", f"{layer}.G", f"{layer}.B"} <= names
    back, attrs = read_frame(path)
    assert back.layer_names == film.layer_names
    assert attrs["layers"] == ",".join(film.layer_names)
    # float32 means times the count: the sums to float32 rounding (IEEE 754 binary32, 2^-24)
    np.testing.assert_allclose(back.layers, film.layers, rtol=2e-7, atol=1e-12)


def test_layers_off_keep_no_layers_and_the_same_beauty(mixed, tmp_path):
    # layers cost nothing when off: the same beauty bits with and without them
    from lampyr.engine.render import render_frame

    _, film = mixed
    plain = load(tmp_path, shot_text(MIXED, width=16, height=16, samples=32, bounces=6,
                                     camera=MIXED_CAMERA))
    off = render_frame(plain, 1)
    assert off.layer_names == () and off.layers.shape == (16, 16, 0, 3)
    assert off.rgb_sum.tobytes() == film.rgb_sum.tobytes()
    assert off.rgb_sq.tobytes() == film.rgb_sq.tobytes()


# --------------------------------------------------------------------------- furnaces

LE = 0.75
SIZE = 16
EYE, FOV = (0.0, 0.0, 4.0), 34.0
CAMERA = f"position = {list(EYE)}\ntarget = [0, 0, 0]\nfov = {FOV}"


def _sphere_shot(tmp_path, material, per_batch):
    return load(tmp_path, shot_text(f"""
[environment]
color = [{LE}, {LE}, {LE}]
{material}
[[object]]
name = "ball"
material = "ball"
sphere = {{ center = [0, 0, 0], radius = 1.0 }}
""" + LAYERS, width=SIZE, height=SIZE, samples=BATCHES * per_batch, bounces=8, camera=CAMERA))


def _over_footprint(value_of_cos, miss_value):
    """Per pixel mean of value(cos θ) over the pixel's footprint (miss_value where the ray misses
    the unit sphere) on a 32 × 32 grid, and that grid's error (its change from 16 × 16)."""
    out = []
    for sub in (16, 32):
        cos = sphere_hit_cosine(EYE, pinhole_rays(SIZE, SIZE, EYE, (0, 0, 0), (0, 1, 0), FOV, sub),
                                (0, 0, 0), 1.0)
        miss = np.isnan(cos)
        out.append(pixel_average(np.where(miss, miss_value, value_of_cos(np.nan_to_num(cos, nan=1.0)))))
    return out[1], np.abs(out[1] - out[0])


def test_lambertian_sphere_in_a_furnace_is_all_diffuse_direct(tmp_path):
    # a convex Lambertian body in a uniform environment: Lo = ρ Le after one scattering event,
    # and no interreflection (convex), so diffuse_indirect = 0 exactly
    rho = 0.6
    shot = _sphere_shot(tmp_path, f'[[material]]\nname = "ball"\ntype = "diffuse"\ncolor = [{rho}, {rho}, {rho}]', 8)
    whole, layer = _batches(shot, 8)
    want, grid = _over_footprint(lambda c: rho * LE + 0 * c, 0.0)
    got, se = layer["diffuse_direct"]
    assert_within(got[..., 1], want, se[..., 1], SIGMAS, grid, "diffuse_direct")
    bg_want, bg_grid = _over_footprint(lambda c: 0 * c, LE)
    got, se = layer["background"]
    assert_within(got[..., 1], bg_want, se[..., 1], SIGMAS, bg_grid, "background")
    for name in ("diffuse_indirect", "specular_direct", "specular_indirect", "transmission", "emission"):
        assert not whole.layers[:, :, whole.layer_names.index(name)].any(), name


def test_smooth_glass_sphere_reflects_hecht_fresnel_into_specular_direct(tmp_path):
    # the light a smooth dielectric sphere reflects at its first surface goes straight back to the
    # environment: specular_direct = F(θ) Le, F from Fresnel's laws (Hecht, Optics, §4.6);
    # whatever enters the sphere is transmission
    ior = 1.5
    shot = _sphere_shot(tmp_path, f'[[material]]\nname = "ball"\ntype = "glass"\nior = {ior}\ncolor = [1, 1, 1]', 16)
    whole, layer = _batches(shot, 16)
    want, grid = _over_footprint(lambda c: fresnel_hecht(c, 1.0, ior) * LE, 0.0)
    got, se = layer["specular_direct"]
    # a pixel that sees the sphere whole has F Le with Var = F (1 − F) Le² per sample (the lobe is
    # chosen with probability F); the model's standard error bounds a batch-means one that happened
    # to come out small
    f = fresnel_hecht(np.ones(1), 1.0, ior)[0]
    model_se = math.sqrt(f * (1 - f)) * LE / math.sqrt(BATCHES * 16)
    assert_within(got[..., 0], want, np.maximum(se[..., 0], model_se * (want > 0)), SIGMAS, grid,
                  "specular_direct")
    assert layer["transmission"][0].sum() > 0
    for name in ("diffuse_direct", "diffuse_indirect", "emission"):
        assert not whole.layers[:, :, whole.layer_names.index(name)].any(), name


# --------------------------------------------------------------------------- light groups

def test_two_sphere_lights_in_two_groups_each_follow_their_configuration_factor(tmp_path):
    # A planar element facing a sphere of radius r at centre distance D, the sphere wholly above
    # its plane, sees F = (r/D)² cos θ (the planar-element-to-sphere case of Howell's catalogue of
    # configuration factors, from memory, as in test_radiometry.py); a Lambertian floor of albedo
    # ρ under a lamp of radiance L leaves ρ L (r/D)² cos θ, and each group's layer holds its lamp's
    rho, r = 0.6, 0.25
    lamps = {"warm": (np.array([1.5, 1.0, 0.0]), 10.0), "cool": (np.array([-1.2, 1.2, 0.5]), 6.0)}
    write_quad(tmp_path / "floor.obj", half=20.0)
    body = f'[[material]]\nname = "floor"\ntype = "diffuse"\ncolor = [{rho}, {rho}, {rho}]\n'
    body += '[[object]]\nname = "floor"\nmaterial = "floor"\nmesh = "floor.obj"\n'
    for name, (c, L) in lamps.items():
        body += (f'[[material]]\nname = "{name}"\ntype = "diffuse"\ncolor = [0, 0, 0]\n'
                 f'emission = [{L}, {L}, {L}]\ngroup = "{name}"\n'
                 f'[[object]]\nname = "{name}"\nmaterial = "{name}"\n'
                 f'sphere = {{ center = [{c[0]}, {c[1]}, {c[2]}], radius = {r} }}\n')
    camera = "position = [0, 4, 0]\ntarget = [0, 0, 0]\nup = [0, 0, -1]\nfov = 60"
    n = 24
    shot = load(tmp_path, shot_text(body + "\n[output]\nlight_groups = true\n", width=n, height=n,
                                    samples=BATCHES * 8, bounces=1, camera=camera))
    whole, layer = _batches(shot, 8)
    assert whole.layer_names == ("group_other", "group_cool", "group_warm")
    assert not whole.layers[:, :, 0].any()  # no ungrouped emitter

    tan_half = math.tan(math.radians(60) / 2)
    sub = (np.arange(16) + 0.5) / 16  # the pixel's footprint, sampled finely

    def floor_points(px, py):
        # camera looks down −y from height 4 with up = −z: raster x → +x, raster y → +z
        sx = (2 * (px + sub[None, :]) / n - 1) * tan_half
        sy = (1 - 2 * (py + sub[:, None]) / n) * tan_half
        return np.stack(np.broadcast_arrays(4.0 * sx, 0.0 * sx, -4.0 * sy), -1)

    def clear(p, c, other):
        # no ray from the footprint to the lamp comes near the other lamp, and the camera does not
        # see a lamp over the footprint (distances from the segments, elementary geometry)
        def seg_dist(a, b, q):
            ab = b - a
            t = np.clip(np.sum((q - a) * ab, -1) / np.sum(ab * ab, -1), 0, 1)
            return np.linalg.norm(a + t[..., None] * ab - q, axis=-1)
        eye = np.array([0.0, 4.0, 0.0])
        return (np.all(seg_dist(p, c[None, None], other) > 2.05 * r)
                and all(np.all(seg_dist(np.broadcast_to(eye, p.shape), p, q) > 1.05 * r)
                        for q, _ in lamps.values()))

    gots, wants, ses = [], [], []
    for name, (c, L) in lamps.items():
        other = [q for k, (q, _) in lamps.items() if k != name][0]
        got, se = layer[f"group_{name}"]
        for py in range(1, n, 3):
            for px in range(1, n, 3):
                p = floor_points(px, py)
                if not clear(p, c, other):
                    continue
                to_c = c - p
                d = np.linalg.norm(to_c, axis=-1)
                want = float(np.mean(rho * L * (r / d) ** 2 * (to_c[..., 1] / d)))
                gots.append(got[py, px, 1])
                wants.append(want)
                ses.append(se[py, px, 1])
    assert len(gots) >= 40
    # green only: the grey scene's channels are one estimate, not three independent ones
    assert_within(np.array(gots), np.array(wants), np.array(ses), SIGMAS, 0.0, "group layers")


def test_the_scene_files_light_and_emissive_material_take_groups_by_name(tmp_path):
    # [output] groups names a KHR_lights_punctual light (by its name) and an emissive material of
    # the scene file; each group's layer then holds that emitter's light, and the family still
    # adds up to the beauty (Veach 1997, ch. 8)
    from examples.gltf_builder import GltfBuilder
    from lampyr.engine.render import render_frame

    from .gltf_files import QUAD_FACES, QUAD_NORMALS, QUAD_POSITIONS, QUAD_UVS, save_valid

    b = GltfBuilder()
    paint = b.add_material("paint", base_color=[0.6, 0.6, 0.6, 1.0], metallic=0.0, roughness=1.0)
    glow = b.add_material("glow", base_color=[0, 0, 0, 1], emissive=[1.0, 0.8, 0.5])
    for name, mat, at, size in (("floor", paint, [-3, -3, 0], 6), ("panel", glow, [1, 1, 1], 0.5)):
        mesh = b.add_mesh([b.primitive(QUAD_POSITIONS, QUAD_NORMALS, QUAD_UVS, indices=QUAD_FACES,
                                       material=mat)], name=name)
        b.add_node(name, mesh=mesh, translation=at, scale=[size, size, 1])
    b.add_node("lamp", light=b.add_light("point", intensity=5.0, name="bulb"), translation=[-1, 0, 2])
    save_valid(b, tmp_path / "scene.glb")
    text = 'scene = "scene.glb"\n' + shot_text(
        '\n[output]\nlight_groups = true\ngroups = { bulb = "key", glow = "panel" }\n',
        camera="position = [0, 0, 5]\ntarget = [0, 0, 0]", samples=16)
    film = render_frame(load(tmp_path, text), 1)
    assert film.layer_names == ("group_other", "group_key", "group_panel")
    assert not film.layers[:, :, 0].any()
    assert film.layers[:, :, 1].sum() > 0 and film.layers[:, :, 2].sum() > 0
    assert np.abs(film.layers.sum(axis=2) - film.rgb_sum).max() <= 1e-12 * film.rgb_sum.max()


def test_a_bad_layer_or_group_name_is_one_line_naming_the_key(tmp_path):
    from lampyr.errors import ShotError

    with pytest.raises(ShotError, match=r"output\.layers: expected a list of distinct layer names"):
        load(tmp_path, shot_text('[output]\nlayers = ["diffuse", "emission"]'))
    with pytest.raises(ShotError, match=r"material\[m\]\.group: expected a light group name"):
        load(tmp_path, shot_text('[[material]]\nname = "m"\ntype = "diffuse"\ngroup = "other"'))


@pytest.mark.parametrize("kind", ["plastic", "pbr"])
def test_the_diffuse_share_is_the_whole_bsdf_where_only_the_base_is_non_delta(kind):
    # layers.diffuse_part writes the base terms of lobes.py and pbr.py again: with a smooth coat
    # (plastic) or a smooth specular layer (glTF, no clearcoat or transmission) the non-delta BSDF
    # is the base alone, so the two must agree; a rough coat adds a specular part on top
    from lampyr.engine.bsdf import PLASTIC, bsdf_eval, material_row
    from lampyr.engine.layers import diffuse_part
    from lampyr.engine.pbr import pbr_row

    rng = np.random.default_rng(5)
    for rough in (0.0, 0.5):
        row = (material_row(PLASTIC, [0.7, 0.4, 0.2], rough, 1.5) if kind == "plastic"
               else pbr_row(base=(0.7, 0.4, 0.2), metallic=0.0, roughness=rough))
        for _ in range(50):
            wo, wi = rng.normal(size=(2, 3))
            wo, wi = np.abs(wo) / np.linalg.norm(wo), np.abs(wi) / np.linalg.norm(wi)
            f = np.array(bsdf_eval(row, *wo, *wi)[:3])
            d = np.array(diffuse_part(row, wo[2], wi[2]))
            if rough == 0.0:
                np.testing.assert_allclose(d, f, rtol=1e-12)
            else:
                assert np.all(d > 0) and np.all(d < f)
