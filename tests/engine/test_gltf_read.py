"""read_gltf: scene, nodes, meshes, cameras, lights, animation and skins.

Every file is written by examples/gltf_builder.py and passes the Khronos glTF-Validator before it
is read. Expected values come from the glTF 2.0 specification (Khronos, 2021; section numbers
beside each check), the KHR_lights_punctual README, and independent readers: pygltflib (the raw
document), trimesh (vertex counts, UVs, world transforms) and scipy's Rotation.
"""

from __future__ import annotations

import math

import numpy as np
import pygltflib
import pytest
import trimesh
from scipy.spatial.transform import Rotation

from examples.gltf_builder import (SHORT, TRIANGLE_FAN, TRIANGLE_STRIP, TRIANGLES, UNSIGNED_BYTE,
                                   UNSIGNED_SHORT, GltfBuilder, quat_xyzw)
from lampyr.engine.gltf_read import read_gltf
from lampyr.engine.scene_data import LIGHT_DIRECTIONAL, LIGHT_POINT, LIGHT_SPOT
from tests.engine.gltf_files import QUAD_FACES, QUAD_NORMALS, QUAD_POSITIONS, QUAD_UVS, rewrite_json, save_valid
from tests.gltf_validator import assert_valid


@pytest.fixture(params=["glb", "gltf"])
def ext(request):
    return request.param


# ------------------------------------------------------------------------------------ scene, nodes


def test_default_scene_is_the_files_scene_property(tmp_path):
    # spec 3.5.1: `scene` names the scene to show
    b = GltfBuilder()
    a, c = b.add_node("a"), b.add_node("c")
    b.add_scene([a], default=False)
    b.add_scene([c], default=True)
    assert read_gltf(save_valid(b, tmp_path / "s.glb"), "scene").roots == (c,)


def test_without_scene_property_scene_0_is_shown(tmp_path):
    b = GltfBuilder()
    a, c = b.add_node("a"), b.add_node("c")
    b.add_scene([c], default=False)
    b.add_scene([a], default=False)
    assert read_gltf(save_valid(b, tmp_path / "s.glb"), "scene").roots == (c,)


def test_file_without_scenes_shows_every_root_node(tmp_path):
    b = GltfBuilder()
    a, c, d = b.add_node("a"), b.add_node("c"), b.add_node("d")
    b.add_child(a, c)
    path = b.save(tmp_path / "s.gltf")
    rewrite_json(path, lambda doc: (doc.pop("scenes"), doc.pop("scene")))
    assert_valid(path)
    scene = read_gltf(path, "scene")
    assert scene.roots == (a, d)
    assert scene.nodes[c].parent == a and scene.nodes[a].children == (c,)


def _world_from_nodes(scene, i):
    """World matrix of node i composed in the test from the NodeSpec fields, with scipy's
    Rotation (spec 3.5.3: local = T * R * S, world = parent's world * local)."""
    nd = scene.nodes[i]
    if nd.matrix is not None:
        local = nd.matrix
    else:
        w, x, y, z = nd.rotation
        local = np.eye(4)
        local[:3, :3] = Rotation.from_quat([x, y, z, w]).as_matrix() @ np.diag(nd.scale)
        local[:3, 3] = nd.translation
    return local if nd.parent < 0 else _world_from_nodes(scene, nd.parent) @ local


def _hierarchy(tmp_path, ext):
    b = GltfBuilder()
    mesh = b.add_mesh([b.primitive(QUAD_POSITIONS, indices=QUAD_FACES)], name="quad")
    top = b.add_node("top", translation=(1.0, 2.0, 3.0), rotation=quat_xyzw((0.3, 1.0, 0.2), 0.7),
                     scale=(2.0, 0.5, 1.5))
    mid = b.add_node("mid", matrix=np.array([[0.0, -1.0, 0.0, 5.0], [1.0, 0.0, 0.0, -1.0],
                                             [0.0, 0.0, 1.0, 0.25], [0.0, 0.0, 0.0, 1.0]]))
    leaf = b.add_node("leaf", mesh=mesh, translation=(0.0, 0.0, 2.0), rotation=quat_xyzw((1, 0, 0), -1.1))
    other = b.add_node("other", mesh=mesh, scale=(1.0, -1.0, 1.0))
    b.add_child(top, mid)
    b.add_child(mid, leaf)
    return save_valid(b, tmp_path / f"h.{ext}"), {"leaf": leaf, "other": other, "mid": mid, "top": top}


