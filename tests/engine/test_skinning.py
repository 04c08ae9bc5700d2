"""glTF 2.0 morph targets and skins, checked against the spec's formulas evaluated with numpy.

Outside sources: the glTF 2.0 specification (Khronos, 2021) section 3.7.2.2 (morph targets:
base + Σ w_k Δ_k), section 3.7.3 (skins: jointMatrix_j = globalTransform(joint_j) ·
inverseBindMatrix_j, skin matrix Σ w_i jointMatrix_i, the skinned mesh node's own transform
ignored), Appendix C (weights interpolation); scipy Rotation to compose node transforms; numpy
for the per-vertex sums, written here vertex by vertex.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from lampyr.engine.scene_data import Channel, MeshData, NodeSpec, SceneData, SkinSpec
from lampyr.engine.skinning import SPACE_OBJECT, SPACE_WORLD, deformed_vertices, is_deforming
from lampyr.errors import AssetError

RNG_SEED = 7331


def quat(axis, degrees):
    return Rotation.from_rotvec(np.radians(degrees) * np.asarray(axis, float)).as_quat(scalar_first=True)


def scipy_trs(t, q_wxyz, s=(1.0, 1.0, 1.0)):
    """Reference T · R · S (glTF 2.0 section 3.5.3) with scipy's rotation matrix."""
    m = np.eye(4)
    m[:3, :3] = Rotation.from_quat(q_wxyz, scalar_first=True).as_matrix() @ np.diag(s)
    m[:3, 3] = t
    return m


def homogeneous(p):
    return np.append(p, 1.0)


# ------------------------------------------------------------------------------------- two-bone cylinder

MESH_NODE, ARMATURE, BONE0, BONE1 = 0, 1, 2, 3
ARMATURE_T, ARMATURE_Q = np.array([0.3, 0.0, -1.0]), quat([0, 1, 0], 30)
BONE1_T = np.array([0.0, 1.0, 0.0])


def cylinder(rings=9, segments=12, radius=0.2, height=2.0):
    """Vertices (V, 3) of a cylinder along +y from 0 to `height`, radial unit normals (V, 3), and
    faces; the rings are where the two bones meet."""
    ys = np.linspace(0.0, height, rings)
    angles = np.linspace(0.0, 2.0 * math.pi, segments, endpoint=False)
    ring = np.stack([np.cos(angles), np.zeros(segments), np.sin(angles)], axis=1)
    positions = np.concatenate([ring * radius + [0.0, y, 0.0] for y in ys])
    normals = np.tile(ring, (rings, 1))
    faces = []
    for r in range(rings - 1):
        for s in range(segments):
            a, b = r * segments + s, r * segments + (s + 1) % segments
            faces += [(a, b + segments, b), (a, a + segments, b + segments)]
    return positions, normals, np.array(faces, np.int64)


