"""read_gltf on broken or unsupported files: one AssetError line naming the file and the glTF path.

Each broken file starts as a valid one (Khronos glTF-Validator: 0 errors) and is then damaged in
one place; where the damage makes the file invalid glTF, the validator is asked to agree that it
is broken, so the test does not rest on lampyr's own reading of the spec alone.
"""

from __future__ import annotations

import json
from io import BytesIO

import numpy as np
import pytest
from PIL import Image

from examples.gltf_builder import (FLOAT, LINE_LOOP, LINE_STRIP, LINES, POINTS, UNSIGNED_INT, GltfBuilder, jpeg_bytes,
                                   png_bytes, tex)
from lampyr.engine.gltf_read import read_gltf
from lampyr.errors import AssetError
from tests.engine.gltf_files import (QUAD_FACES, QUAD_POSITIONS, QUAD_UVS, quad_scene, rewrite_json,
                                     save_valid, validator_pointers)

PIXELS = np.full((2, 2, 4), 128, np.uint8)


def _error(path, key="object[lamp].mesh", shown=None) -> str:
    with pytest.raises(AssetError) as info:
        read_gltf(path, key, shown)
    text = str(info.value)
    assert "\n" not in text, text
    assert text.startswith(f"{key}: "), text
    return text


def _two_primitives(tmp_path, ext="gltf"):
    b = GltfBuilder()
    prims = [b.primitive(QUAD_POSITIONS, indices=QUAD_FACES), b.primitive(QUAD_POSITIONS + 1.0, indices=QUAD_FACES)]
    b.add_node("n", mesh=b.add_mesh(prims))
    return save_valid(b, tmp_path / f"two.{ext}")


def _textured(tmp_path, **image):
    b = quad_scene()
    img = b.add_image(PIXELS, **image)
    b.doc["materials"][0]["pbrMetallicRoughness"] = {"baseColorTexture": tex(b.add_texture(img))}
    b.doc["meshes"][0]["primitives"][0]["attributes"]["TEXCOORD_0"] = b.add_accessor(QUAD_UVS, type="VEC2")
    return b


# ------------------------------------------------------------------------------------ whole files


@pytest.mark.parametrize("name, content", [
    ("junk.glb", bytes(range(256)) * 4),
    ("junk.gltf", b"{ this is not json"),
    ("empty.glb", b""),
    ("list.gltf", b"[1, 2, 3]"),
])
def test_unreadable_file_is_one_line_naming_it(tmp_path, name, content):
    (tmp_path / name).write_bytes(content)
    assert f'"{name}"' in _error(tmp_path / name)


def test_truncated_glb_says_so(tmp_path):
    path = save_valid(quad_scene(), tmp_path / "cut.glb")
    path.write_bytes(path.read_bytes()[:-10])
    assert "truncated" in _error(path)


def test_missing_file(tmp_path):
    assert '"gone.glb"' in _error(tmp_path / "gone.glb")


def test_shown_name_replaces_the_path_in_messages(tmp_path):
    (tmp_path / "x.glb").write_bytes(b"nonsense")
    text = _error(tmp_path / "x.glb", key="scene", shown="assets/x.glb")
    assert '"assets/x.glb"' in text and str(tmp_path) not in text


# ------------------------------------------------------------------------------------ geometry


@pytest.mark.parametrize("mode, name", [(POINTS, "POINTS"), (LINES, "LINES"), (LINE_LOOP, "LINE_LOOP"),
                                        (LINE_STRIP, "LINE_STRIP")])
def test_non_triangle_primitive_is_refused_naming_the_mode(tmp_path, mode, name):
    b = GltfBuilder()
    b.add_node("n", mesh=b.add_mesh([b.primitive(QUAD_POSITIONS, indices=QUAD_FACES),
                                     b.primitive(QUAD_POSITIONS, indices=[0, 1, 2, 3], mode=mode)]))
    path = save_valid(b, tmp_path / "lines.glb")  # a valid glTF file, only not one lampyr renders
    text = _error(path)
    assert '"lines.glb" meshes[0].primitives[1].mode' in text and name in text


def test_index_out_of_range(tmp_path):
    path = _two_primitives(tmp_path)
    bin_path = tmp_path / "two.bin"
    doc = json.loads(path.read_text())
    acc = doc["accessors"][doc["meshes"][0]["primitives"][1]["indices"]]
    view = doc["bufferViews"][acc["bufferView"]]
    data = bytearray(bin_path.read_bytes())
    data[view["byteOffset"]: view["byteOffset"] + 2] = (9).to_bytes(2, "little")  # vertex 9 of 4
    bin_path.write_bytes(bytes(data))
    text = _error(path)
    assert '"two.gltf" meshes[0].primitives[1].indices' in text and "below the vertex count 4" in text
    assert validator_pointers(path)  # the Khronos validator finds the file broken too


