"""glTF 2.0 animation sampling, node hierarchies and matrix decomposition.

Outside sources: the glTF 2.0 specification (Khronos, 2021) section 3.11 and Appendix C for the
interpolation formulas; numpy.interp for linear interpolation; scipy.interpolate
CubicHermiteSpline for Hermite curves; scipy.spatial.transform Rotation / Slerp for quaternions.
Scenes are built directly as SceneData.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.interpolate import CubicHermiteSpline
from scipy.spatial.transform import Rotation, Slerp

from lampyr.engine.gltf_animation import (
    animation_length,
    compose_trs,
    decompose_trs,
    morph_weights,
    node_locals,
    quat_from_matrix,
    sample_channel,
    world_matrices,
)
from lampyr.engine.scene_data import Channel, MeshData, NodeSpec, SceneData
from lampyr.errors import AssetError

RNG_SEED = 20261202
TIMES = np.array([0.0, 0.4, 1.1, 1.5, 2.75])


def probe_times(times, n=301):
    """Many times across and beyond the keyed range, the keys themselves included."""
    return np.concatenate([np.linspace(times[0] - 0.5, times[-1] + 0.5, n), times])


def scipy_rot(q_wxyz):
    return Rotation.from_quat(q_wxyz, scalar_first=True)


def same_rotation(q, expected_wxyz, atol=1e-12):
    """q and -q are the same rotation: compare up to sign."""
    q = np.asarray(q)
    e = np.asarray(expected_wxyz)
    assert min(np.abs(q - e).max(), np.abs(q + e).max()) <= atol, (q, e)


def random_unit_quats(rng, k):
    q = rng.normal(size=(k, 4))
    return q / np.linalg.norm(q, axis=1, keepdims=True)


# ------------------------------------------------------------------------------------- LINEAR


@pytest.mark.parametrize("path,n", [("translation", 3), ("scale", 3), ("weights", 5)])
def test_linear_matches_numpy_interp(path, n):
    # source: glTF 2.0 Appendix C.2 v = (1-t) v_k + t v_{k+1}, clamped outside (section 3.11);
    # numpy.interp interpolates piecewise linearly and clamps to the end values.
    rng = np.random.default_rng(RNG_SEED)
    values = rng.normal(size=(len(TIMES), n))
    channel = Channel(0, path, "LINEAR", TIMES, values)
    for t in probe_times(TIMES):
        expected = [np.interp(t, TIMES, values[:, j]) for j in range(n)]
        np.testing.assert_allclose(sample_channel(channel, t), expected, rtol=0, atol=1e-12)


def test_linear_rotation_matches_scipy_slerp():
    # source: scipy.spatial.transform.Slerp (geodesic, shorter arc); glTF 2.0 Appendix C.2
    # spherical linear interpolation with s = sign(v_k . v_{k+1}). Alternate keys are negated
    # so that the shorter-arc rule is exercised.
    rng = np.random.default_rng(RNG_SEED + 1)
    keys = random_unit_quats(rng, len(TIMES))
    keys[1::2] *= -1.0
    channel = Channel(0, "rotation", "LINEAR", TIMES, keys)
    slerp = Slerp(TIMES, scipy_rot(keys))
    for t in probe_times(TIMES):
        expected = slerp(np.clip(t, TIMES[0], TIMES[-1])).as_quat(scalar_first=True)
        q = sample_channel(channel, t)
        assert abs(np.linalg.norm(q) - 1.0) < 1e-12
        same_rotation(q, expected, atol=1e-9)


def test_linear_rotation_takes_the_shorter_arc():
    # source: glTF 2.0 Appendix C.2 (s = sign of the dot product); from memory: rotating by
    # +170 deg about z then to -170 deg passes through 180 deg, not through 0.
    a = Rotation.from_euler("z", 170, degrees=True).as_quat(scalar_first=True)
    b = Rotation.from_euler("z", -170, degrees=True).as_quat(scalar_first=True)
    channel = Channel(0, "rotation", "LINEAR", np.array([0.0, 1.0]), np.stack([a, b]))
    angle = scipy_rot(sample_channel(channel, 0.5)).magnitude()
    assert angle == pytest.approx(math.pi, abs=1e-9)


# ------------------------------------------------------------------------------------- STEP


@pytest.mark.parametrize("path,n", [("translation", 3), ("rotation", 4), ("weights", 2)])
def test_step_holds_each_key_until_the_next(path, n):
    # source: glTF 2.0 Appendix C.1 "v_t = v_k for t_k <= t < t_{k+1}"; clamped outside (3.11)
    rng = np.random.default_rng(RNG_SEED + 2)
    values = random_unit_quats(rng, len(TIMES)) if n == 4 else rng.normal(size=(len(TIMES), n))
    channel = Channel(0, path, "STEP", TIMES, values)
    for k in range(len(TIMES) - 1):
        for t in (TIMES[k], 0.5 * (TIMES[k] + TIMES[k + 1]), np.nextafter(TIMES[k + 1], -np.inf)):
            np.testing.assert_allclose(sample_channel(channel, t), values[k], rtol=0, atol=1e-15)
    np.testing.assert_allclose(sample_channel(channel, TIMES[-1]), values[-1], rtol=0, atol=1e-15)
    np.testing.assert_allclose(sample_channel(channel, TIMES[0] - 3.0), values[0], rtol=0, atol=1e-15)
    np.testing.assert_allclose(sample_channel(channel, TIMES[-1] + 3.0), values[-1], rtol=0, atol=1e-15)


# ------------------------------------------------------------------------------------ CUBICSPLINE


def cubic_values(rng, n):
    """(K, 3, n) in-tangent, value, out-tangent with in- and out-tangents that differ."""
    return rng.normal(size=(len(TIMES), 3, n))


def scipy_hermite(times, values, t):
    """Reference: on [t_k, t_{k+1}] the cubic Hermite with end values v_k, v_{k+1} and end
    derivatives (per second) b_k (out-tangent of k) and a_{k+1} (in-tangent of k+1), which is
    what Appendix C.3's m0 = t_d b_k, m1 = t_d a_{k+1} on the unit parameter amount to."""
    t = float(np.clip(t, times[0], times[-1]))
    k = min(int(np.searchsorted(times, t, side="right")) - 1, len(times) - 2)
    spline = CubicHermiteSpline(
        times[k:k + 2], np.stack([values[k, 1], values[k + 1, 1]]), np.stack([values[k, 2], values[k + 1, 0]])
    )
    return spline(t)


