"""Quaternions and key-frame interpolation, checked against scipy.spatial.transform.

scipy's `Rotation.from_euler('xyz', ..., degrees=True)` with lowercase axes is *extrinsic*: X
first, then Y, then Z about the fixed axes, R = Rz · Ry · Rx (scipy documentation,
Rotation.from_euler: "lower case characters for extrinsic rotations"); `Slerp` interpolates along
the geodesic between key rotations.
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest
from scipy.spatial.transform import Rotation, Slerp

from lampyr.engine.animation import (
    camera_at,
    compose_matrix,
    object_transform,
    quat_from_euler_xyz,
    quat_slerp,
    quat_to_matrix,
)
from lampyr.engine.shot import CameraKey, ObjectKey
from lampyr.engine.transforms import apply_placement, pack_placement

ANGLES = [(0, 0, 0), (90, 0, 0), (0, 90, 0), (0, 0, 90), (30, -45, 60), (170, 10, -120), (-90, 89.9, 45)]


def _rx(a):
    c, s = math.cos(a), math.sin(a)
    return np.array([[1, 0, 0], [0, c, -s], [0, s, c]])


def _ry(a):
    c, s = math.cos(a), math.sin(a)
    return np.array([[c, 0, s], [0, 1, 0], [-s, 0, c]])


def _rz(a):
    c, s = math.cos(a), math.sin(a)
    return np.array([[c, -s, 0], [s, c, 0], [0, 0, 1]])


def vec(*v):
    return np.array(v, np.float64)


def scipy_matrix(deg):
    """Reference: scipy's extrinsic X-then-Y-then-Z rotation matrix of Euler degrees."""
    return Rotation.from_euler("xyz", deg, degrees=True).as_matrix()


@pytest.mark.parametrize("deg", ANGLES)
def test_euler_matches_scipy_extrinsic_xyz(deg):
    # source: scipy Rotation.from_euler('xyz', degrees=True), extrinsic X then Y then Z
    expected = Rotation.from_euler("xyz", deg, degrees=True).as_matrix()
    np.testing.assert_allclose(quat_to_matrix(quat_from_euler_xyz(deg)), expected, rtol=0, atol=1e-12)


@pytest.mark.parametrize("deg", ANGLES)
def test_euler_is_x_then_y_then_z_about_fixed_axes(deg):
    # source: textbook elementary rotation matrices (right-handed); fixed axes compose as Rz Ry Rx
    x, y, z = np.radians(deg)
    np.testing.assert_allclose(quat_to_matrix(quat_from_euler_xyz(deg)), _rz(z) @ _ry(y) @ _rx(x), atol=1e-12)


@pytest.mark.parametrize("deg", ANGLES)
def test_quat_to_matrix_matches_scipy(deg):
    # source: scipy Rotation.from_quat(scalar_first=True).as_matrix()
    q = quat_from_euler_xyz(deg)
    expected = Rotation.from_quat(q, scalar_first=True).as_matrix()
    np.testing.assert_allclose(quat_to_matrix(q), expected, rtol=0, atol=1e-12)


@pytest.mark.parametrize(
    "a, b",
    [
        ((0, 0, 0), (0, 90, 0)),
        ((10, 20, 30), (-40, 50, 160)),
        ((0, 0, 0), (0, 179, 0)),  # nearly opposite rotations
        ((5, 5, 5), (5, 5, 5.000001)),  # nearly equal: acos-based slerp loses digits here
        ((0, 170, 0), (0, -170, 0)),  # shortest path crosses ±180°
    ],
)
@pytest.mark.parametrize("t", [0.0, 0.25, 0.5, 0.9, 1.0])
def test_slerp_matches_scipy(a, b, t):
    # source: scipy Slerp (geodesic interpolation, the shorter way between rotations)
    qa, qb = quat_from_euler_xyz(a), quat_from_euler_xyz(b)
    ref = Slerp([0.0, 1.0], Rotation.from_quat([qa, qb], scalar_first=True))([t]).as_matrix()[0]
    np.testing.assert_allclose(quat_to_matrix(quat_slerp(qa, qb, t)), ref, rtol=0, atol=1e-12)