def test_accessor_longer_than_its_buffer_view(tmp_path):
    path = _two_primitives(tmp_path)

    def grow(doc):
        doc["accessors"][doc["meshes"][0]["primitives"][1]["indices"]]["count"] = 600

    rewrite_json(path, grow)
    index = json.loads(path.read_text())["meshes"][0]["primitives"][1]["indices"]
    text = _error(path)
    assert f'"two.gltf" accessors[{index}]' in text and "bytes" in text
    assert any(p.startswith(f"/accessors/{index}") for p in validator_pointers(path))


def test_buffer_file_shorter_than_its_byte_length(tmp_path):
    path = _two_primitives(tmp_path)
    (tmp_path / "two.bin").write_bytes((tmp_path / "two.bin").read_bytes()[:20])
    assert '"two.gltf" buffers[0]' in _error(path)
    assert validator_pointers(path)


def test_missing_buffer_file(tmp_path):
    path = _two_primitives(tmp_path)
    (tmp_path / "two.bin").unlink()
    assert '"two.gltf" buffers[0].uri' in _error(path)


def test_nan_position(tmp_path):
    pos = QUAD_POSITIONS.copy()
    pos[2, 1] = np.nan
    b = GltfBuilder()
    b.add_node("n", mesh=b.add_mesh([b.primitive(pos, indices=QUAD_FACES)]))
    path = b.save(tmp_path / "nan.glb")
    text = _error(path)
    assert '"nan.glb" meshes[0].primitives[0].attributes.POSITION' in text and "vertex 2" in text


def test_mesh_with_fewer_morph_targets_in_one_primitive(tmp_path):
    b = GltfBuilder()
    b.add_node("n", mesh=b.add_mesh([
        b.primitive(QUAD_POSITIONS, indices=QUAD_FACES, targets=[{"POSITION": QUAD_POSITIONS}]),
        b.primitive(QUAD_POSITIONS, indices=QUAD_FACES)]))
    path = b.save(tmp_path / "morph.glb")
    assert '"morph.glb" meshes[0].primitives[1].targets' in _error(path)
    assert validator_pointers(path)


# ------------------------------------------------------------------------------------ textures


def test_missing_texture_file(tmp_path):
    path = save_valid(_textured(tmp_path, store="file", uri="tex/wall.png"), tmp_path / "t.gltf")
    (tmp_path / "tex" / "wall.png").unlink()
    text = _error(path)
    assert '"t.gltf" images[0].uri' in text and '"tex/wall.png"' in text


@pytest.mark.parametrize("store, where", [("file", "images[0].uri"), ("buffer", "images[0].bufferView"),
                                          ("data", "images[0].uri")])
def test_undecodable_texture(tmp_path, store, where):
    ext = "glb" if store == "buffer" else "gltf"
    b = _textured(tmp_path, data=b"\x89PNG\r\n\x1a\n but then nothing a PNG holds", store=store, uri="bad.png")
    path = b.save(tmp_path / f"t.{ext}")
    assert f'"t.{ext}" {where}' in _error(path)
    assert validator_pointers(path)


def test_jpeg_bytes_under_a_png_name_still_decode(tmp_path):
    # the bytes decide (Pillow reads the signature), as PNG and JPEG signatures do not overlap
    b = _textured(tmp_path, data=jpeg_bytes(np.full((4, 4, 3), 90, np.uint8)), store="file", uri="a.png")
    scene = read_gltf(b.save(tmp_path / "t.gltf"), "scene")
    assert scene.images[0].rgba.shape == (4, 4, 4)


def test_texture_in_another_format_is_refused(tmp_path):
    out = BytesIO()
    Image.fromarray(PIXELS).save(out, format="BMP")
    path = _textured(tmp_path, data=out.getvalue(), store="file", uri="a.bmp").save(tmp_path / "t.gltf")
    text = _error(path)
    assert '"t.gltf" images[0].uri' in text and "PNG or JPEG" in text and "BMP" in text


@pytest.mark.parametrize("uri", ["../outside.png", "maps/../../outside.png", "/etc/outside.png",
                                 "file:///etc/outside.png", "%2E%2E/outside.png"])
def test_texture_outside_the_files_folder_is_refused(tmp_path, uri):
    inner = tmp_path / "scene"
    inner.mkdir()
    (tmp_path / "outside.png").write_bytes(png_bytes(PIXELS))
    b = _textured(tmp_path, data=png_bytes(PIXELS), store="file", uri="x.png")
    path = b.save(inner / "t.gltf")
    rewrite_json(path, lambda doc: doc["images"][0].update(uri=uri))
    text = _error(path)
    assert '"t.gltf" images[0].uri' in text and ("inside" in text or "relative" in text)