def two_bone_scene(bone0_keys, bone1_keys, mesh_node_t=(5.0, 0.0, 0.0)):
    """Cylinder skinned to bone0 (at the armature's origin) and bone1 (one unit up bone0), the
    weight moving from bone0 to bone1 between heights 0.6 and 1.4. The rest world matrices of the
    bones are composed with scipy and inverted with numpy for the inverse binds; the mesh node
    has its own translation, which the spec says skinning ignores."""
    positions, normals, faces = cylinder()
    w1 = np.clip((positions[:, 1] - 0.6) / 0.8, 0.0, 1.0)
    joints = np.zeros((len(positions), 4), np.int64)
    weights = np.zeros((len(positions), 4))
    # half the vertices list bone1 first, so that slot order does not matter
    flip = np.arange(len(positions)) % 2 == 1
    joints[:, 0], joints[:, 1] = np.where(flip, 1, 0), np.where(flip, 0, 1)
    weights[:, 0], weights[:, 1] = np.where(flip, w1, 1.0 - w1), np.where(flip, 1.0 - w1, w1)
    mesh = MeshData("tube", positions, faces, np.zeros(len(faces), np.int64), normals=normals, joints=joints, weights=weights)
    rest_arm = scipy_trs(ARMATURE_T, ARMATURE_Q)
    rest_bone0 = rest_arm
    rest_bone1 = rest_arm @ scipy_trs(BONE1_T, quat([1, 0, 0], 0))
    skin = SkinSpec(np.array([BONE0, BONE1]), np.stack([np.linalg.inv(rest_bone0), np.linalg.inv(rest_bone1)]))
    nodes = (
        NodeSpec("tube", translation=np.array(mesh_node_t), mesh=0, skin=0),
        NodeSpec("armature", translation=ARMATURE_T, rotation=ARMATURE_Q, children=(BONE0,)),
        NodeSpec("bone0", parent=ARMATURE, children=(BONE1,)),
        NodeSpec("bone1", parent=BONE0, translation=BONE1_T),
    )
    times = np.array([0.0, 1.0])
    channels = (
        Channel(BONE0, "rotation", "LINEAR", times, np.stack(bone0_keys)),
        Channel(BONE1, "rotation", "LINEAR", times, np.stack(bone1_keys)),
    )
    scene = SceneData("tube.gltf", nodes=nodes, roots=(MESH_NODE, ARMATURE), meshes=(mesh,), channels=channels, skins=(skin,))
    return scene, mesh, skin


def expected_skin(mesh, skin, bone_worlds):
    """The spec's formula vertex by vertex: v' = Σ_i w_i · world(joint_i) · IBM_i · v, and the
    normal through the inverse-transpose (numpy.linalg.inv) of Σ_i w_i · jointMatrix_i."""
    joint_mats = [bone_worlds[j] @ skin.inverse_bind[j] for j in range(len(skin.joints))]
    pos, nrm = [], []
    for v in range(len(mesh.positions)):
        m = sum(mesh.weights[v, i] * joint_mats[mesh.joints[v, i]] for i in range(4))
        pos.append((m @ homogeneous(mesh.positions[v]))[:3])
        n = np.linalg.inv(m[:3, :3]).T @ mesh.normals[v]
        nrm.append(n / np.linalg.norm(n))
    return np.array(pos), np.array(nrm)


@pytest.mark.parametrize("t", [0.0, 0.35, 1.0])
def test_two_bone_cylinder_matches_the_spec_formula(t):
    # source: glTF 2.0 section 3.7.3 joint-matrix formula, evaluated per vertex with numpy;
    # bone worlds composed with scipy Rotation; the rotations interpolated with scipy Slerp
    from scipy.spatial.transform import Slerp

    keys0 = (quat([0, 0, 1], 0), quat([1, 0, 0], 40))
    keys1 = (quat([0, 0, 1], 0), quat([0, 0, 1], 90))
    scene, mesh, skin = two_bone_scene(keys0, keys1)
    q0 = Slerp([0, 1], Rotation.from_quat(np.stack(keys0), scalar_first=True))(t).as_quat(scalar_first=True)
    q1 = Slerp([0, 1], Rotation.from_quat(np.stack(keys1), scalar_first=True))(t).as_quat(scalar_first=True)
    world0 = scipy_trs(ARMATURE_T, ARMATURE_Q) @ scipy_trs(np.zeros(3), q0)
    world1 = world0 @ scipy_trs(BONE1_T, q1)
    exp_pos, exp_nrm = expected_skin(mesh, skin, [world0, world1])
    positions, normals, space = deformed_vertices(scene, MESH_NODE, t)
    assert space == SPACE_WORLD
    np.testing.assert_allclose(positions, exp_pos, rtol=0, atol=1e-12)
    np.testing.assert_allclose(normals, exp_nrm, rtol=0, atol=1e-12)


def test_skin_at_bind_pose_is_the_mesh_as_modelled():
    # source: glTF 2.0 section 3.7.3 (inverse bind matrices undo the joints' bind-pose worlds,
    # so at the bind pose every joint matrix is the identity)
    keys = (quat([0, 0, 1], 0), quat([0, 0, 1], 0))
    scene, mesh, _ = two_bone_scene(keys, keys)
    positions, normals, _ = deformed_vertices(scene, MESH_NODE, 0.5)
    np.testing.assert_allclose(positions, mesh.positions, rtol=0, atol=1e-12)
    np.testing.assert_allclose(normals, mesh.normals, rtol=0, atol=1e-12)