def test_slerp_takes_the_shorter_arc_when_the_dot_is_negative():
    # source: Shoemake 1985: q and -q are one rotation; slerp(a, -b) must equal slerp(a, b)
    qa, qb = quat_from_euler_xyz((0, 20, 0)), quat_from_euler_xyz((0, 100, 0))
    expected = quat_to_matrix(quat_from_euler_xyz((0, 60, 0)))
    np.testing.assert_allclose(quat_to_matrix(quat_slerp(qa, -qb, 0.5)), expected, atol=1e-12)


def test_compose_matrix_scales_then_rotates_then_translates():
    # source: scipy Rotation.apply on scaled points, plus the translation
    t, deg, s = vec(1, -2, 3), (30, 40, 50), vec(2, 3, 0.5)
    points = np.array([[1.0, 0, 0], [0, 1, 0], [0.3, -0.2, 0.7]])
    m = compose_matrix(t, quat_from_euler_xyz(deg), s)
    expected = Rotation.from_euler("xyz", deg, degrees=True).apply(points * s) + t
    np.testing.assert_allclose(points @ m[:, :3].T + m[:, 3], expected, atol=1e-12)


def test_compose_matrix_agrees_with_kernel_placement():
    # source: scipy as above; lampyr.engine.transforms is the kernel side of the same convention
    t, q, s = vec(0.5, 1, -1), quat_from_euler_xyz((10, -70, 25)), vec(1, 2, 3)
    points = np.array([[1.0, 2, 3], [-1, 0.5, 0]])
    m = compose_matrix(t, q, s)
    expected = points @ m[:, :3].T + m[:, 3]
    np.testing.assert_allclose(apply_placement(pack_placement(t, q, s), points), expected, atol=1e-12)


# ---------------------------------------------------------------------------------------------
# objects


def make_object(keys=(), translate=(0, 0, 0), rotate=(0, 0, 0), scale=(1, 1, 1)):
    return SimpleNamespace(translate=vec(*translate), rotate=vec(*rotate), scale=vec(*scale),
                           keys=tuple(keys))


KEYED = make_object(
    keys=[
        ObjectKey(10, translate=vec(0, 0, 0), rotate=vec(0, 0, 0)),
        ObjectKey(20, scale=vec(2, 2, 2)),
        ObjectKey(30, translate=vec(4, 0, -2), rotate=vec(0, 90, 0), scale=vec(1, 3, 1)),
    ],
    translate=(9, 9, 9), rotate=(45, 0, 0), scale=(5, 5, 5),
)


def test_object_without_keys_uses_its_base_values():
    # source: docs/shot-file.md, animation: a channel no key sets keeps the base value
    obj = make_object(translate=(1, 2, 3), rotate=(30, 40, 50), scale=(2, 2, 2))
    t, q, s = object_transform(obj, 7.5)
    np.testing.assert_array_equal(t, [1, 2, 3])
    np.testing.assert_array_equal(s, [2, 2, 2])
    np.testing.assert_allclose(quat_to_matrix(q), scipy_matrix((30, 40, 50)), atol=1e-12)


@pytest.mark.parametrize("key", KEYED.keys, ids=lambda k: f"frame{k.frame}")
def test_interpolation_at_a_key_reproduces_the_key(key):
    # source: docs/shot-file.md: interpolation passes through every key
    t, q, s = object_transform(KEYED, key.frame)
    if key.translate is not None:
        np.testing.assert_allclose(t, key.translate, atol=1e-12)
    if key.scale is not None:
        np.testing.assert_allclose(s, key.scale, atol=1e-12)
    if key.rotate is not None:
        np.testing.assert_allclose(quat_to_matrix(q), scipy_matrix(key.rotate), atol=1e-12)