@pytest.mark.parametrize("name", ["top", "mid", "leaf", "other"])
def test_node_world_transforms_agree_with_trimesh(tmp_path, ext, name):
    # independent reader: trimesh composes the file's node graph itself
    path, index = _hierarchy(tmp_path, ext)
    scene = read_gltf(path, "scene")
    theirs = trimesh.load_scene(str(path), process=False).graph[name][0]
    np.testing.assert_allclose(_world_from_nodes(scene, index[name]), theirs, atol=1e-12)


def test_node_matrix_is_read_column_major(tmp_path):
    # spec 3.5.3: matrix is column-major, so numbers 12, 13, 14 of the list are the translation
    path, index = _hierarchy(tmp_path, "gltf")
    raw = pygltflib.GLTF2().load(str(path)).nodes[index["mid"]].matrix
    node = read_gltf(path, "scene").nodes[index["mid"]]
    np.testing.assert_array_equal(node.matrix[:3, 3], raw[12:15])
    np.testing.assert_array_equal(node.matrix[:3, 3], [5.0, -1.0, 0.25])
    np.testing.assert_array_equal(node.matrix[1, 0], 1.0)  # the +90 degree turn about z: x -> y


def test_rotation_is_reordered_to_w_x_y_z(tmp_path):
    # scene_data: lampyr stores w, x, y, z; the file (pygltflib) x, y, z, w
    path, index = _hierarchy(tmp_path, "glb")
    x, y, z, w = pygltflib.GLTF2().load(str(path)).nodes[index["top"]].rotation
    np.testing.assert_allclose(read_gltf(path, "scene").nodes[index["top"]].rotation, [w, x, y, z], rtol=1e-7)


def test_instancing_keeps_one_mesh_for_many_nodes(tmp_path):
    b = GltfBuilder()
    mesh = b.add_mesh([b.primitive(QUAD_POSITIONS, indices=QUAD_FACES)])
    for k in range(3):
        b.add_node(f"copy{k}", mesh=mesh, translation=(k, 0, 0))
    scene = read_gltf(save_valid(b, tmp_path / "i.glb"), "scene")
    assert len(scene.meshes) == 1
    assert [n.mesh for n in scene.nodes] == [0, 0, 0]


# ------------------------------------------------------------------------------------ meshes


@pytest.mark.parametrize("indexed", [True, False])
@pytest.mark.parametrize("mode, expected", [
    # spec 3.7.2.1: strip triangle i = (v[i], v[i+1+i%2], v[i+2-i%2]), written out by hand
    (TRIANGLE_STRIP, [[0, 1, 2], [1, 3, 2], [2, 3, 4], [3, 5, 4]]),
    # fan triangle i = (v[i+1], v[i+2], v[0])
    (TRIANGLE_FAN, [[1, 2, 0], [2, 3, 0], [3, 4, 0], [4, 5, 0]]),
    (TRIANGLES, [[0, 1, 2], [3, 4, 5]]),
])
def test_strips_and_fans_become_the_specs_triangles(tmp_path, mode, expected, indexed):
    angles = np.linspace(0.0, 2.0, 6)
    pos = np.stack([np.cos(angles), np.sin(angles), angles], axis=1).astype(np.float32).astype(np.float64)
    order = np.array([5, 3, 0, 1, 4, 2])  # indexed case: vertex k of the primitive is pos[order[k]]
    b = GltfBuilder()
    if indexed:
        prim = b.primitive(pos, indices=order, mode=mode)
    else:
        prim = b.primitive(pos[order], mode=mode)
    b.add_node("n", mesh=b.add_mesh([prim]))
    mesh = read_gltf(save_valid(b, tmp_path / "m.glb"), "scene").meshes[0]
    got = mesh.positions[mesh.faces]
    np.testing.assert_array_equal(got, pos[order][np.array(expected)])