# ------------------------------------------------------------------------------------ extensions


def test_unsupported_required_extension_is_refused_by_name(tmp_path):
    b = quad_scene()
    b.require_extension("KHR_draco_mesh_compression")
    path = b.save(tmp_path / "draco.glb")
    text = _error(path)
    assert '"draco.glb" extensionsRequired' in text and "KHR_draco_mesh_compression" in text


def test_supported_required_extension_is_accepted(tmp_path):
    b = quad_scene(extensions={"KHR_materials_ior": {"ior": 1.7}})
    b.require_extension("KHR_materials_ior")
    assert read_gltf(save_valid(b, tmp_path / "ior.glb"), "scene").materials[0].ior == 1.7


def test_unsupported_optional_extensions_are_listed_not_refused(tmp_path):
    b = quad_scene(extensions={"KHR_materials_sheen": {"sheenColorFactor": [1, 0, 0]},
                               "KHR_materials_ior": {"ior": 1.4}})
    b.use_extension("EXT_meshopt_compression")
    scene = read_gltf(save_valid(b, tmp_path / "opt.glb"), "scene")
    assert scene.extensions_ignored == ("EXT_meshopt_compression", "KHR_materials_sheen")


# ------------------------------------------------------------------------------------ structure


def test_node_with_two_parents_is_refused(tmp_path):
    b = GltfBuilder()
    a, c, child = b.add_node("a"), b.add_node("c"), b.add_node("child")
    b.add_child(a, child)
    b.add_scene([a, c])
    path = b.save(tmp_path / "tree.gltf")
    rewrite_json(path, lambda doc: doc["nodes"][c].update(children=[child]))
    text = _error(path)
    assert f'"tree.gltf" nodes[{c}].children' in text and "one parent" in text
    assert validator_pointers(path)  # spec 3.5.3: the hierarchy must be disjoint strict trees


def test_node_loop_is_refused(tmp_path):
    b = GltfBuilder()
    a, c = b.add_node("a"), b.add_node("c")
    b.add_child(a, c)
    b.add_child(c, a)
    b.doc["scenes"] = [{"nodes": []}]
    path = b.save(tmp_path / "loop.gltf")
    assert '"loop.gltf" nodes[0].children' in _error(path)
    assert validator_pointers(path)


def test_key_times_that_go_backwards_are_refused(tmp_path):
    b = GltfBuilder()
    b.add_node("n")
    b.add_animation([(0, "translation", [0.0, 1.0, 0.5], np.zeros((3, 3)), "LINEAR")])
    path = b.save(tmp_path / "anim.glb")
    assert '"anim.glb" animations[0].samplers[0].input' in _error(path)
    assert validator_pointers(path)


def test_animation_output_of_the_wrong_length_is_refused(tmp_path):
    b = GltfBuilder()
    b.add_node("n")
    b.add_animation([(0, "translation", [0.0, 1.0], np.zeros((2, 3)), "LINEAR")])
    b.doc["animations"][0]["samplers"][0]["output"] = b.add_accessor(np.zeros((3, 3)), type="VEC3")
    path = b.save(tmp_path / "anim.glb")
    text = _error(path)
    assert '"anim.glb" animations[0].samplers[0].output' in text and "2 keys" in text
    assert validator_pointers(path)


def test_sparse_index_past_the_accessors_count_is_refused(tmp_path):
    b = GltfBuilder()
    b.doc["accessors"] = [{"componentType": FLOAT, "count": 2, "type": "SCALAR", "sparse": {
        "count": 1, "indices": {"bufferView": b.add_buffer_view(np.array([5], np.uint32).tobytes()),
                                "componentType": UNSIGNED_INT},
        "values": {"bufferView": b.add_buffer_view(np.array([1.0], np.float32).tobytes())}}}]
    b.add_node("n")
    b.add_animation([(0, "translation", [0.0, 1.0], np.zeros((2, 3)), "LINEAR")])
    b.doc["animations"][0]["samplers"][0]["input"] = 0
    path = b.save(tmp_path / "sparse.glb")
    text = _error(path)
    assert '"sparse.glb" accessors[0].sparse.indices' in text and "below the accessor's count 2" in text
    assert validator_pointers(path)


def test_byte_stride_shorter_than_an_element_is_refused(tmp_path):
    path = _two_primitives(tmp_path)

    def squeeze(doc):
        view = doc["accessors"][doc["meshes"][0]["primitives"][0]["attributes"]["POSITION"]]["bufferView"]
        doc["bufferViews"][view]["byteStride"] = 8  # a VEC3 of FLOAT is 12 bytes (spec 3.6.2.4)

    rewrite_json(path, squeeze)
    text = _error(path)
    assert "byteStride" in text and "at least 12 bytes" in text
    assert validator_pointers(path)