def test_skinned_mesh_node_transform_is_ignored():
    # source: glTF 2.0 section 3.7.3 ("the transform of the skinned mesh node MUST be ignored")
    keys0 = (quat([0, 0, 1], 0), quat([1, 0, 0], 40))
    keys1 = (quat([0, 0, 1], 0), quat([0, 0, 1], 90))
    a = deformed_vertices(two_bone_scene(keys0, keys1, mesh_node_t=(5.0, 0.0, 0.0))[0], MESH_NODE, 0.7)[0]
    b = deformed_vertices(two_bone_scene(keys0, keys1, mesh_node_t=(0.0, -9.0, 2.0))[0], MESH_NODE, 0.7)[0]
    np.testing.assert_array_equal(a, b)


def single_vertex_scene(vertex, normal, bone_rotation, bone_scale=(1.0, 1.0, 1.0)):
    """One vertex weighted fully to a bone at (0, 1, 0) whose rotation and scale are given."""
    mesh = MeshData(
        "dot", np.array([vertex], float), np.zeros((0, 3), np.int64), np.zeros(0, np.int64),
        normals=np.array([normal], float), joints=np.array([[0, 0, 0, 0]]), weights=np.array([[1.0, 0, 0, 0]]),
    )
    bind = scipy_trs([0.0, 1.0, 0.0], quat([1, 0, 0], 0))
    skin = SkinSpec(np.array([1]), np.linalg.inv(bind)[None])
    nodes = (
        NodeSpec("dot", mesh=0, skin=0),
        NodeSpec("bone", translation=np.array([0.0, 1.0, 0.0]), rotation=bone_rotation, scale=np.array(bone_scale)),
    )
    return SceneData("dot.gltf", nodes=nodes, meshes=(mesh,), skins=(skin,))


def test_bone_rotated_90_degrees_moves_a_vertex_where_the_rotation_puts_it():
    # source: from memory — a quarter turn about +z (right-handed) takes (x, y) to (-y, x)
    # about the pivot: (0.5, 1.5, 0) around (0, 1, 0) goes to (-0.5, 1.5, 0); the +x normal to +y
    scene = single_vertex_scene([0.5, 1.5, 0.0], [1.0, 0.0, 0.0], quat([0, 0, 1], 90))
    positions, normals, space = deformed_vertices(scene, 0, 0.0)
    assert space == SPACE_WORLD
    np.testing.assert_allclose(positions[0], [-0.5, 1.5, 0.0], rtol=0, atol=1e-15)
    np.testing.assert_allclose(normals[0], [0.0, 1.0, 0.0], rtol=0, atol=1e-15)


def test_skinned_normal_stays_perpendicular_under_non_uniform_scale():
    # source: from memory — normals transform by the inverse transpose so that they stay
    # perpendicular to every transformed tangent; a tilted plane under a squashing bone
    plane_normal = np.array([1.0, 1.0, 0.0]) / math.sqrt(2.0)
    tangent = np.array([1.0, -1.0, 0.0])
    scene = single_vertex_scene([0.3, 1.2, 0.1], plane_normal, quat([0, 1, 1], 25), bone_scale=(3.0, 0.5, 1.0))
    _, normals, _ = deformed_vertices(scene, 0, 0.0)
    bone = scipy_trs([0.0, 1.0, 0.0], quat([0, 1, 1], 25), (3.0, 0.5, 1.0))[:3, :3]
    for t in (tangent, np.array([0.0, 0.0, 1.0])):
        assert abs(float(normals[0] @ (bone @ t))) < 1e-12
    assert float(normals[0] @ (bone @ plane_normal)) > 0.0  # still on the same side
    assert np.linalg.norm(normals[0]) == pytest.approx(1.0, abs=1e-14)