@pytest.mark.parametrize("path,n", [("translation", 3), ("scale", 3), ("weights", 4)])
def test_cubic_spline_matches_scipy_hermite(path, n):
    # source: glTF 2.0 Appendix C.3; scipy.interpolate.CubicHermiteSpline per key interval
    rng = np.random.default_rng(RNG_SEED + 3)
    values = cubic_values(rng, n)
    channel = Channel(0, path, "CUBICSPLINE", TIMES, values)
    for t in probe_times(TIMES):
        np.testing.assert_allclose(sample_channel(channel, t), scipy_hermite(TIMES, values, t), rtol=0, atol=1e-11)


def test_cubic_spline_rotation_is_the_normalised_hermite():
    # source: glTF 2.0 Appendix C.3 ("when targeting a rotation, the result must be normalised")
    rng = np.random.default_rng(RNG_SEED + 4)
    values = 0.3 * cubic_values(rng, 4)
    values[:, 1] = random_unit_quats(rng, len(TIMES))
    channel = Channel(0, "rotation", "CUBICSPLINE", TIMES, values)
    for t in probe_times(TIMES):
        ref = scipy_hermite(TIMES, values, t)
        np.testing.assert_allclose(sample_channel(channel, t), ref / np.linalg.norm(ref), rtol=0, atol=1e-11)


