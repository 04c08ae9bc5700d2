"""The demo's committed assets are exactly what the asset script makes, every glTF file passes
the Khronos glTF-Validator, and the scene holds what the demo promises (issue 11, item 8)."""

from __future__ import annotations

import io
import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pygltflib
import pytest
from PIL import Image
from scipy.spatial.transform import Rotation

from tests.gltf_validator import assert_valid

ROOT = Path(__file__).resolve().parents[2]
ASSETS = ROOT / "examples" / "courtyard" / "assets"
SCENE = ASSETS / "courtyard.glb"


@pytest.fixture(scope="module")
def fresh(tmp_path_factory):
    out = tmp_path_factory.mktemp("assets")
    subprocess.run([sys.executable, str(ROOT / "examples" / "make_assets.py"), "--out", str(out)],
                   check=True, capture_output=True)
    return out


def _load(path) -> pygltflib.GLTF2:
    # pygltflib is an independent glTF reader (not lampyr's)
    return pygltflib.GLTF2.load(str(path))


def _json(gltf: pygltflib.GLTF2) -> dict:
    return json.loads(gltf.to_json())


def _view_bytes(gltf: pygltflib.GLTF2, view: int) -> bytes:
    v = gltf.bufferViews[view]
    return gltf.binary_blob()[v.byteOffset or 0:(v.byteOffset or 0) + v.byteLength]


def _image_views(doc: dict) -> set[int]:
    return {im["bufferView"] for im in doc.get("images", []) if "bufferView" in im}


@pytest.fixture(scope="module")
def scene():
    gltf = _load(SCENE)
    return gltf, _json(gltf)


# ------------------------------------------------------------------------------ same as a fresh run


def test_the_assets_folder_holds_exactly_what_the_script_writes(fresh):
    assert sorted(p.name for p in ASSETS.iterdir()) == sorted(p.name for p in fresh.iterdir())


def test_committed_scene_json_matches_the_script(fresh):
    # PNG bytes depend on the zlib Pillow links, so the images' byte lengths (and the buffer's)
    # are left out here; the images come last in the buffer, so every other offset must agree
    docs = []
    for path in (SCENE, fresh / SCENE.name):
        doc = _json(_load(path))
        for view in _image_views(doc):
            doc["bufferViews"][view].pop("byteLength")
            doc["bufferViews"][view].pop("byteOffset")
        doc["buffers"][0].pop("byteLength")
        docs.append(doc)
    assert docs[0] == docs[1]


def test_committed_scene_data_matches_the_script(fresh):
    a, b = _load(SCENE), _load(fresh / SCENE.name)
    skip = _image_views(_json(a))
    views = [i for i in range(len(a.bufferViews)) if i not in skip]
    assert views
    for i in views:
        assert _view_bytes(a, i) == _view_bytes(b, i), f"bufferViews[{i}]"


def _images(path) -> dict[str, np.ndarray]:
    gltf = _load(path)
    return {im.name: np.asarray(Image.open(io.BytesIO(_view_bytes(gltf, im.bufferView))))
            for im in gltf.images}


@pytest.mark.parametrize("name", sorted(_images(SCENE)) if SCENE.exists() else [])
def test_committed_texture_pixels_match_the_script(fresh, name):
    assert np.array_equal(_images(SCENE)[name], _images(fresh / SCENE.name)[name])


def test_committed_sky_matches_the_script(fresh):
    import OpenEXR

    def pixels(path):
        with OpenEXR.File(str(path), separate_channels=True) as f:
            return {k: np.array(v.pixels) for k, v in f.channels().items()}

    a, b = pixels(fresh / "dusk_sky.exr"), pixels(ASSETS / "dusk_sky.exr")
    assert a.keys() == b.keys() == {"R", "G", "B"}
    for k in a:
        assert np.array_equal(a[k], b[k])


# ------------------------------------------------------------------------------ the standard's validator


@pytest.mark.parametrize("name", sorted(p.name for p in ASSETS.iterdir() if p.suffix in (".glb", ".gltf")))
def test_every_committed_gltf_passes_the_khronos_validator(name):
    assert_valid(ASSETS / name)  # Khronos glTF-Validator 2.0.0-dev.3.10: 0 errors


# ------------------------------------------------------------------------------ what the scene holds
# Each check reads the file with pygltflib and compares it with the glTF 2.0 spec's or the
# extension's own definition of the feature the demo promises.


def _material(doc, name) -> dict:
    return next(m for m in doc["materials"] if m.get("name") == name)