def test_joint_index_outside_the_skin_is_refused():
    # source: glTF 2.0 section 3.7.3 (JOINTS_0 values index the skin's joints array)
    scene = single_vertex_scene([0.0, 0.0, 0.0], [0.0, 1.0, 0.0], quat([0, 0, 1], 0))
    bad_mesh = MeshData(
        "dot", np.zeros((1, 3)), np.zeros((0, 3), np.int64), np.zeros(0, np.int64),
        joints=np.array([[3, 0, 0, 0]]), weights=np.array([[1.0, 0, 0, 0]]), source="meshes[0].primitives[0]",
    )
    scene = SceneData("dot.gltf", nodes=scene.nodes, meshes=(bad_mesh,), skins=scene.skins)
    with pytest.raises(AssetError, match=r"dot\.gltf: meshes\[0\]\.primitives\[0\]\.attributes\.JOINTS_0: joint index 3"):
        deformed_vertices(scene, 0, 0.0)


# ------------------------------------------------------------------------------------- morph targets

MORPH_TIMES = np.array([0.0, 1.0, 2.5])
MORPH_KEYS = np.array([[0.0, 1.0], [1.0, 0.0], [0.5, 0.5]])


def morph_scene(interpolation="LINEAR", skin=None):
    rng = np.random.default_rng(RNG_SEED)
    base = rng.normal(size=(6, 3))
    normals = rng.normal(size=(6, 3))
    normals /= np.linalg.norm(normals, axis=1, keepdims=True)
    kwargs = {}
    if skin is not None:
        kwargs = dict(joints=np.zeros((6, 4), np.int64), weights=np.tile([1.0, 0, 0, 0], (6, 1)))
    mesh = MeshData(
        "blob", base, np.zeros((0, 3), np.int64), np.zeros(0, np.int64), normals=normals,
        morph_positions=rng.normal(size=(2, 6, 3)), morph_normals=0.3 * rng.normal(size=(2, 6, 3)),
        morph_weights=np.zeros(2), **kwargs,
    )
    nodes = [NodeSpec("blob", translation=np.array([0.0, 2.0, 0.0]), mesh=0, skin=-1 if skin is None else 0)]
    skins = ()
    if skin is not None:
        nodes.append(NodeSpec("bone", scale=np.array(skin)))
        skins = (SkinSpec(np.array([1]), np.eye(4)[None]),)
    channels = (Channel(0, "weights", interpolation, MORPH_TIMES, MORPH_KEYS),)
    return SceneData("blob.gltf", nodes=tuple(nodes), meshes=(mesh,), channels=channels, skins=skins), mesh


def spec_morph(mesh, w):
    """glTF 2.0 section 3.7.2.2: base + Σ w_k Δ_k, normals renormalised."""
    pos = mesh.positions + w[0] * mesh.morph_positions[0] + w[1] * mesh.morph_positions[1]
    nrm = mesh.normals + w[0] * mesh.morph_normals[0] + w[1] * mesh.morph_normals[1]
    return pos, nrm / np.linalg.norm(nrm, axis=1, keepdims=True)


@pytest.mark.parametrize("t", [-1.0, 0.0, 0.4, 1.0, 1.7, 2.5, 4.0])
def test_morph_with_linear_weights_is_base_plus_weighted_deltas(t):
    # source: glTF 2.0 section 3.7.2.2 (positions = base + Σ w_k Δ_k) and Appendix C.2 through
    # numpy.interp for the weights
    scene, mesh = morph_scene("LINEAR")
    w = np.array([np.interp(t, MORPH_TIMES, MORPH_KEYS[:, k]) for k in range(2)])
    exp_pos, exp_nrm = spec_morph(mesh, w)
    positions, normals, space = deformed_vertices(scene, 0, t)
    assert space == SPACE_OBJECT
    np.testing.assert_allclose(positions, exp_pos, rtol=0, atol=1e-12)
    np.testing.assert_allclose(normals, exp_nrm, rtol=0, atol=1e-12)