def test_primitives_are_concatenated_with_a_material_per_face(tmp_path):
    b = GltfBuilder()
    red = b.add_material("red", base_color=(1, 0, 0, 1))
    prims = [b.primitive(QUAD_POSITIONS, QUAD_NORMALS, indices=QUAD_FACES, material=red),
             b.primitive(QUAD_POSITIONS + [0, 0, 1], QUAD_NORMALS, indices=QUAD_FACES[:1])]
    b.add_node("n", mesh=b.add_mesh(prims))
    mesh = read_gltf(save_valid(b, tmp_path / "m.glb"), "scene").meshes[0]
    assert len(mesh.positions) == 8
    np.testing.assert_array_equal(mesh.faces, [[0, 1, 2], [0, 2, 3], [4, 5, 6]])
    np.testing.assert_array_equal(mesh.face_material, [red, red, -1])  # -1: the spec's default material


def test_primitives_sharing_vertex_accessors_store_the_vertices_once(tmp_path):
    # spec 3.7.2.1 lets primitives of a mesh share attribute accessors and differ in indices
    b = GltfBuilder()
    red, blue = b.add_material("red"), b.add_material("blue")
    first = b.primitive(QUAD_POSITIONS, QUAD_NORMALS, indices=QUAD_FACES[:1], material=red)
    second = dict(first, indices=b.add_accessor(QUAD_FACES[1], UNSIGNED_SHORT, "SCALAR"), material=blue)
    b.add_node("n", mesh=b.add_mesh([first, second]))
    mesh = read_gltf(save_valid(b, tmp_path / "shared.glb"), "scene").meshes[0]
    np.testing.assert_array_equal(mesh.positions, QUAD_POSITIONS)
    np.testing.assert_array_equal(mesh.faces, QUAD_FACES)
    np.testing.assert_array_equal(mesh.face_material, [red, blue])


def test_vertex_counts_and_uvs_agree_with_trimesh_and_pygltflib(tmp_path, ext):
    rng = np.random.default_rng(3)
    pos = rng.normal(size=(30, 3))
    uvs = rng.uniform(size=(30, 2))
    b = GltfBuilder()
    mat = b.add_material("m")  # trimesh keeps UVs only on a primitive with a material
    b.add_node("n", mesh=b.add_mesh([b.primitive(pos, uv0=uvs, indices=rng.integers(0, 30, (20, 3)), material=mat)],
                                    name="blob"))
    path = save_valid(b, tmp_path / f"m.{ext}")
    mesh = read_gltf(path, "scene").meshes[0]
    theirs = trimesh.load_scene(str(path), process=False).geometry["blob"]
    assert len(mesh.positions) == len(theirs.vertices) == 30
    np.testing.assert_allclose(mesh.positions, theirs.vertices, rtol=1e-6)
    # trimesh turns glTF UVs (v down, spec 3.7.2.1) into its own convention v' = 1 - v
    np.testing.assert_allclose(mesh.uv0[:, 0], theirs.visual.uv[:, 0], atol=1e-7)
    np.testing.assert_allclose(mesh.uv0[:, 1], 1.0 - np.asarray(theirs.visual.uv)[:, 1], atol=1e-7)
    doc = pygltflib.GLTF2().load(str(path))
    assert doc.accessors[doc.meshes[0].primitives[0].attributes.TEXCOORD_0].count == len(mesh.uv0)