@pytest.mark.parametrize("time, key", [(0.0, 0), (9.5, 0), (30.0, 2), (45.25, 2)])
def test_channels_hold_before_the_first_and_after_the_last_key(time, key):
    # source: docs/shot-file.md: held constant outside the keyed range
    t, q, _ = object_transform(KEYED, time)
    k = KEYED.keys[key]
    np.testing.assert_allclose(t, k.translate, atol=1e-12)
    np.testing.assert_allclose(quat_to_matrix(q), scipy_matrix(k.rotate), atol=1e-12)


def test_translation_is_linear_between_the_keys_that_set_it():
    # source: linear interpolation; key 20 sets only scale, so translate runs from key 10 to key 30
    t, _, _ = object_transform(KEYED, 17.5)
    np.testing.assert_allclose(t, 0.375 * vec(4, 0, -2), atol=1e-12)


def test_scale_is_linear_over_its_own_keys():
    # source: linear interpolation between key 20 (2, 2, 2) and key 30 (1, 3, 1)
    _, _, s = object_transform(KEYED, 25.0)
    np.testing.assert_allclose(s, [1.5, 2.5, 1.5], atol=1e-12)


@pytest.mark.parametrize("time", [12.0, 17.5, 26.0])
def test_rotation_between_keys_matches_scipy_slerp(time):
    # source: scipy Slerp between the key rotations at frames 10 and 30
    _, q, _ = object_transform(KEYED, time)
    keys = Rotation.from_euler("xyz", [(0, 0, 0), (0, 90, 0)], degrees=True)
    ref = Slerp([10.0, 30.0], keys)([time]).as_matrix()[0]
    np.testing.assert_allclose(quat_to_matrix(q), ref, rtol=0, atol=1e-12)


# ---------------------------------------------------------------------------------------------
# camera


def make_camera(keys=(), auto_focus=False):
    return SimpleNamespace(position=vec(0, 0, 5), target=vec(0, 0, 0), up=vec(0, 1, 0), fov=40.0, focus=5.0,
                           keys=tuple(keys), auto_focus=auto_focus)


CAMERA_KEYS = [
    CameraKey(1, position=vec(0, 0, 10), fov=30.0),
    CameraKey(5, target=vec(1, 0, 0)),
    CameraKey(9, position=vec(4, 0, 6), fov=50.0, focus=2.0),
]


def test_camera_at_a_key_reproduces_it():
    # source: docs/shot-file.md: interpolation passes through every key
    position, target, up, fov, focus = camera_at(make_camera(CAMERA_KEYS), 9)
    np.testing.assert_array_equal(position, [4, 0, 6])
    np.testing.assert_array_equal(target, [1, 0, 0])
    assert (fov, focus) == (50.0, 2.0)


def test_camera_channels_are_linear_between_their_keys():
    # source: linear interpolation; position keys at 1 and 9, fov keys at 1 and 9
    position, _, up, fov, _ = camera_at(make_camera(CAMERA_KEYS), 3)
    np.testing.assert_allclose(position, vec(0, 0, 10) + 0.25 * (vec(4, 0, 6) - vec(0, 0, 10)), atol=1e-12)
    assert fov == pytest.approx(35.0, abs=1e-12)
    np.testing.assert_array_equal(up, [0, 1, 0])


@pytest.mark.parametrize("time, position", [(0.0, (0, 0, 10)), (20.0, (4, 0, 6))])
def test_camera_holds_outside_its_keys(time, position):
    # source: docs/shot-file.md: held constant outside the keyed range
    np.testing.assert_array_equal(camera_at(make_camera(CAMERA_KEYS), time)[0], position)


def test_auto_focus_follows_the_target_distance():
    # source: docs/shot-file.md: focus defaults to |target - position| at every instant
    keys = [CameraKey(0, position=vec(0, 0, 4)), CameraKey(10, position=vec(0, 3, 4))]
    _, _, _, _, focus = camera_at(make_camera(keys, auto_focus=True), 10)
    assert focus == pytest.approx(5.0, abs=1e-12)  # the 3-4-5 right triangle