def _node(doc, name) -> int:
    return next(i for i, n in enumerate(doc["nodes"]) if n.get("name") == name)


def _accessor(gltf, index) -> np.ndarray:
    acc = gltf.accessors[index]
    width = {"SCALAR": 1, "VEC2": 2, "VEC3": 3, "VEC4": 4, "MAT4": 16}[acc.type]
    dtype = {5121: np.uint8, 5123: np.uint16, 5125: np.uint32, 5126: np.float32}[acc.componentType]
    view = gltf.bufferViews[acc.bufferView]
    assert view.byteStride in (None, 0, width * np.dtype(dtype).itemsize)  # tightly packed here
    raw = gltf.binary_blob()[(view.byteOffset or 0) + (acc.byteOffset or 0):]
    return np.frombuffer(raw, dtype, acc.count * width).reshape(acc.count, width)


def _primitives_of(doc, material) -> list[dict]:
    index = [m.get("name") for m in doc["materials"]].index(material)
    return [p for m in doc["meshes"] for p in m["primitives"] if p.get("material") == index]


@pytest.mark.parametrize("material", ["stone", "flagstone"])
def test_stone_and_flagstone_have_base_colour_textures(scene, material):
    assert "baseColorTexture" in _material(scene[1], material)["pbrMetallicRoughness"]


def test_the_flagstones_take_roughness_from_a_metallic_roughness_texture(scene):
    gltf, doc = scene
    info = _material(doc, "flagstone")["pbrMetallicRoughness"]["metallicRoughnessTexture"]
    image = gltf.images[doc["textures"][info["index"]]["source"]]
    pixels = np.asarray(Image.open(io.BytesIO(_view_bytes(gltf, image.bufferView))))
    # spec 3.9.2: roughness is the G channel, metallic the B channel
    assert pixels[..., 1].std() > 5 and np.all(pixels[..., 2] == 0)


def test_the_wall_is_normal_mapped_with_tangents_in_the_file(scene):
    gltf, doc = scene
    assert "normalTexture" in _material(doc, "stone")
    for prim in _primitives_of(doc, "stone"):
        t = _accessor(gltf, prim["attributes"]["TANGENT"]).astype(np.float64)
        n = _accessor(gltf, prim["attributes"]["NORMAL"]).astype(np.float64)
        # spec 3.7.2.1: XYZ unit and orthogonal to the normal, W is the handedness ±1
        assert np.allclose(np.linalg.norm(t[:, :3], axis=1), 1, atol=1e-6)
        assert np.allclose(np.einsum("ij,ij->i", t[:, :3], n), 0, atol=1e-6)
        assert set(np.unique(t[:, 3])) <= {-1.0, 1.0}


def test_the_lantern_glass_is_thin_walled_transmission(scene):
    ext = _material(scene[1], "lantern_glass")["extensions"]
    # KHR_materials_transmission without KHR_materials_volume is thin-walled (the extensions' text)
    assert ext["KHR_materials_transmission"]["transmissionFactor"] == 1.0
    assert "KHR_materials_volume" not in ext


def test_the_candle_glows_with_an_emissive_strength(scene):
    mat = _material(scene[1], "candle")
    assert max(mat["emissiveFactor"]) == 1.0
    assert mat["extensions"]["KHR_materials_emissive_strength"]["emissiveStrength"] > 1.0


def test_the_candle_flame_is_a_point_light_that_swings_with_the_lantern(scene):
    doc = scene[1]
    lights = doc["extensions"]["KHR_lights_punctual"]["lights"]
    parent = {c: p for p, n in enumerate(doc["nodes"]) for c in n.get("children", [])}
    holders = [i for i, n in enumerate(doc["nodes"]) if "KHR_lights_punctual" in n.get("extensions", {})]
    (node,) = holders
    light = lights[doc["nodes"][node]["extensions"]["KHR_lights_punctual"]["light"]]
    assert light["type"] == "point" and light["intensity"] > 0  # KHR_lights_punctual README
    assert parent[node] == _node(doc, "lantern_pivot")


def _channels(doc, node) -> list[tuple[dict, dict]]:
    return [(ch, a["samplers"][ch["sampler"]]) for a in doc["animations"] for ch in a["channels"]
            if ch["target"]["node"] == node]