@pytest.mark.parametrize("component, tolerance", [(UNSIGNED_BYTE, 0.5 / 255), (UNSIGNED_SHORT, 0.5 / 65535)])
def test_normalized_integer_uvs_are_read(tmp_path, component, tolerance):
    # spec 3.7.2.1: TEXCOORD_n may be normalized UNSIGNED_BYTE / UNSIGNED_SHORT; 3.11: f = c / (2^n - 1)
    uvs = np.array([[0.0, 1.0], [1.0, 0.5], [0.2, 0.8], [0.7, 0.1]])
    b = GltfBuilder()
    b.add_node("n", mesh=b.add_mesh([b.primitive(QUAD_POSITIONS, uv0=uvs, indices=QUAD_FACES, uv_component=component)]))
    mesh = read_gltf(save_valid(b, tmp_path / "m.glb"), "scene").meshes[0]
    np.testing.assert_allclose(mesh.uv0, uvs, atol=tolerance)
    assert mesh.uv0[0, 1] == 1.0  # the largest integer is exactly 1


def test_attributes_normals_tangents_second_uv_set(tmp_path):
    tangents = np.tile([1.0, 0.0, 0.0, -1.0], (4, 1))
    b = GltfBuilder()
    b.add_node("n", mesh=b.add_mesh([b.primitive(QUAD_POSITIONS, QUAD_NORMALS, QUAD_UVS, QUAD_UVS[::-1], tangents,
                                                 indices=QUAD_FACES)]))
    mesh = read_gltf(save_valid(b, tmp_path / "m.glb"), "scene").meshes[0]
    np.testing.assert_array_equal(mesh.normals, QUAD_NORMALS)
    np.testing.assert_array_equal(mesh.uv1, QUAD_UVS[::-1])
    np.testing.assert_array_equal(mesh.tangents, tangents)


def test_mesh_without_normals_has_none(tmp_path):
    # spec 3.7.2.1: without normals the client shades flat; scene_data: normals None
    b = GltfBuilder()
    b.add_node("n", mesh=b.add_mesh([b.primitive(QUAD_POSITIONS, indices=QUAD_FACES)]))
    mesh = read_gltf(save_valid(b, tmp_path / "m.glb"), "scene").meshes[0]
    assert mesh.normals is None and mesh.uv0 is None and mesh.tangents is None


