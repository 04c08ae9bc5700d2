"""Animation and skinning of a glTF file end to end: written by examples/gltf_builder.py, checked
by the Khronos glTF-Validator, read by lampyr's reader, evaluated by gltf_animation / skinning.

Expected values come from the numbers the test writes, through outside code only: scipy
CubicHermiteSpline (glTF 2.0 Appendix C.3 spline), scipy Slerp, numpy.interp, scipy Rotation
for T·R·S (section 3.5.3), the section 3.7.3 joint-matrix formula and the section 3.7.2.2
morph sum evaluated vertex by vertex with numpy. Every input is rounded to float32 before it is
written and before the expected values are computed, so both sides see the same numbers.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.interpolate import CubicHermiteSpline
from scipy.spatial.transform import Rotation, Slerp

from examples.gltf_builder import GltfBuilder
from lampyr.engine.gltf_animation import animation_length, world_matrices
from lampyr.engine.gltf_read import read_gltf
from lampyr.engine.skinning import SPACE_OBJECT, SPACE_WORLD, deformed_vertices
from tests.engine.test_skinning import cylinder
from tests.gltf_validator import assert_valid

TUBE, ARMATURE, BONE0, BONE1, BLOB = range(5)
ATOL = 1e-6  # float32 storage of the rest rotations may be renormalised by the reader


def f32(a):
    return np.asarray(a, np.float64).astype(np.float32).astype(np.float64)


def xyzw(q_wxyz):
    return np.asarray(q_wxyz)[..., [1, 2, 3, 0]]


def rot(q_wxyz):
    return Rotation.from_quat(q_wxyz, scalar_first=True)


def trs(t, q_wxyz, s=(1.0, 1.0, 1.0)):
    m = np.eye(4)
    m[:3, :3] = rot(q_wxyz).as_matrix() @ np.diag(s)
    m[:3, 3] = t
    return m


def unit(q):
    return q / np.linalg.norm(q, axis=-1, keepdims=True)


class Inputs:
    """What the test writes, float32-rounded."""

    arm_t = f32([0.3, 0.0, -1.0])
    arm_q = f32(Rotation.from_euler("y", 30, degrees=True).as_quat(scalar_first=True))
    bone1_t = f32([0.0, 1.0, 0.0])
    arm_move_times = f32([0.0, 2.0])
    arm_move = f32([[0.3, 0.0, -1.0], [0.3, 0.5, -1.0]])
    bone0_times = f32([0.0, 0.75, 2.0])
    # CUBICSPLINE (K, 3, 4): in-tangent, value, out-tangent, w-x-y-z
    bone0_cubic = f32(np.stack([
        [[0.0, 0.0, 0.0, 0.0], [1.0, 0.0, 0.0, 0.0], [0.0, 0.3, 0.0, 0.1]],
        [[0.0, 0.2, 0.1, 0.0], unit(np.array([0.9, 0.4, 0.0, 0.1])), [-0.1, 0.1, 0.2, 0.0]],
        [[0.0, -0.2, 0.0, 0.3], unit(np.array([0.8, 0.0, 0.3, 0.5])), [0.0, 0.0, 0.0, 0.0]],
    ]))
    bone1_times = f32([0.0, 2.0])
    bone1_keys = f32(np.stack([[1.0, 0.0, 0.0, 0.0], Rotation.from_euler("z", 90, degrees=True).as_quat(scalar_first=True)]))
    weight_times = f32([0.0, 0.5, 1.5])
    weight_keys = f32([[0.0, 1.0], [1.0, 0.0], [0.25, 0.75]])


def bone_worlds(t):
    """World matrices of the two bones at time t from the written numbers (outside code only)."""
    i = Inputs
    tc = float(np.clip(t, 0.0, 2.0))
    arm_t = [np.interp(tc, i.arm_move_times, i.arm_move[:, j]) for j in range(3)]
    k = min(int(np.searchsorted(i.bone0_times, tc, side="right")) - 1, len(i.bone0_times) - 2)
    spline = CubicHermiteSpline(i.bone0_times[k:k + 2], i.bone0_cubic[k:k + 2, 1],
                                np.stack([i.bone0_cubic[k, 2], i.bone0_cubic[k + 1, 0]]))
    q0 = unit(spline(tc))
    q1 = Slerp(i.bone1_times, rot(i.bone1_keys))(tc).as_quat(scalar_first=True)
    world_arm = trs(arm_t, i.arm_q)
    world0 = world_arm @ trs(np.zeros(3), q0)
    return world_arm, world0, world0 @ trs(i.bone1_t, q1)


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    i = Inputs
    positions, normals, faces = cylinder()
    positions, normals = f32(positions), f32(normals)
    w1 = f32(np.clip((positions[:, 1] - 0.6) / 0.8, 0.0, 1.0))
    joints = np.zeros((len(positions), 4), np.int64)
    joints[:, 1] = np.where(w1 > 0.0, 1, 0)  # the validator wants unused slots on joint 0
    weights = np.zeros((len(positions), 4))
    weights[:, 0], weights[:, 1] = 1.0 - w1, w1
    rest_bone0 = trs(i.arm_t, i.arm_q)
    inverse_bind = f32(np.stack([np.linalg.inv(rest_bone0), np.linalg.inv(rest_bone0 @ trs(i.bone1_t, [1, 0, 0, 0]))]))
    rng = np.random.default_rng(99)
    blob_pos = f32(rng.normal(size=(4, 3)))
    blob_deltas = f32(rng.normal(size=(2, 4, 3)))

    b = GltfBuilder()
    tube = b.add_mesh([b.primitive(positions, normals=normals, indices=faces, joints=joints, weights=weights)])
    blob = b.add_mesh([b.primitive(blob_pos, indices=np.array([[0, 1, 2], [0, 2, 3]]),
                                   targets=[{"POSITION": blob_deltas[0]}, {"POSITION": blob_deltas[1]}])],
                      weights=[0.0, 0.0])
    b.add_node("tube", mesh=tube, skin=0)
    b.add_node("armature", translation=i.arm_t, rotation=xyzw(i.arm_q), children=[BONE0])
    b.add_node("bone0", children=[BONE1])
    b.add_node("bone1", translation=i.bone1_t)
    b.add_node("blob", mesh=blob, translation=(0.0, 3.0, 0.0))
    b.add_skin([BONE0, BONE1], inverse_bind, skeleton=ARMATURE)
    b.add_animation([
        (ARMATURE, "translation", i.arm_move_times, i.arm_move, "LINEAR"),
        (BONE0, "rotation", i.bone0_times, xyzw(i.bone0_cubic), "CUBICSPLINE"),
        (BONE1, "rotation", i.bone1_times, xyzw(i.bone1_keys), "LINEAR"),
    ], name="bend")
    b.add_animation([(BLOB, "weights", i.weight_times, i.weight_keys, "STEP")], name="blink")
    path = b.save(tmp_path_factory.mktemp("anim") / "bend.glb")
    mesh = dict(positions=positions, normals=normals, joints=joints, weights=weights, inverse_bind=inverse_bind,
                blob_pos=blob_pos, blob_deltas=blob_deltas)
    return path, read_gltf(path, "scene"), mesh


def test_written_file_is_valid(written):
    # source: the Khronos glTF-Validator reports no error
    assert_valid(written[0])


def test_animation_length_is_the_last_key(written):
    # source: the key times written (glTF 2.0 section 3.11)
    assert animation_length(written[1]) == pytest.approx(2.0, abs=0)


@pytest.mark.parametrize("t", [-0.5, 0.0, 0.3, 0.75, 1.4, 2.0, 3.0])
def test_bone_worlds_from_the_file(written, t):
    # source: scipy CubicHermiteSpline / Slerp / numpy.interp on the written keys, scipy Rotation
    _, scene, _ = written
    worlds = world_matrices(scene, t)
    for node, expected in zip((ARMATURE, BONE0, BONE1), bone_worlds(t)):
        np.testing.assert_allclose(worlds[node], expected, rtol=0, atol=ATOL)


@pytest.mark.parametrize("t", [0.0, 0.9, 2.0])
def test_skinned_tube_from_the_file(written, t):
    # source: glTF 2.0 section 3.7.3, v' = Σ w_i world(joint_i) · IBM_i · v, per vertex with numpy
    _, scene, mesh = written
    _, world0, world1 = bone_worlds(t)
    joint_mats = [world0 @ mesh["inverse_bind"][0], world1 @ mesh["inverse_bind"][1]]
    expected = np.array([
        sum(mesh["weights"][v, k] * joint_mats[mesh["joints"][v, k]] for k in range(4)) @ np.append(p, 1.0)
        for v, p in enumerate(mesh["positions"])
    ])[:, :3]
    positions, _, space = deformed_vertices(scene, TUBE, t)
    assert space == SPACE_WORLD
    np.testing.assert_allclose(positions, expected, rtol=0, atol=ATOL)


@pytest.mark.parametrize("t,key", [(0.0, 0), (0.49, 0), (0.5, 1), (1.2, 1), (1.5, 2), (5.0, 2)])
def test_morph_from_the_file_steps_through_the_keys(written, t, key):
    # source: glTF 2.0 section 3.7.2.2 (base + Σ w_k Δ_k) and Appendix C.1 (STEP)
    _, scene, mesh = written
    w = Inputs.weight_keys[key]
    expected = mesh["blob_pos"] + w[0] * mesh["blob_deltas"][0] + w[1] * mesh["blob_deltas"][1]
    positions, normals, space = deformed_vertices(scene, BLOB, t)
    assert space == SPACE_OBJECT and normals is None
    np.testing.assert_allclose(positions, expected, rtol=0, atol=1e-12)