def test_cubic_spline_ignores_outer_tangents_and_hits_the_keys():
    # source: glTF 2.0 Appendix C.3 (the curve passes through each v_k; the first in-tangent and
    # the last out-tangent do not take part) and section 3.11 (clamped outside the keys)
    rng = np.random.default_rng(RNG_SEED + 5)
    values = cubic_values(rng, 3)
    other = values.copy()
    other[0, 0] += 100.0
    other[-1, 2] -= 100.0
    a = Channel(0, "translation", "CUBICSPLINE", TIMES, values)
    b = Channel(0, "translation", "CUBICSPLINE", TIMES, other)
    for t in probe_times(TIMES):
        np.testing.assert_allclose(sample_channel(a, t), sample_channel(b, t), rtol=0, atol=1e-12)
    for k, tk in enumerate(TIMES):
        np.testing.assert_allclose(sample_channel(a, tk), values[k, 1], rtol=0, atol=1e-12)


@pytest.mark.parametrize("interpolation", ["LINEAR", "STEP", "CUBICSPLINE"])
def test_single_key_is_a_constant(interpolation):
    # source: glTF 2.0 section 3.11 (values clamped to the keyed range, here one instant)
    value = np.array([1.0, -2.0, 0.5])
    values = np.stack([np.zeros(3), value, np.zeros(3)])[None] if interpolation == "CUBICSPLINE" else value[None]
    channel = Channel(0, "translation", interpolation, np.array([0.7]), values)
    for t in (-1.0, 0.7, 5.0):
        np.testing.assert_array_equal(sample_channel(channel, t), value)


def test_animation_length_is_the_last_key_time():
    # source: glTF 2.0 section 3.11 (all animations start at 0 here; the last input is the end)
    scene = SceneData(
        "s.gltf",
        nodes=(NodeSpec("a"), NodeSpec("b")),
        channels=(
            Channel(0, "translation", "LINEAR", np.array([0.0, 1.25]), np.zeros((2, 3))),
            Channel(1, "scale", "STEP", np.array([0.5, 3.5]), np.ones((2, 3))),
        ),
    )
    assert animation_length(scene) == 3.5
    assert animation_length(SceneData("s.gltf")) == 0.0


# ------------------------------------------------------------------------------------- hierarchy


def scipy_trs(t, q_wxyz, s):
    """Reference T · R · S (glTF 2.0 section 3.5.3) with scipy's rotation matrix."""
    m = np.eye(4)
    m[:3, :3] = scipy_rot(q_wxyz).as_matrix() @ np.diag(s)
    m[:3, 3] = t
    return m


def three_level_scene(order):
    """A root, a child, a grandchild (stored in `order`) with random rest TRS; the child's rotation
    and the grandchild's translation animated. Returns the scene and the rest/animation data."""
    rng = np.random.default_rng(RNG_SEED + 6)
    rest = [(rng.normal(size=3), random_unit_quats(rng, 1)[0], rng.uniform(0.5, 2.0, 3)) for _ in range(3)]
    logical_parent = [-1, 0, 1]
    where = {logical: stored for stored, logical in enumerate(order)}
    nodes = [None] * 3
    for logical in range(3):
        t, q, s = rest[logical]
        parent = logical_parent[logical]
        nodes[where[logical]] = NodeSpec(
            f"n{logical}", parent=-1 if parent == -1 else where[parent], translation=t, rotation=q, scale=s
        )
    rot_keys = random_unit_quats(rng, 2)
    move_keys = rng.normal(size=(2, 3))
    channels = (
        Channel(where[1], "rotation", "LINEAR", np.array([0.0, 2.0]), rot_keys),
        Channel(where[2], "translation", "LINEAR", np.array([0.0, 2.0]), move_keys),
    )
    return SceneData("h.gltf", nodes=tuple(nodes), roots=(where[0],), channels=channels), rest, rot_keys, move_keys, where