def test_primitive_without_normals_beside_one_with_them_gets_flat_normals(tmp_path):
    # spec 3.7.2.1: "When normals are not specified, client implementations MUST calculate flat
    # normals". The second primitive's triangle lies in the x = 0 plane, counter-clockwise seen
    # from -x, so its face normal is -x (by hand).
    b = GltfBuilder()
    tri = np.array([[0.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    b.add_node("n", mesh=b.add_mesh([b.primitive(QUAD_POSITIONS, QUAD_NORMALS, indices=QUAD_FACES),
                                     b.primitive(tri, indices=[0, 2, 1])]))
    mesh = read_gltf(save_valid(b, tmp_path / "m.glb"), "scene").meshes[0]
    last = mesh.faces[-1]
    np.testing.assert_allclose(mesh.normals[last], np.tile([-1.0, 0.0, 0.0], (3, 1)))
    np.testing.assert_array_equal(mesh.normals[:4], QUAD_NORMALS)


def test_morph_targets_and_default_weights(tmp_path):
    # spec 3.7.2.2: targets hold POSITION / NORMAL displacements; mesh.weights their defaults
    dp = np.tile([0.0, 0.0, 0.5], (4, 1))
    dn = np.tile([0.0, 0.125, 0.0], (4, 1))  # exact in float32
    b = GltfBuilder()
    prim = b.primitive(QUAD_POSITIONS, QUAD_NORMALS, indices=QUAD_FACES,
                       targets=[{"POSITION": dp}, {"POSITION": 2 * dp, "NORMAL": dn}])
    b.add_node("n", mesh=b.add_mesh([prim], weights=[0.25, 0.5]), weights=[1.0, 0.0])
    scene = read_gltf(save_valid(b, tmp_path / "m.glb"), "scene")
    mesh = scene.meshes[0]
    np.testing.assert_array_equal(mesh.morph_positions, [dp, 2 * dp])
    np.testing.assert_array_equal(mesh.morph_normals, [np.zeros((4, 3)), dn])
    np.testing.assert_array_equal(mesh.morph_weights, [0.25, 0.5])
    np.testing.assert_array_equal(scene.nodes[0].weights, [1.0, 0.0])


# ------------------------------------------------------------------------------------ skins


def _skinned(tmp_path, inverse_bind):
    b = GltfBuilder()
    j0 = b.add_node("bone0")
    j1 = b.add_node("bone1", translation=(0.0, 1.0, 0.0))
    b.add_child(j0, j1)
    joints = np.array([[0, 1, 0, 0]] * 4)
    weights = np.array([[0.75, 0.25, 0.0, 0.0]] * 4)
    mesh = b.add_mesh([b.primitive(QUAD_POSITIONS, indices=QUAD_FACES, joints=joints, weights=weights)])
    skin = b.add_skin([j0, j1], inverse_bind, skeleton=j0)
    b.add_node("skinned", mesh=mesh, skin=skin)
    return read_gltf(save_valid(b, tmp_path / "s.glb"), "scene"), joints, weights


def test_skin_joints_weights_and_column_major_inverse_bind_matrices(tmp_path):
    inv1 = np.eye(4)
    inv1[:3, 3] = [0.0, -1.0, 0.0]  # the inverse of bone1's bind placement (up 1)
    scene, joints, weights = _skinned(tmp_path, np.stack([np.eye(4), inv1]))
    skin = scene.skins[0]
    np.testing.assert_array_equal(skin.joints, [0, 1])
    np.testing.assert_array_equal(skin.inverse_bind[1], inv1)  # spec 3.7.3.1: MAT4, column-major
    assert skin.skeleton == 0 and scene.nodes[2].skin == 0
    np.testing.assert_array_equal(scene.meshes[0].joints, joints)
    np.testing.assert_array_equal(scene.meshes[0].weights, weights)


def test_inverse_bind_matrices_default_to_identity(tmp_path):
    # spec 3.7.3.1: "When undefined, each matrix is a 4x4 identity matrix"
    scene, _, _ = _skinned(tmp_path, None)
    np.testing.assert_array_equal(scene.skins[0].inverse_bind, [np.eye(4), np.eye(4)])


# ------------------------------------------------------------------------------------ cameras, lights


def test_perspective_camera(tmp_path):
    b = GltfBuilder()
    cam = b.add_camera(0.7, znear=0.05, aspect=1.5, name="main")
    b.add_node("eye", camera=cam)
    scene = read_gltf(save_valid(b, tmp_path / "c.glb"), "scene")
    c = scene.cameras[scene.nodes[0].camera]
    assert (c.name, c.yfov, c.znear, c.aspect) == ("main", 0.7, 0.05, 1.5)


def test_orthographic_camera_is_dropped_and_the_scene_still_loads(tmp_path):
    b = GltfBuilder()
    b.doc.setdefault("cameras", []).append({"type": "orthographic", "orthographic":
                                            {"xmag": 1.0, "ymag": 1.0, "znear": 0.1, "zfar": 10.0}})
    persp = b.add_camera(0.5, name="p")
    b.add_node("ortho", camera=0)
    b.add_node("persp", camera=persp)
    scene = read_gltf(save_valid(b, tmp_path / "c.glb"), "scene")
    assert scene.nodes[0].camera == -1
    assert scene.cameras[scene.nodes[1].camera].name == "p"


def test_light_defaults_are_the_extensions(tmp_path):
    # KHR_lights_punctual README: intensity 1, color white, innerConeAngle 0, outerConeAngle pi/4
    b = GltfBuilder()
    b.add_node("lamp", light=b.add_light("spot"))
    light = read_gltf(save_valid(b, tmp_path / "l.glb"), "scene").lights[0]
    assert (light.type, light.intensity, light.inner_cone, light.range) == (LIGHT_SPOT, 1.0, 0.0, None)
    assert light.outer_cone == pytest.approx(math.pi / 4, rel=1e-15)
    np.testing.assert_array_equal(light.color, [1.0, 1.0, 1.0])


@pytest.mark.parametrize("kind, code", [("point", LIGHT_POINT), ("spot", LIGHT_SPOT),
                                        ("directional", LIGHT_DIRECTIONAL)])
def test_lights_are_read_with_their_values(tmp_path, kind, code):
    b = GltfBuilder()
    cone = {"inner_cone": 0.2, "outer_cone": 0.6} if kind == "spot" else {}
    light = b.add_light(kind, color=(1.0, 0.5, 0.25), intensity=40.0, name="l", **cone,
                        range=None if kind == "directional" else 12.0)
    b.add_node("holder", light=light)
    scene = read_gltf(save_valid(b, tmp_path / "l.glb"), "scene")
    got = scene.lights[scene.nodes[0].light]
    assert (got.type, got.intensity, got.name) == (code, 40.0, "l")
    np.testing.assert_array_equal(got.color, [1.0, 0.5, 0.25])
    if kind == "spot":
        assert (got.inner_cone, got.outer_cone) == (0.2, 0.6)


# ------------------------------------------------------------------------------------ animation


def _animated(tmp_path, channels):
    b = GltfBuilder()
    mesh = b.add_mesh([b.primitive(QUAD_POSITIONS, indices=QUAD_FACES, targets=[{"POSITION": QUAD_NORMALS},
                                                                                {"POSITION": QUAD_NORMALS}])],
                      weights=[0.0, 0.0])
    b.add_node("moving", mesh=mesh)
    b.add_animation([(0,) + c for c in channels])
    return read_gltf(save_valid(b, tmp_path / "a.glb"), "scene")


def test_linear_rotation_channel_is_reordered_to_w_x_y_z(tmp_path):
    q0, q1 = quat_xyzw((0, 1, 0), 0.0), quat_xyzw((0, 1, 0), 2.0)
    ch = _animated(tmp_path, [("rotation", [0.0, 1.5], [q0, q1], "LINEAR")]).channels[0]
    assert (ch.node, ch.path, ch.interpolation) == (0, "rotation", "LINEAR")
    np.testing.assert_array_equal(ch.times, np.float32([0.0, 1.5]))
    np.testing.assert_allclose(ch.values, [[1, 0, 0, 0], [q1[3], q1[0], q1[1], q1[2]]], rtol=1e-7, atol=1e-8)


def test_cubicspline_values_are_in_tangent_value_out_tangent_per_key(tmp_path):
    # spec 3.11 / Appendix C: each CUBICSPLINE key holds (in-tangent, value, out-tangent)
    values = np.arange(2 * 3 * 3, dtype=float).reshape(2, 3, 3)
    ch = _animated(tmp_path, [("translation", [0.0, 1.0], values, "CUBICSPLINE")]).channels[0]
    assert ch.values.shape == (2, 3, 3)
    np.testing.assert_array_equal(ch.values, values)


def test_step_scale_and_weights_channels(tmp_path):
    scene = _animated(tmp_path, [("scale", [0.0, 1.0, 2.0], [[1, 1, 1], [2, 2, 2], [1, 3, 1]], "STEP"),
                                 ("weights", [0.0, 1.0], [[0.0, 1.0], [1.0, 0.0]], "LINEAR")])
    scale, weights = scene.channels
    assert scale.interpolation == "STEP" and scale.values.shape == (3, 3)
    np.testing.assert_array_equal(weights.values, [[0.0, 1.0], [1.0, 0.0]])  # (K, targets)


def test_normalized_short_rotation_output_is_decoded(tmp_path):
    # spec 3.11: rotation output may be normalized SHORT; f = max(c / 32767, -1)
    b = GltfBuilder()
    b.add_node("n")
    b.add_animation([(0, "rotation", [0.0, 1.0], [[0, 0, 0, 1], [0, 0, 0, 1]], "LINEAR")])
    raw = np.array([[0, 0, 0, 32767], [0, -32767, 0, 0]])
    b.doc["animations"][0]["samplers"][0]["output"] = b.add_accessor(raw, SHORT, "VEC4", normalized=True)
    ch = read_gltf(save_valid(b, tmp_path / "a.glb"), "scene").channels[0]
    np.testing.assert_array_equal(ch.values, [[1.0, 0.0, 0.0, 0.0], [0.0, 0.0, -1.0, 0.0]])
