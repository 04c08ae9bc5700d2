"""Punctual lights (KHR_lights_punctual, and the shot's `[[light]]`): point, spot, directional.

They are delta lights: no ray can hit them, so they are reached only by next-event estimation
and their light samples carry no MIS weight. The unit contract (docs/shot-file.md, "Lights"):

* a point or spot light of intensity I gives irradiance E = I cos θ / d² at distance d
  (inverse-square and cosine laws), times the spot's cone falloff;
* a directional light of intensity E gives irradiance E cos θ.

Values are in the shot's radiance units; converting photometric units (candela, lux) is left to
the user, through the light's intensity (glTF files state candela and lux: a shot can scale them
with `scene_light_scale`).

Spot falloff, from the KHR_lights_punctual README (its recommended implementation):
  scale = 1 / max(0.001, cos(inner) - cos(outer)),  offset = -cos(outer) · scale,
  falloff = clamp(cos_d · scale + offset, 0, 1)²,  cos_d the cosine between the spot's axis and
  the direction from the light to the point.
The `range` property is a hint the README lets a renderer ignore; lampyr ignores it (light falls
off with the inverse square law only).

A light row is `(PUNCT_SIZE,) float64`, position and direction at shutter open and close
(lights move with their nodes; direction = where the light travels, unit):
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from .scene_data import LIGHT_DIRECTIONAL, LIGHT_POINT, LIGHT_SPOT

L_TYPE = 0
L_RGB = 1  # color × intensity, 3 columns
L_POS_OPEN = 4
L_POS_CLOSE = 7
L_DIR_OPEN = 10
L_DIR_CLOSE = 13
L_SPOT_SCALE = 16
L_SPOT_OFFSET = 17
L_GROUP = 18  # light group index (engine/layers.py; 0: ungrouped)
PUNCT_SIZE = 20
LUMA = np.array([0.2126, 0.7152, 0.0722])  # Rec. 709 luminance weights (ITU-R BT.709)


def light_row(kind: int, rgb, pos_open, pos_close, dir_open, dir_close,
              inner: float = 0.0, outer: float = math.pi / 4.0) -> np.ndarray:
    """A light row. rgb: (3,) color × intensity; positions and directions (3,) at shutter open
    and close (directions normalised here); cone angles in radians (spot only)."""
    row = np.zeros(PUNCT_SIZE)
    row[L_TYPE] = kind
    row[L_RGB:L_RGB + 3] = rgb
    row[L_POS_OPEN:L_POS_OPEN + 3] = pos_open
    row[L_POS_CLOSE:L_POS_CLOSE + 3] = pos_close
    for col, d in ((L_DIR_OPEN, dir_open), (L_DIR_CLOSE, dir_close)):
        d = np.asarray(d, np.float64)
        row[col:col + 3] = d / np.linalg.norm(d)
    scale = 1.0 / max(0.001, math.cos(inner) - math.cos(outer))
    row[L_SPOT_SCALE] = scale
    row[L_SPOT_OFFSET] = -math.cos(outer) * scale
    return row


def light_power(row: np.ndarray, scene_radius: float) -> float:
    """Luminous weight of a light for choosing among lights (rule of thumb: emitted flux;
    a directional light's flux through a disk the size of the scene)."""
    lum = float(LUMA @ row[L_RGB:L_RGB + 3])
    kind = int(row[L_TYPE])
    if kind == LIGHT_DIRECTIONAL:
        return lum * math.pi * scene_radius * scene_radius
    if kind == LIGHT_SPOT:
        cos_outer = -row[L_SPOT_OFFSET] / row[L_SPOT_SCALE]
        return lum * 2.0 * math.pi * (1.0 - cos_outer)
    return lum * 4.0 * math.pi


@njit(cache=True)
def sample_punctual(L, px, py, pz, time_u):
    """Light from the punctual light row L arriving at point p at shutter fraction time_u.

    Returns (wx, wy, wz, dist, Er, Eg, Eb): unit direction from p towards the light, distance
    (inf for a directional light) and the irradiance it gives on a surface facing it
    (I / d² for point and spot with the cone falloff, E for directional). E = 0 means none.
    """
    u = time_u
    kind = L[L_TYPE]
    dx = L[L_DIR_OPEN] + u * (L[L_DIR_CLOSE] - L[L_DIR_OPEN])
    dy = L[L_DIR_OPEN + 1] + u * (L[L_DIR_CLOSE + 1] - L[L_DIR_OPEN + 1])
    dz = L[L_DIR_OPEN + 2] + u * (L[L_DIR_CLOSE + 2] - L[L_DIR_OPEN + 2])
    dn = math.sqrt(dx * dx + dy * dy + dz * dz)
    if dn > 0.0:
        dx /= dn
        dy /= dn
        dz /= dn
    if kind == LIGHT_DIRECTIONAL:
        return -dx, -dy, -dz, math.inf, L[L_RGB], L[L_RGB + 1], L[L_RGB + 2]
    qx = L[L_POS_OPEN] + u * (L[L_POS_CLOSE] - L[L_POS_OPEN])
    qy = L[L_POS_OPEN + 1] + u * (L[L_POS_CLOSE + 1] - L[L_POS_OPEN + 1])
    qz = L[L_POS_OPEN + 2] + u * (L[L_POS_CLOSE + 2] - L[L_POS_OPEN + 2])
    lx = qx - px
    ly = qy - py
    lz = qz - pz
    d2 = lx * lx + ly * ly + lz * lz
    if d2 <= 0.0:
        return 0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 0.0
    d = math.sqrt(d2)
    wx, wy, wz = lx / d, ly / d, lz / d
    k = 1.0 / d2
    if kind == LIGHT_SPOT:
        cos_d = -(wx * dx + wy * dy + wz * dz)  # axis · (from the light to p)
        a = min(1.0, max(0.0, cos_d * L[L_SPOT_SCALE] + L[L_SPOT_OFFSET]))
        k *= a * a
    return wx, wy, wz, d, L[L_RGB] * k, L[L_RGB + 1] * k, L[L_RGB + 2] * k


def sample_punctual_reference(row, p, time_u):
    """Slow, readable twin of `sample_punctual` (numpy): (w (3,), dist, E (3,))."""
    p = np.asarray(p, np.float64)
    u = time_u
    axis = (1 - u) * row[L_DIR_OPEN:L_DIR_OPEN + 3] + u * row[L_DIR_CLOSE:L_DIR_CLOSE + 3]
    axis = axis / np.linalg.norm(axis)
    rgb = row[L_RGB:L_RGB + 3]
    if int(row[L_TYPE]) == LIGHT_DIRECTIONAL:
        return -axis, math.inf, rgb.copy()
    q = (1 - u) * row[L_POS_OPEN:L_POS_OPEN + 3] + u * row[L_POS_CLOSE:L_POS_CLOSE + 3]
    to_light = q - p
    d = float(np.linalg.norm(to_light))
    w = to_light / d
    e = rgb / (d * d)
    if int(row[L_TYPE]) == LIGHT_SPOT:
        falloff = np.clip(float(np.dot(-w, axis)) * row[L_SPOT_SCALE] + row[L_SPOT_OFFSET], 0.0, 1.0) ** 2
        e = e * falloff
    return w, d, e


__all__ = ["LIGHT_POINT", "LIGHT_SPOT", "LIGHT_DIRECTIONAL", "PUNCT_SIZE", "light_row", "light_power",
           "sample_punctual", "sample_punctual_reference"]