@pytest.mark.parametrize("t,key", [(-1.0, 0), (0.0, 0), (0.99, 0), (1.0, 1), (2.4, 1), (2.5, 2), (9.0, 2)])
def test_morph_with_step_weights_holds_each_key(t, key):
    # source: glTF 2.0 section 3.7.2.2 and Appendix C.1 (STEP: v_k for t_k <= t < t_{k+1})
    scene, mesh = morph_scene("STEP")
    exp_pos, _ = spec_morph(mesh, MORPH_KEYS[key])
    np.testing.assert_allclose(deformed_vertices(scene, 0, t)[0], exp_pos, rtol=0, atol=1e-12)


def test_morph_comes_before_skin():
    # source: glTF 2.0 section 3.7.3 (skinning applies to the morphed vertices): a bone scaling
    # x by 2 doubles the x of base + Δ, not only of the base
    scene, mesh = morph_scene("LINEAR", skin=(2.0, 1.0, 1.0))
    exp_pos, _ = spec_morph(mesh, MORPH_KEYS[1])
    positions, _, space = deformed_vertices(scene, 0, 1.0)
    assert space == SPACE_WORLD
    np.testing.assert_allclose(positions, exp_pos * [2.0, 1.0, 1.0], rtol=0, atol=1e-12)


def test_morph_weight_count_must_match_targets():
    # source: glTF 2.0 section 3.7.2.2 (one weight per morph target)
    scene, mesh = morph_scene("LINEAR")
    bad = Channel(0, "weights", "LINEAR", MORPH_TIMES, np.ones((3, 3)))
    scene = SceneData("blob.gltf", nodes=scene.nodes, meshes=scene.meshes, channels=(bad,))
    with pytest.raises(AssetError, match=r"blob\.gltf: .*has 3 morph weights .* 2 morph targets"):
        deformed_vertices(scene, 0, 0.5)


# ------------------------------------------------------------------------------------- is_deforming


def plain_mesh(**kw):
    return MeshData("m", np.zeros((3, 3)), np.array([[0, 1, 2]]), np.zeros(1, np.int64), **kw)


@pytest.mark.parametrize(
    "case,expected",
    [
        ("no mesh", False),
        ("rigid mesh", False),
        ("morphs, zero weights, no channel", False),
        ("morphs, zero channel", False),
        ("morphs, non-zero default weight", True),
        ("morphs, animated weights", True),
        ("skin", True),
    ],
)
def test_is_deforming(case, expected):
    # source: glTF 2.0 sections 3.7.2.2 and 3.7.3 (what deforms a mesh); the rule of
    # is_deforming's docstring decides the remaining cases
    morph = dict(morph_positions=np.ones((1, 3, 3)), morph_weights=np.zeros(1))
    node = NodeSpec("n", mesh=0)
    mesh = plain_mesh()
    channels, skins, nodes_extra = (), (), ()
    if case == "no mesh":
        node = NodeSpec("n")
    elif case.startswith("morphs"):
        if "non-zero default" in case:
            morph["morph_weights"] = np.array([0.2])
        mesh = plain_mesh(**morph)
        if "channel" in case and "no channel" not in case:
            channels = (Channel(0, "weights", "CUBICSPLINE", np.array([0.0, 1.0]), np.zeros((2, 3, 1))),)
        if "animated" in case:
            channels = (Channel(0, "weights", "LINEAR", np.array([0.0, 1.0]), np.array([[0.0], [1.0]])),)
    elif case == "skin":
        mesh = plain_mesh(joints=np.zeros((3, 4), np.int64), weights=np.tile([1.0, 0, 0, 0], (3, 1)))
        node = NodeSpec("n", mesh=0, skin=0)
        skins = (SkinSpec(np.array([1]), np.eye(4)[None]),)
        nodes_extra = (NodeSpec("bone"),)
    scene = SceneData("d.gltf", nodes=(node,) + nodes_extra, meshes=(mesh,), channels=channels, skins=skins)
    assert is_deforming(scene, 0) is expected