@pytest.mark.parametrize("order", [(0, 1, 2), (2, 1, 0), (1, 2, 0)])
@pytest.mark.parametrize("t", [0.0, 0.6, 2.0, 3.0])
def test_world_matrices_match_scipy_composition(order, t):
    # source: glTF 2.0 section 3.5.3 (local = T·R·S; world = parent world · local) composed with
    # scipy Rotation matrices; animated values from scipy Slerp and numpy.interp
    scene, rest, rot_keys, move_keys, where = three_level_scene(order)
    u = min(t, 2.0)
    q1 = Slerp([0.0, 2.0], scipy_rot(rot_keys))(u).as_quat(scalar_first=True)
    t2 = [np.interp(u, [0.0, 2.0], move_keys[:, j]) for j in range(3)]
    m0 = scipy_trs(*rest[0])
    m1 = m0 @ scipy_trs(rest[1][0], q1, rest[1][2])
    m2 = m1 @ scipy_trs(t2, rest[2][1], rest[2][2])
    worlds = world_matrices(scene, t)
    for logical, expected in enumerate((m0, m1, m2)):
        np.testing.assert_allclose(worlds[where[logical]], expected, rtol=0, atol=1e-9)


def test_matrix_node_keeps_its_matrix():
    # source: glTF 2.0 section 3.5.3 (a node's matrix is its local transform; such a node is not
    # a target of animation, so a stray channel does not move it)
    rng = np.random.default_rng(RNG_SEED + 7)
    m = scipy_trs(rng.normal(size=3), random_unit_quats(rng, 1)[0], [1.0, 2.0, 0.5])
    scene = SceneData(
        "m.gltf",
        nodes=(NodeSpec("m", matrix=m),),
        channels=(Channel(0, "translation", "LINEAR", np.array([0.0, 1.0]), np.ones((2, 3))),),
    )
    np.testing.assert_array_equal(node_locals(scene, 0.5)[0], m)


def test_parent_cycle_is_refused_naming_the_node():
    # source: glTF 2.0 section 3.5.3 ("the node hierarchy MUST be a set of disjoint strict trees")
    scene = SceneData("loop.gltf", nodes=(NodeSpec("a", parent=1), NodeSpec("b", parent=0)))
    with pytest.raises(AssetError, match=r"loop\.gltf: nodes\[\d\]: is its own ancestor"):
        world_matrices(scene, 0.0)


# ------------------------------------------------------------------------------------- morph weights


def morph_scene(node_weights=None, channel=None):
    mesh = MeshData(
        "m", np.zeros((1, 3)), np.zeros((0, 3), np.int64), np.zeros(0, np.int64),
        morph_positions=np.zeros((2, 1, 3)), morph_weights=np.array([0.25, 0.75]),
    )
    channels = () if channel is None else (channel,)
    return SceneData("w.gltf", nodes=(NodeSpec("n", mesh=0, weights=node_weights),), meshes=(mesh,), channels=channels)


def test_morph_weights_default_to_the_mesh():
    # source: glTF 2.0 section 3.7.2.2 (mesh.weights are the defaults)
    np.testing.assert_array_equal(morph_weights(morph_scene(), 0, 1.0), [0.25, 0.75])


def test_morph_weights_node_overrides_mesh():
    # source: glTF 2.0 section 3.5 (node.weights overrides mesh.weights)
    np.testing.assert_array_equal(morph_weights(morph_scene(node_weights=np.array([1.0, 0.0])), 0, 1.0), [1.0, 0.0])


def test_morph_weights_channel_overrides_node():
    # source: glTF 2.0 section 3.11 (the "weights" path animates the morph weights); numpy.interp
    channel = Channel(0, "weights", "LINEAR", np.array([0.0, 2.0]), np.array([[0.0, 1.0], [1.0, 0.0]]))
    scene = morph_scene(node_weights=np.array([0.5, 0.5]), channel=channel)
    np.testing.assert_allclose(morph_weights(scene, 0, 0.5), [np.interp(0.5, [0, 2], [0, 1]), np.interp(0.5, [0, 2], [1, 0])])


# ------------------------------------------------------------------------------------- decomposition


def random_trs(rng, n):
    for _ in range(n):
        yield rng.normal(size=3) * 3.0, Rotation.random(random_state=rng).as_quat(scalar_first=True), rng.uniform(0.1, 4.0, 3)


