"""Rigid-with-scale transforms evaluated inside kernels, for motion blur within the shutter.

An instance's placement at one instant is `(t (3,), q (4,) w-x-y-z unit quaternion, s (3,))`,
world-from-object `p_w = t + R(q) (s * p_o)`. Inside the shutter the kernel interpolates between
the placement at shutter open and at shutter close: translation and scale linearly, rotation by
spherical linear interpolation (Shoemake 1985, "Animating rotation with quaternion curves").

Packed motion rows are `(10,) float64`: `[tx, ty, tz, qw, qx, qy, qz, sx, sy, sz]`.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit


@njit(cache=True, inline="always")
def quat_rotate(qw, qx, qy, qz, vx, vy, vz):
    """Rotate v by the unit quaternion q (v' = q v q*), expanded: 2 cross products."""
    # t = 2 (q.xyz × v);  v' = v + w t + q.xyz × t
    tx = 2.0 * (qy * vz - qz * vy)
    ty = 2.0 * (qz * vx - qx * vz)
    tz = 2.0 * (qx * vy - qy * vx)
    return (
        vx + qw * tx + (qy * tz - qz * ty),
        vy + qw * ty + (qz * tx - qx * tz),
        vz + qw * tz + (qx * ty - qy * tx),
    )


@njit(cache=True)
def quat_slerp(aw, ax, ay, az, bw, bx, by, bz, u):
    """Shortest-path slerp between unit quaternions a and b at u in [0, 1]."""
    dot = aw * bw + ax * bx + ay * by + az * bz
    if dot < 0.0:
        bw, bx, by, bz, dot = -bw, -bx, -by, -bz, -dot
    if dot > 0.9995:  # nearly parallel: normalised lerp avoids dividing by sin(~0)
        w = aw + u * (bw - aw)
        x = ax + u * (bx - ax)
        y = ay + u * (by - ay)
        z = az + u * (bz - az)
    else:
        theta = math.acos(dot)
        sin_t = math.sin(theta)
        ka = math.sin((1.0 - u) * theta) / sin_t
        kb = math.sin(u * theta) / sin_t
        w = ka * aw + kb * bw
        x = ka * ax + kb * bx
        y = ka * ay + kb * by
        z = ka * az + kb * bz
    n = math.sqrt(w * w + x * x + y * y + z * z)
    return w / n, x / n, y / n, z / n


@njit(cache=True)
def placement_at(motion, u):
    """Interpolate a `(2, 10)` open/close motion pair at shutter fraction u; returns 10 floats."""
    a = motion[0]
    b = motion[1]
    qw, qx, qy, qz = quat_slerp(a[3], a[4], a[5], a[6], b[3], b[4], b[5], b[6], u)
    return (
        a[0] + u * (b[0] - a[0]),
        a[1] + u * (b[1] - a[1]),
        a[2] + u * (b[2] - a[2]),
        qw, qx, qy, qz,
        a[7] + u * (b[7] - a[7]),
        a[8] + u * (b[8] - a[8]),
        a[9] + u * (b[9] - a[9]),
    )


def pack_placement(translate, quat, scale) -> np.ndarray:
    """`(10,) float64` motion row from translate (3,), unit quaternion (4,) w-x-y-z, scale (3,)."""
    q = np.asarray(quat, dtype=np.float64)
    q = q / np.linalg.norm(q)
    return np.concatenate([np.asarray(translate, float), q, np.broadcast_to(np.asarray(scale, float), 3)])


def apply_placement(row: np.ndarray, points: np.ndarray) -> np.ndarray:
    """World positions of object-space `points (n, 3)` under a `(10,)` placement row (numpy)."""
    t, q, s = row[0:3], row[3:7], row[7:10]
    w, x, y, z = q
    rot = np.array(
        [
            [1 - 2 * (y * y + z * z), 2 * (x * y - w * z), 2 * (x * z + w * y)],
            [2 * (x * y + w * z), 1 - 2 * (x * x + z * z), 2 * (y * z - w * x)],
            [2 * (x * z - w * y), 2 * (y * z + w * x), 1 - 2 * (x * x + y * y)],
        ]
    )
    return (points * s) @ rot.T + t
