"""read_gltf: materials, the KHR_materials_* extensions, textures, samplers and images.

Expected values: the glTF 2.0 specification (Khronos, 2021) section 3.9 for material defaults and
3.8 for textures, samplers and images; each extension's README for its properties and defaults.
Every file passes the Khronos glTF-Validator before it is read.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from examples.gltf_builder import (CLAMP_TO_EDGE, MIRRORED_REPEAT, REPEAT, GltfBuilder, tex,
                                   texture_transform)
from lampyr.engine.gltf_materials import uv_transform_matrix
from lampyr.engine.gltf_read import read_gltf
from lampyr.engine.scene_data import (ALPHA_BLEND, ALPHA_MASK, ALPHA_OPAQUE, WRAP_CLAMP, WRAP_MIRROR,
                                      WRAP_REPEAT)
from tests.engine.gltf_files import QUAD_FACES, QUAD_NORMALS, QUAD_POSITIONS, QUAD_UVS, quad_scene, save_valid

CHECKER = np.zeros((4, 6, 4), np.uint8)  # rows top to bottom; each pixel distinct
CHECKER[..., 0] = np.arange(4)[:, None] * 60
CHECKER[..., 1] = np.arange(6)[None, :] * 40
CHECKER[..., 2] = 200
CHECKER[..., 3] = 255


def _material(tmp_path, name="m.glb", **kw):
    return read_gltf(save_valid(quad_scene(**kw), tmp_path / name), "scene").materials[0]


def _textured(tmp_path, store="buffer", sampler=None, ext="glb", **tex_kw):
    b = GltfBuilder()
    img = b.add_image(CHECKER, store=store, uri="maps/stone wall.png" if store == "file" else None)
    t = b.add_texture(img, b.add_sampler(**sampler) if sampler is not None else None)
    mat = b.add_material("textured", base_color_tex=tex(t, **tex_kw))
    prim = b.primitive(QUAD_POSITIONS, QUAD_NORMALS, QUAD_UVS, QUAD_UVS, indices=QUAD_FACES, material=mat)
    b.add_node("n", mesh=b.add_mesh([prim]))
    return read_gltf(save_valid(b, tmp_path / f"t.{ext}"), "scene")


# ------------------------------------------------------------------------------------ materials


def test_empty_material_has_the_specs_defaults(tmp_path):
    # spec 3.9.2 / the material schema: baseColorFactor 1, metallic 1, roughness 1, emissive 0,
    # alphaMode OPAQUE, alphaCutoff 0.5, doubleSided false
    m = _material(tmp_path)
    np.testing.assert_array_equal(m.base_color, [1, 1, 1, 1])
    np.testing.assert_array_equal(m.emissive, [0, 0, 0])
    assert (m.metallic, m.roughness, m.alpha_mode, m.alpha_cutoff, m.double_sided) == (1.0, 1.0, ALPHA_OPAQUE, 0.5, False)
    assert m.base_color_tex is None and m.normal_tex is None and m.name == "quad material"


def test_metallic_roughness_factors_and_flags(tmp_path):
    m = _material(tmp_path, base_color=(0.5, 0.25, 0.125, 0.75), metallic=0.25, roughness=0.5,
                  emissive=(1.0, 0.5, 0.0), alpha_mode="MASK", alpha_cutoff=0.25, double_sided=True)
    np.testing.assert_array_equal(m.base_color, [0.5, 0.25, 0.125, 0.75])
    np.testing.assert_array_equal(m.emissive, [1.0, 0.5, 0.0])
    assert (m.metallic, m.roughness, m.alpha_mode, m.alpha_cutoff, m.double_sided) == (0.25, 0.5, ALPHA_MASK, 0.25, True)


def test_alpha_mode_blend(tmp_path):
    assert _material(tmp_path, alpha_mode="BLEND").alpha_mode == ALPHA_BLEND


@pytest.mark.parametrize("name, block, expected", [
    # each extension's README: property names and their meaning
    ("KHR_materials_emissive_strength", {"emissiveStrength": 7.5}, {"emissive_strength": 7.5}),
    ("KHR_materials_ior", {"ior": 1.33}, {"ior": 1.33}),
    ("KHR_materials_transmission", {"transmissionFactor": 0.9}, {"transmission": 0.9}),
    ("KHR_materials_volume", {"thicknessFactor": 0.02, "attenuationDistance": 0.5,
                              "attenuationColor": [0.5, 0.75, 1.0]},
     {"thickness": 0.02, "attenuation_distance": 0.5, "attenuation_color": [0.5, 0.75, 1.0]}),
    ("KHR_materials_clearcoat", {"clearcoatFactor": 0.8, "clearcoatRoughnessFactor": 0.1},
     {"clearcoat": 0.8, "clearcoat_roughness": 0.1}),
    ("KHR_materials_specular", {"specularFactor": 0.3, "specularColorFactor": [1.0, 0.5, 0.25]},
     {"specular": 0.3, "specular_color": [1.0, 0.5, 0.25]}),
])
def test_material_extensions_are_read(tmp_path, name, block, expected):
    extensions = {name: block}
    if name == "KHR_materials_volume":  # the volume extension is meant with transmission (its README)
        extensions["KHR_materials_transmission"] = {"transmissionFactor": 1.0}
    m = _material(tmp_path, extensions=extensions)
    for field, value in expected.items():
        np.testing.assert_array_equal(getattr(m, field), value, err_msg=field)


@pytest.mark.parametrize("name, expected", [
    # defaults from each README
    ("KHR_materials_emissive_strength", {"emissive_strength": 1.0}),
    ("KHR_materials_ior", {"ior": 1.5}),
    ("KHR_materials_transmission", {"transmission": 0.0}),
    ("KHR_materials_volume", {"thickness": 0.0, "attenuation_distance": math.inf, "attenuation_color": [1, 1, 1]}),
    ("KHR_materials_clearcoat", {"clearcoat": 0.0, "clearcoat_roughness": 0.0}),
    ("KHR_materials_specular", {"specular": 1.0, "specular_color": [1, 1, 1]}),
])
def test_empty_extension_blocks_give_the_extensions_defaults(tmp_path, name, expected):
    m = _material(tmp_path, extensions={name: {}})
    for field, value in expected.items():
        np.testing.assert_array_equal(getattr(m, field), value, err_msg=field)


def test_extension_textures_are_read(tmp_path):
    b = quad_scene()
    t = b.add_texture(b.add_image(CHECKER))
    b.doc["materials"][0]["extensions"] = {
        "KHR_materials_transmission": {"transmissionTexture": tex(t)},
        "KHR_materials_clearcoat": {"clearcoatTexture": tex(t), "clearcoatRoughnessTexture": tex(t)},
        "KHR_materials_specular": {"specularTexture": tex(t), "specularColorTexture": tex(t)},
    }
    m = read_gltf(save_valid(b, tmp_path / "x.glb"), "scene").materials[0]
    for field in ("transmission_tex", "clearcoat_tex", "clearcoat_roughness_tex", "specular_tex", "specular_color_tex"):
        assert getattr(m, field).image == 0, field


def test_occlusion_texture_is_ignored_and_needs_no_image_decoding(tmp_path):
    # a path tracer computes occlusion itself (issue 11); the texture is not decoded
    b = quad_scene()
    b.doc["materials"][0]["occlusionTexture"] = tex(b.add_texture(b.add_image(CHECKER)))
    scene = read_gltf(save_valid(b, tmp_path / "o.glb"), "scene")
    assert scene.images == ()


# ------------------------------------------------------------------------------------ textures


@pytest.mark.parametrize("store, ext", [("buffer", "glb"), ("data", "gltf"), ("file", "gltf")])
def test_images_decode_to_rgba_with_row_0_the_first_row(tmp_path, store, ext):
    # spec 3.8.2: UV (0, 0) is the first pixel of the image; PNG keeps it as row 0
    scene = _textured(tmp_path, store=store, ext=ext)
    assert len(scene.images) == 1
    np.testing.assert_array_equal(scene.images[0].rgba, CHECKER)
    assert scene.images[0].rgba.dtype == np.uint8 and scene.images[0].rgba.shape == (4, 6, 4)


def test_rgb_png_gets_opaque_alpha_and_jpeg_decodes(tmp_path):
    flat = np.full((8, 8, 3), (200, 100, 50), np.uint8)
    b = quad_scene()
    b.doc["materials"][0]["pbrMetallicRoughness"] = {
        "baseColorTexture": tex(b.add_texture(b.add_image(flat))),
        "metallicRoughnessTexture": tex(b.add_texture(b.add_image(flat, mime="image/jpeg")))}
    scene = read_gltf(save_valid(b, tmp_path / "j.glb"), "scene")
    png, jpeg = scene.images
    np.testing.assert_array_equal(png.rgba[..., :3], flat)
    np.testing.assert_array_equal(png.rgba[..., 3], 255)
    # a flat colour survives JPEG to within a few levels (rule of thumb for baseline JPEG)
    assert np.abs(jpeg.rgba[..., :3].astype(int) - flat).max() <= 3


def test_an_image_used_by_many_textures_is_decoded_once(tmp_path):
    b = quad_scene()
    img = b.add_image(CHECKER)
    t1, t2 = b.add_texture(img), b.add_texture(img, b.add_sampler(CLAMP_TO_EDGE, CLAMP_TO_EDGE))
    b.doc["materials"][0]["pbrMetallicRoughness"] = {"baseColorTexture": tex(t1), "metallicRoughnessTexture": tex(t2)}
    b.doc["materials"][0]["emissiveTexture"] = tex(t2)
    scene = read_gltf(save_valid(b, tmp_path / "once.glb"), "scene")
    m = scene.materials[0]
    assert len(scene.images) == 1
    assert m.base_color_tex.image == m.metallic_roughness_tex.image == m.emissive_tex.image == 0


@pytest.mark.parametrize("sampler, expected", [
    (None, (WRAP_REPEAT, WRAP_REPEAT)),  # spec 3.8.4: no sampler -> repeat wrapping
    ({}, (WRAP_REPEAT, WRAP_REPEAT)),  # sampler schema: wrapS / wrapT default 10497 REPEAT
    ({"wrap_s": CLAMP_TO_EDGE, "wrap_t": MIRRORED_REPEAT}, (WRAP_CLAMP, WRAP_MIRROR)),
    ({"wrap_s": MIRRORED_REPEAT, "wrap_t": REPEAT}, (WRAP_MIRROR, WRAP_REPEAT)),
])
def test_sampler_wrap_modes(tmp_path, sampler, expected):
    ref = _textured(tmp_path, sampler=sampler).materials[0].base_color_tex
    assert (ref.wrap_s, ref.wrap_t) == expected


def test_normal_texture_keeps_its_scale_and_uv_set(tmp_path):
    b = quad_scene()
    b.doc["materials"][0]["normalTexture"] = tex(b.add_texture(b.add_image(CHECKER)), texcoord=1, scale=0.4)
    b.doc["meshes"][0]["primitives"][0]["attributes"]["TEXCOORD_1"] = b.add_accessor(QUAD_UVS, type="VEC2")
    ref = read_gltf(save_valid(b, tmp_path / "n.glb"), "scene").materials[0].normal_tex
    assert (ref.scale, ref.texcoord) == (0.4, 1)


def test_texture_without_transform_has_identity_uv_matrix(tmp_path):
    ref = _textured(tmp_path).materials[0].base_color_tex
    np.testing.assert_array_equal(ref.uv_transform, [[1, 0, 0], [0, 1, 0]])


def test_texture_transform_is_offset_rotation_scale_as_the_readme_defines(tmp_path):
    offset, rotation, scale = (0.25, -0.5), 0.3, (2.0, 3.0)
    ref = _textured(tmp_path, transform=texture_transform(offset, rotation, scale)).materials[0].base_color_tex
    # KHR_texture_transform README: uv' = T(offset) R(rotation) S(scale) uv, with
    # R = [[cos, sin], [-sin, cos]] (its GLSL listing read row by row), multiplied out by hand
    c, s = math.cos(rotation), math.sin(rotation)
    expected = [[c * 2.0, s * 3.0, 0.25], [-s * 2.0, c * 3.0, -0.5]]
    np.testing.assert_allclose(ref.uv_transform, expected, rtol=1e-15, atol=1e-16)


def test_texture_transform_readme_example_uses_the_lower_left_quadrant():
    # KHR_texture_transform README, "Example JSON": offset (0, 1), rotation pi/2, scale 0.5
    # "utilizes only the lower left quadrant of the source image" (v grows downwards: v in [0.5, 1])
    m = uv_transform_matrix((0.0, 1.0), 1.57079632679, (0.5, 0.5))
    corners = np.array([[0, 0, 1], [1, 0, 1], [1, 1, 1], [0, 1, 1]], float)
    uv = corners @ m.T
    assert uv[:, 0].min() == pytest.approx(0.0, abs=1e-9) and uv[:, 0].max() == pytest.approx(0.5, abs=1e-9)
    assert uv[:, 1].min() == pytest.approx(0.5, abs=1e-9) and uv[:, 1].max() == pytest.approx(1.0, abs=1e-9)


def test_texture_transform_texcoord_overrides_the_texture_infos(tmp_path):
    # KHR_texture_transform README: texCoord "Overrides the textureInfo texCoord value if supplied"
    ref = _textured(tmp_path, texcoord=0, transform=texture_transform(texcoord=1)).materials[0].base_color_tex
    assert ref.texcoord == 1