def test_the_lantern_swings_on_a_rotation_channel_over_the_48_frames(scene):
    gltf, doc = scene
    pivot = _node(doc, "lantern_pivot")
    assert _node(doc, "lantern") in doc["nodes"][pivot]["children"]
    (channel, sampler), = _channels(doc, pivot)
    assert channel["target"]["path"] == "rotation"
    times = _accessor(gltf, sampler["input"])[:, 0]
    # the shot's frame f shows time (f - 1) / 24 s: frames 1..48 are 0 .. 47/24 s
    assert times[0] == 0.0 and times[-1] == pytest.approx(47 / 24)
    values = _accessor(gltf, sampler["output"]).astype(np.float64)
    if sampler.get("interpolation") == "CUBICSPLINE":
        values = values[1::3]  # (in-tangent, value, out-tangent) per key, spec Appendix C
    angles = Rotation.from_quat(values).as_rotvec()  # scipy takes x, y, z, w as glTF stores them
    assert np.ptp(np.degrees(angles[:, 2])) > 10  # a swing of more than 10° about z


def test_the_banner_is_skinned_to_three_joints(scene):
    gltf, doc = scene
    node = doc["nodes"][_node(doc, "banner")]
    skin = doc["skins"][node["skin"]]
    (prim,) = doc["meshes"][node["mesh"]]["primitives"]
    joints = _accessor(gltf, prim["attributes"]["JOINTS_0"])
    weights = _accessor(gltf, prim["attributes"]["WEIGHTS_0"]).astype(np.float64)
    assert len(skin["joints"]) == 3 and joints.max() == 2
    assert len(np.unique(joints[weights > 0])) == 3  # every joint moves some of the cloth
    animated = {ch["target"]["node"] for a in doc["animations"] for ch in a["channels"]}
    assert set(skin["joints"]) <= animated


def test_the_banner_joints_bind_where_they_stand(scene):
    gltf, doc = scene
    skin = doc["skins"][doc["nodes"][_node(doc, "banner")]["skin"]]
    inverse_bind = _accessor(gltf, skin["inverseBindMatrices"]).astype(np.float64).reshape(-1, 4, 4)
    inverse_bind = np.transpose(inverse_bind, (0, 2, 1))  # stored column-major (spec 3.6.2.4)

    def world(i):  # the joint's rest world matrix from the nodes' TRS (spec 3.5.3), scipy Rotation
        parent = {c: p for p, n in enumerate(doc["nodes"]) for c in n.get("children", [])}
        m = np.eye(4)
        while i is not None:
            n = doc["nodes"][i]
            local = np.eye(4)
            local[:3, :3] = Rotation.from_quat(n.get("rotation", [0, 0, 0, 1])).as_matrix() * n.get("scale", [1, 1, 1])
            local[:3, 3] = n.get("translation", [0, 0, 0])
            m = local @ m
            i = parent.get(i)
        return m

    for k, j in enumerate(skin["joints"]):
        assert np.allclose(world(j) @ inverse_bind[k], np.eye(4), atol=1e-6)


@pytest.mark.parametrize("frame, position, target", [
    (1, [0.4, 1.5, 5.2], [0.2, 1.0, -1.0]),  # the shot file's [[camera.key]] values
    (48, [-1.2, 1.3, 4.0], [0.6, 1.1, -1.5]),
])
def test_shot_cam_makes_the_shot_files_move(scene, frame, position, target):
    gltf, doc = scene
    cam = _node(doc, "shot_cam")
    assert doc["cameras"][doc["nodes"][cam]["camera"]]["perspective"]["yfov"] == pytest.approx(math.radians(50))
    paths = {ch["target"]["path"]: s for ch, s in _channels(doc, cam)}
    times = _accessor(gltf, paths["translation"]["input"])[:, 0]
    k = int(np.argmin(np.abs(times - (frame - 1) / 24)))
    assert times[k] == pytest.approx((frame - 1) / 24)
    pos = _accessor(gltf, paths["translation"]["output"])[k]
    quat = _accessor(gltf, paths["rotation"]["output"])[k]
    assert np.allclose(pos, position, atol=1e-6)
    # a glTF camera looks down its local -Z (spec 3.10.1)
    look = Rotation.from_quat(quat).apply([0, 0, -1])
    want = np.subtract(target, position)
    assert np.allclose(look, want / np.linalg.norm(want), atol=1e-6)


# ------------------------------------------------------------------------------ the shots that use them


@pytest.mark.parametrize("shot", ["courtyard/courtyard.toml", "lantern.toml", "materials.toml"])
def test_the_example_shots_parse_and_name_the_scene_file(shot):
    from lampyr.engine.shot import load_shot

    loaded = load_shot(ROOT / "examples" / shot)
    files = {(loaded.root / f).resolve() for f in loaded.files()}
    assert SCENE.resolve() in files and (ASSETS / "dusk_sky.exr").resolve() in files
