"""Pinhole and thin-lens camera rays, with the camera's own motion inside the shutter.

The compiled camera is `cam: (2, 11) float64`, one row at shutter open and one at close:
`[px, py, pz, tx, ty, tz, ux, uy, uz, tan(fov/2), focus]` (position, target, up, half the
vertical field of view as its tangent, focus distance). Image rows run top to bottom, columns left
to right; pixel (x, y) covers [x, x+1) × [y, y+1) in raster space and is integrated with a box
filter by jittering inside it (the unbiased pixel integral).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from .animation import camera_at
from .lobes import concentric_disk


def compile_camera(camera, frame: int, shutter_open: float, shutter_close: float) -> np.ndarray:
    """`(2, 11) float64` camera rows for a frame at the two shutter instants (times in frames)."""
    return camera_rows([camera_at(camera, time) for time in (shutter_open, shutter_close)])


def camera_rows(views) -> np.ndarray:
    """`(2, 11) float64` camera rows from two views (position, target, up, fov degrees, focus),
    at shutter open and close."""
    rows = np.empty((2, 11))
    for i, (position, target, up, fov, focus) in enumerate(views):
        rows[i, 0:3] = position
        rows[i, 3:6] = target
        rows[i, 6:9] = up
        rows[i, 9] = math.tan(math.radians(fov) * 0.5)
        rows[i, 10] = focus
    return rows


@njit(cache=True, inline="always")
def _normalize(x, y, z):
    n = math.sqrt(x * x + y * y + z * z)
    return x / n, y / n, z / n


@njit(cache=True)
def camera_ray(cam, aperture, width, height, fx, fy, lens_u, lens_v, time_u):
    """World-space ray through raster point (fx, fy) at shutter fraction time_u.

    Returns (ox, oy, oz, dx, dy, dz) with a unit direction. With aperture > 0 the origin is a
    point on a lens disk of that radius and the ray passes through the point on the focus plane
    that the pinhole ray would reach (thin lens model).
    """
    a = cam[0]
    b = cam[1]
    s = time_u
    px = a[0] + s * (b[0] - a[0])
    py = a[1] + s * (b[1] - a[1])
    pz = a[2] + s * (b[2] - a[2])
    tx = a[3] + s * (b[3] - a[3])
    ty = a[4] + s * (b[4] - a[4])
    tz = a[5] + s * (b[5] - a[5])
    ux = a[6] + s * (b[6] - a[6])
    uy = a[7] + s * (b[7] - a[7])
    uz = a[8] + s * (b[8] - a[8])
    tan_half = a[9] + s * (b[9] - a[9])
    focus = a[10] + s * (b[10] - a[10])

    # forward w, right r = w × up, true up v = r × w
    wx, wy, wz = _normalize(tx - px, ty - py, tz - pz)
    rx, ry, rz = _normalize(wy * uz - wz * uy, wz * ux - wx * uz, wx * uy - wy * ux)
    vx = ry * wz - rz * wy
    vy = rz * wx - rx * wz
    vz = rx * wy - ry * wx

    aspect = width / height
    sx = (2.0 * fx / width - 1.0) * tan_half * aspect
    sy = (1.0 - 2.0 * fy / height) * tan_half
    dx, dy, dz = _normalize(wx + sx * rx + sy * vx, wy + sx * ry + sy * vy, wz + sx * rz + sy * vz)
    if aperture <= 0.0:
        return px, py, pz, dx, dy, dz

    # the focus plane lies at distance `focus` along w; the pinhole ray meets it at t_f
    t_f = focus / (dx * wx + dy * wy + dz * wz)
    qx = px + t_f * dx
    qy = py + t_f * dy
    qz = pz + t_f * dz
    lx, ly = concentric_disk(lens_u, lens_v)
    ox = px + aperture * (lx * rx + ly * vx)
    oy = py + aperture * (lx * ry + ly * vy)
    oz = pz + aperture * (lx * rz + ly * vz)
    dx, dy, dz = _normalize(qx - ox, qy - oy, qz - oz)
    return ox, oy, oz, dx, dy, dz
