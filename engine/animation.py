"""Key-frame animation: an object's or the camera's placement at any time (in frames).

Quaternions are `(4,) float64` in (w, x, y, z) order, unit length. Euler angles in a shot are
degrees `[x, y, z]` applied X first, then Y, then Z, each about the fixed world axes through the
object's origin: R = Rz · Ry · Rx (scipy's extrinsic `from_euler('xyz', degrees=True)`).

Each channel (translate, rotate, scale; camera position, target, up, fov, focus) is interpolated
on its own, over only the keys that set it: linearly, and rotation by spherical linear
interpolation along the shorter arc (Shoemake 1985, "Animating rotation with quaternion curves").
Before its first key and after its last a channel holds that key's value; a channel no key sets
keeps the base value. Because slerp takes the shorter arc, two keys further apart than 180° turn
the short way round: a full spin needs keys less than 180° apart.
"""

from __future__ import annotations

import math

import numpy as np


def quat_mul(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Hamilton product a·b of (4,) w-x-y-z quaternions (rotation b first, then a)."""
    aw, ax, ay, az = a
    bw, bx, by, bz = b
    return np.array([
        aw * bw - ax * bx - ay * by - az * bz,
        aw * bx + ax * bw + ay * bz - az * by,
        aw * by - ax * bz + ay * bw + az * bx,
        aw * bz + ax * by - ay * bx + az * bw,
    ])


def quat_axis_angle(axis: int, degrees: float) -> np.ndarray:
    """(4,) quaternion of a rotation by `degrees` about world axis 0, 1 or 2 (x, y, z)."""
    half = math.radians(degrees) * 0.5
    q = np.zeros(4)
    q[0] = math.cos(half)
    q[1 + axis] = math.sin(half)
    return q


def quat_from_euler_xyz(deg) -> np.ndarray:
    """(4,) unit quaternion of Euler degrees `deg (3,)` applied X, then Y, then Z (fixed axes)."""
    x, y, z = (float(v) for v in deg)
    # the rotation applied first stands rightmost: q = qz · qy · qx
    return quat_mul(quat_axis_angle(2, z), quat_mul(quat_axis_angle(1, y), quat_axis_angle(0, x)))


def quat_slerp(a, b, t: float) -> np.ndarray:
    """Spherical linear interpolation of unit quaternions `a`, `b` (4,) at t, shorter arc.

    slerp(a, b; t) = sin((1 - t) θ) / sin θ · a + sin(t θ) / sin θ · b with cos θ = a·b
    (Shoemake 1985); b is negated first when a·b < 0, since q and -q are the same rotation.
    """
    a = np.asarray(a, np.float64)
    b = np.asarray(b, np.float64)
    if float(a @ b) < 0.0:
        b = -b
    # θ from atan2 of |a - b| and |a + b| keeps full precision near θ = 0, where acos does not
    theta = 2.0 * math.atan2(float(np.linalg.norm(a - b)), float(np.linalg.norm(a + b)))
    if theta == 0.0:
        return a.copy()
    s = math.sin(theta)
    q = (math.sin((1.0 - t) * theta) / s) * a + (math.sin(t * theta) / s) * b
    return q / np.linalg.norm(q)


def quat_to_matrix(q) -> np.ndarray:
    """(3, 3) float64 rotation matrix of the quaternion `q (4,)` (normalised first)."""
    w, x, y, z = np.asarray(q, np.float64) / np.linalg.norm(q)
    return np.array([
        [1.0 - 2.0 * (y * y + z * z), 2.0 * (x * y - w * z), 2.0 * (x * z + w * y)],
        [2.0 * (x * y + w * z), 1.0 - 2.0 * (x * x + z * z), 2.0 * (y * z - w * x)],
        [2.0 * (x * z - w * y), 2.0 * (y * z + w * x), 1.0 - 2.0 * (x * x + y * y)],
    ])


def compose_matrix(t, q, s) -> np.ndarray:
    """(3, 4) world-from-object matrix: scale by `s (3,)`, rotate by `q (4,)`, translate by `t (3,)`."""
    m = np.empty((3, 4))
    m[:, :3] = quat_to_matrix(q) * np.broadcast_to(np.asarray(s, np.float64), 3)[None, :]
    m[:, 3] = np.asarray(t, np.float64)
    return m


def _bracket(frames: list[int], time: float) -> tuple[int, int, float]:
    """Indices (i, j) of the keys around `time` and the fraction u in [0, 1] from i to j."""
    if time <= frames[0]:
        return 0, 0, 0.0
    if time >= frames[-1]:
        last = len(frames) - 1
        return last, last, 0.0
    j = int(np.searchsorted(frames, time, side="right"))
    i = j - 1
    return i, j, (time - frames[i]) / (frames[j] - frames[i])


def _channel(keys, name: str, base, time: float, blend):
    """The value of channel `name` at `time` over the keys that set it (base when none does)."""
    pairs = [(k.frame, getattr(k, name)) for k in keys if getattr(k, name) is not None]
    if not pairs:
        return base
    i, j, u = _bracket([f for f, _ in pairs], time)
    if i == j:
        return pairs[i][1]
    return blend(pairs[i][1], pairs[j][1], u)


def _lerp(a, b, u):
    return np.asarray(a, np.float64) + u * (np.asarray(b, np.float64) - np.asarray(a, np.float64))


def object_transform(obj, time: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(translate (3,), quaternion (4,), scale (3,)) of `obj` at `time` (frames, may be fractional).

    `obj` has `translate`, `rotate` (Euler degrees), `scale` (3,) and `keys` of ObjectKey.
    """
    translate = np.array(_channel(obj.keys, "translate", obj.translate, time, _lerp), np.float64)
    scale = np.array(_channel(obj.keys, "scale", obj.scale, time, _lerp), np.float64)
    rotate_keys = [k for k in obj.keys if k.rotate is not None]
    if not rotate_keys:
        quat = quat_from_euler_xyz(obj.rotate)
    else:
        i, j, u = _bracket([k.frame for k in rotate_keys], time)
        a = quat_from_euler_xyz(rotate_keys[i].rotate)
        quat = a if i == j else quat_slerp(a, quat_from_euler_xyz(rotate_keys[j].rotate), u)
    return translate, quat, np.broadcast_to(scale, 3).copy()


def camera_at(camera, time: float):
    """(position (3,), target (3,), up (3,), fov degrees, focus) of `camera` at `time` (frames).

    When the shot sets no focus anywhere (`camera.auto_focus`), focus follows the distance from
    position to target at that time.
    """
    keys = camera.keys
    position = np.array(_channel(keys, "position", camera.position, time, _lerp), np.float64)
    target = np.array(_channel(keys, "target", camera.target, time, _lerp), np.float64)
    up = np.array(_channel(keys, "up", camera.up, time, _lerp), np.float64)
    fov = float(_channel(keys, "fov", camera.fov, time, _lerp))
    if getattr(camera, "auto_focus", False):
        focus = float(np.linalg.norm(target - position))
    else:
        focus = float(_channel(keys, "focus", camera.focus, time, _lerp))
    return position, target, up, fov, focus