def test_decompose_round_trips_random_trs():
    # source: scipy Rotation builds the matrices and recomposes the result (glTF 2.0 3.5.3 T·R·S)
    rng = np.random.default_rng(RNG_SEED + 8)
    for t, q, s in random_trs(rng, 200):
        m = scipy_trs(t, q, s)
        t2, q2, s2, exact = decompose_trs(m)
        assert exact
        np.testing.assert_allclose(t2, t, rtol=0, atol=1e-12)
        np.testing.assert_allclose(s2, s, rtol=1e-12)
        same_rotation(q2, q, atol=1e-9)
        np.testing.assert_allclose(scipy_trs(t2, q2, s2), m, rtol=0, atol=1e-11)


def test_decompose_flags_shear_as_not_exact():
    # source: from memory — a shear matrix [[1, k, 0], [0, 1, 0], [0, 0, 1]] has columns at
    # cos = k / sqrt(1 + k^2) from orthogonal, which no rotation times scale reproduces
    rng = np.random.default_rng(RNG_SEED + 9)
    t, q, s = next(random_trs(rng, 1))
    shear = np.eye(4)
    shear[0, 1] = 0.05
    t2, q2, s2, exact = decompose_trs(scipy_trs(t, q, s) @ shear)
    assert not exact
    assert abs(np.linalg.norm(q2) - 1.0) < 1e-12


def test_decompose_accepts_float32_rounding_as_exact():
    # rule of thumb: glTF files store float32; a TRS matrix rounded to float32 is still a TRS
    rng = np.random.default_rng(RNG_SEED + 10)
    for t, q, s in random_trs(rng, 50):
        m32 = scipy_trs(t, q, s).astype(np.float32).astype(np.float64)
        assert decompose_trs(m32)[3]


@pytest.mark.parametrize("mirror", [(-1, 1, 1), (1, -1, 1), (1, 1, -1), (-1, -1, -1)])
def test_decompose_mirror_gives_negative_x_scale(mirror):
    # source: scipy Rotation recomposes; a matrix with det < 0 is a rotation times a reflection,
    # written here as a negative scale on x (decompose_trs's documented convention)
    rng = np.random.default_rng(RNG_SEED + 11)
    t, q, s = next(random_trs(rng, 1))
    m = scipy_trs(t, q, s * np.array(mirror))
    t2, q2, s2, exact = decompose_trs(m)
    assert exact
    assert s2[0] < 0.0 and s2[1] > 0.0 and s2[2] > 0.0
    np.testing.assert_allclose(np.abs(s2), s, rtol=1e-12)
    np.testing.assert_allclose(scipy_trs(t2, q2, s2), m, rtol=0, atol=1e-11)


def test_decompose_keeps_a_zero_scale():
    # source: scipy Rotation recomposes; a node animated to scale 0 on one axis is still T·R·S
    rng = np.random.default_rng(RNG_SEED + 12)
    t, q, s = next(random_trs(rng, 1))
    s[1] = 0.0
    m = scipy_trs(t, q, s)
    t2, q2, s2, exact = decompose_trs(m)
    assert exact
    np.testing.assert_allclose(s2, s, rtol=1e-12, atol=0)
    np.testing.assert_allclose(scipy_trs(t2, q2, s2), m, rtol=0, atol=1e-11)


def test_compose_matches_scipy():
    # source: scipy Rotation matrix; glTF 2.0 section 3.5.3 (T · R · S)
    rng = np.random.default_rng(RNG_SEED + 13)
    for t, q, s in random_trs(rng, 20):
        np.testing.assert_allclose(compose_trs(t, q, s), scipy_trs(t, q, s), rtol=0, atol=1e-12)


@pytest.mark.parametrize("angle", [0.0, 1e-6, 0.5, 2.0, math.pi - 1e-7, math.pi])
def test_quat_from_matrix_matches_scipy(angle):
    # source: scipy Rotation.from_matrix / as_quat; angles near 0 and pi exercise each branch
    rng = np.random.default_rng(RNG_SEED + 14)
    for _ in range(20):
        axis = rng.normal(size=3)
        r = Rotation.from_rotvec(angle * axis / np.linalg.norm(axis))
        same_rotation(quat_from_matrix(r.as_matrix()), r.as_quat(scalar_first=True), atol=1e-9)
