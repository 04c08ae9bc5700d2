"""Make the demo's assets procedurally: the courtyard as one glTF 2.0 scene, and a dusk sky.

    python examples/make_assets.py [--out examples/courtyard/assets]

`courtyard.glb` holds the whole set: stone walls with a normal map (tangents written in the
file), flagstones with a roughness texture, an iron bracket, the brass lantern with thin-walled
glass panes and an emissive candle swinging on a glTF animation channel, a cloth banner on the
back wall swaying on a three-joint skin, a glazed pot, and a camera node `shot_cam` that makes
the same move as the shot file's own camera. Every texture is made here with numpy noise.
`dusk_sky.exr` is a small latitude-longitude OpenEXR made from a few gradients.

The output is deterministic (fixed seeds, images after all other data in the binary chunk), so
the committed files can be checked against a fresh run; PNG bytes depend on the zlib that
Pillow uses, so the test compares image pixels rather than PNG bytes.

Animation time is the glTF file's: the shot's frame f shows time (f - 1) / 24 s.
"""

from __future__ import annotations

import argparse
import math
from pathlib import Path

import numpy as np
from scipy.spatial.transform import Rotation

try:  # imported as examples.make_assets (the tests)
    from .gltf_builder import CLAMP_TO_EDGE, LINEAR_FILTER, REPEAT, GltfBuilder, quat_xyzw, tex
except ImportError:  # run as a script
    from gltf_builder import CLAMP_TO_EDGE, LINEAR_FILTER, REPEAT, GltfBuilder, quat_xyzw, tex

FPS = 24.0
FRAMES = 48  # the shot's frames 1..48
TIMES = np.arange(FRAMES) / FPS  # glTF time of each frame: (f - 1) / fps
LINEAR_MIPMAP_LINEAR = 9987

# ------------------------------------------------------------------------------------ geometry
# A part is (positions (V, 3), normals (V, 3), uv (V, 2), tangents (V, 4), faces (F, 3)), float64
# and int64, counter-clockwise faces seen from outside.

# Box faces: (outward normal, image-up direction). The image's right is up × normal, so every
# face shows its texture upright and unmirrored, and the tangent (direction of +u) is that
# right vector with handedness w = +1: the glTF bitangent cross(normal, tangent) · w is then the
# image's up, which is the direction of decreasing v (glTF 2.0 spec, 3.7.2.1: v grows downward
# in the image; MikkTSpace handedness as the spec asks).
_BOX_FACES = [((1, 0, 0), (0, 1, 0)), ((-1, 0, 0), (0, 1, 0)), ((0, 0, 1), (0, 1, 0)),
              ((0, 0, -1), (0, 1, 0)), ((0, 1, 0), (0, 0, -1)), ((0, -1, 0), (0, 0, 1))]


def box(extents, center, uv_period: float = 1.0, uv_offset=(0.0, 0.0)):
    """An axis-aligned box with one flat quad per face and world-planar UVs (one texture
    repeat per `uv_period` metres, shifted by `uv_offset`), so neighbouring boxes line up."""
    ext, c = np.asarray(extents, float), np.asarray(center, float)
    pos, nrm, uv, tan, faces = [], [], [], [], []
    for normal, up in _BOX_FACES:
        n, u = np.array(normal, float), np.array(up, float)
        r = np.cross(u, n)
        half_n, half_r, half_u = abs(n @ ext) / 2, abs(r @ ext) / 2, abs(u @ ext) / 2
        base = len(pos)
        for sr, su in ((-1, -1), (1, -1), (1, 1), (-1, 1)):
            p = c + n * half_n + r * sr * half_r + u * su * half_u
            pos.append(p)
            nrm.append(n)
            uv.append([p @ r / uv_period + uv_offset[0], -(p @ u) / uv_period + uv_offset[1]])
            tan.append([*r, 1.0])
        faces += [[base, base + 1, base + 2], [base, base + 2, base + 3]]
    return np.array(pos), np.array(nrm), np.array(uv), np.array(tan), np.array(faces, np.int64)


def lathe(profile, sections: int, center=(0.0, 0.0, 0.0)):
    """A surface of revolution about +y through `center`: profile (K, 2) of (radius, height)
    from the bottom centre round the outside. Smooth normals from the profile's direction;
    u runs round, v down the profile (no tangents: no normal map uses it). Triangles of zero
    area (at the axis) are left out."""
    prof = np.asarray(profile, float)
    d = np.gradient(prof, axis=0)  # (dr, dy) along the profile
    pn = np.stack([d[:, 1], -d[:, 0]], 1)  # outward in the (r, y) plane
    pn /= np.maximum(np.linalg.norm(pn, axis=1, keepdims=True), 1e-12)
    ang = np.linspace(0, 2 * np.pi, sections + 1)
    ca, sa = np.cos(ang)[:, None], np.sin(ang)[:, None]
    ones = np.ones((len(ang), 1))
    pos = np.stack([ca * prof[:, 0], ones * prof[:, 1], -sa * prof[:, 0]], -1) + np.asarray(center, float)
    nrm = np.stack([ca * pn[:, 0], ones * pn[:, 1], -sa * pn[:, 0]], -1)
    uv = np.stack(np.meshgrid(ang / (2 * np.pi), np.linspace(1, 0, len(prof)), indexing="ij"), -1)
    k = len(prof)
    i, j = np.meshgrid(np.arange(sections), np.arange(k - 1), indexing="ij")
    a, b = (i * k + j).ravel(), ((i + 1) * k + j).ravel()
    faces = np.stack([np.stack([a, b, b + 1], 1), np.stack([a, b + 1, a + 1], 1)], 1).reshape(-1, 3)
    pos, nrm = pos.reshape(-1, 3), nrm.reshape(-1, 3)
    area = np.linalg.norm(np.cross(pos[faces[:, 1]] - pos[faces[:, 0]], pos[faces[:, 2]] - pos[faces[:, 0]]), axis=1)
    return pos, nrm, uv.reshape(-1, 2), None, faces[area > 1e-12].astype(np.int64)


def cylinder(radius: float, height: float, center, sections: int = 16):
    """A closed cylinder along +y: smooth sides, flat caps (the rim points are repeated so the
    caps and the side have their own normals)."""
    h = height / 2
    profile = [(0.0, -h), (radius, -h), (radius, -h), (radius, h), (radius, h), (0.0, h)]
    pos, nrm, uv, _, faces = lathe(profile, sections, center)
    n = nrm.reshape(sections + 1, 6, 3)
    n[:, 0:2] = (0.0, -1.0, 0.0)
    n[:, 4:6] = (0.0, 1.0, 0.0)
    ang = np.linspace(0, 2 * np.pi, sections + 1)
    n[:, 2:4] = np.stack([np.cos(ang), np.zeros_like(ang), -np.sin(ang)], -1)[:, None, :]
    return pos, n.reshape(-1, 3), uv, None, faces


def quad(corners, normal):
    """One double-sided-material quad: corners (4, 3) counter-clockwise seen from `normal`."""
    p = np.asarray(corners, float)
    n = np.broadcast_to(np.asarray(normal, float), (4, 3)).copy()
    uv = np.array([[0, 1], [1, 1], [1, 0], [0, 0]], float)
    return p, n, uv, None, np.array([[0, 1, 2], [0, 2, 3]], np.int64)


def merge(parts):
    """Concatenate parts; attributes None in any part are dropped."""
    out, base = [], 0
    faces = []
    for p in parts:
        faces.append(p[4] + base)
        base += len(p[0])
    for i in range(4):
        out.append(None if any(p[i] is None for p in parts) else np.concatenate([p[i] for p in parts]))
    return (*out, np.concatenate(faces))


def smooth_normals(pos, faces):
    """Area-weighted vertex normals (V, 3) of a triangle mesh."""
    fn = np.cross(pos[faces[:, 1]] - pos[faces[:, 0]], pos[faces[:, 2]] - pos[faces[:, 0]])
    n = np.zeros_like(pos)
    for k in range(3):
        np.add.at(n, faces[:, k], fn)
    return n / np.linalg.norm(n, axis=1, keepdims=True)


# ------------------------------------------------------------------------------------ textures
# Value noise on a periodic lattice, so every texture tiles; fractal sums of it (fBm) for grain.


def value_noise(shape, cells, rng) -> np.ndarray:
    """(H, W) float64 in [0, 1]: random values on a (cells_y, cells_x) lattice that wraps
    around, blended with the smoothstep weight 3t² - 2t³."""
    h, w = shape
    cy, cx = (cells, cells) if np.isscalar(cells) else cells
    lattice = rng.random((cy, cx))
    y = np.arange(h) / h * cy
    x = np.arange(w) / w * cx
    y0, x0 = np.floor(y).astype(int), np.floor(x).astype(int)
    ty, tx = y - y0, x - x0
    ty, tx = (ty * ty * (3 - 2 * ty))[:, None], (tx * tx * (3 - 2 * tx))[None, :]
    y1, x1 = (y0 + 1) % cy, (x0 + 1) % cx
    y0, x0 = y0 % cy, x0 % cx
    top = lattice[y0][:, x0] * (1 - tx) + lattice[y0][:, x1] * tx
    bottom = lattice[y1][:, x0] * (1 - tx) + lattice[y1][:, x1] * tx
    return top * (1 - ty) + bottom * ty


def fbm(shape, cells, octaves, rng, gain: float = 0.5) -> np.ndarray:
    """(H, W) float64 fractal sum of `octaves` value noises, each twice as fine, rescaled to
    about [-1, 1] (mean 0)."""
    total = np.zeros(shape)
    amp, norm = 1.0, 0.0
    cy, cx = (cells, cells) if np.isscalar(cells) else cells
    for o in range(octaves):
        total += amp * (value_noise(shape, (cy << o, cx << o), rng) - 0.5)
        norm += amp
        amp *= gain
    return total / norm * 2.0


def to_srgb8(linear) -> np.ndarray:
    """Linear [0, 1] → 8-bit sRGB (IEC 61966-2-1 transfer function)."""
    c = np.clip(linear, 0.0, 1.0)
    s = np.where(c <= 0.0031308, 12.92 * c, 1.055 * np.power(c, 1 / 2.4) - 0.055)
    return np.round(s * 255).astype(np.uint8)


def normal_map(height, texel: float, strength: float = 1.0) -> np.ndarray:
    """(H, W, 3) uint8 tangent-space normal map of a periodic height field (metres; texel:
    metres per pixel). Red is +u (image right), green is the image's up, blue out of the
    surface, as the glTF spec's normalTexture asks; encoded n * 0.5 + 0.5."""
    dh_dx = (np.roll(height, -1, 1) - np.roll(height, 1, 1)) / (2 * texel)
    dh_drow = (np.roll(height, -1, 0) - np.roll(height, 1, 0)) / (2 * texel)
    n = np.stack([-strength * dh_dx, strength * dh_drow, np.ones_like(height)], -1)  # up = -row
    n /= np.linalg.norm(n, axis=-1, keepdims=True)
    return np.round((n * 0.5 + 0.5) * 255).astype(np.uint8)


STONE_PERIOD = 1.2  # metres of wall one stone texture covers (four courses of 0.3 m)
STONE_PX = 256


def stone_textures(seed: int = 11):
    """Ashlar courses for the walls: (base colour (N, N, 3) uint8 sRGB, normal map (N, N, 3)
    uint8). Four courses, two or three blocks each, mortar joints recessed 8 mm."""
    rng = np.random.default_rng(seed)
    n = STONE_PX
    texel = STONE_PERIOD / n
    rows = 4
    ch = n // rows
    y = np.arange(n)[:, None] * np.ones((1, n))
    x = np.ones((n, 1)) * np.arange(n)[None, :]
    course = (y // ch).astype(int)
    d_h = np.minimum(y - course * ch, (course + 1) * ch - y)  # pixels to the nearest bed joint
    d_v = np.full((n, n), np.inf)
    block = np.zeros((n, n), int)
    for k in range(rows):
        count = int(rng.integers(2, 4))
        widths = rng.uniform(0.7, 1.3, count)
        edges = np.concatenate([[0], np.cumsum(widths / widths.sum() * n)])
        shift = rng.uniform(0, n)
        xs = (x[course == k] - shift) % n
        idx = np.searchsorted(edges, xs, side="right") - 1
        d_v[course == k] = np.minimum(xs - edges[idx], edges[idx + 1] - xs)
        block[course == k] = k * 4 + idx
    joint = np.minimum(d_h, d_v)
    face = np.clip((joint - 1.5) / 4.0, 0, 1)
    face = face * face * (3 - 2 * face)  # bevelled arris
    tint = rng.normal(0, 1, (rows * 4, 3))
    tilt = rng.normal(0, 0.002, (rows * 4, 2))  # each block sits a little out of plane
    grain = fbm((n, n), 8, 5, rng)
    pits = np.clip(fbm((n, n), 32, 2, rng) - 0.55, 0, None)
    height = 0.008 * face + face * (tilt[block, 0] * (x - n / 2) / ch + tilt[block, 1] * (y - n / 2) / ch)
    height = height + 0.0015 * grain * face - 0.01 * pits * face
    stone = np.array([0.55, 0.5, 0.44]) * (1 + 0.12 * tint[block][..., :1] + 0.05 * tint[block])
    stone = stone * (1 + 0.18 * grain[..., None]) * (1 - 0.8 * pits[..., None])
    mortar = np.array([0.32, 0.3, 0.27]) * (1 + 0.1 * grain[..., None])
    colour = mortar + (stone - mortar) * face[..., None]
    return to_srgb8(colour), normal_map(height, texel)


FLAG_PERIOD = 2.0  # metres of floor one flagstone texture covers
FLAG_PX = 256


def flagstone_textures(seed: int = 5):
    """Flagstone surface: (base colour (N, N, 3) uint8 sRGB, metallic-roughness (N, N, 3) uint8:
    G = roughness, B = metallic 0, R unused at 255)."""
    rng = np.random.default_rng(seed)
    n = FLAG_PX
    grain = fbm((n, n), 6, 6, rng)
    weather = fbm((n, n), 3, 3, rng)
    speck = (value_noise((n, n), 96, rng) > 0.93).astype(float)
    base = np.array([0.42, 0.4, 0.38]) * (1 + 0.25 * grain[..., None]) * (1 - 0.3 * np.clip(weather, 0, None)[..., None])
    base = base * (1 - 0.4 * speck[..., None]) + np.array([0.02, 0.025, 0.0]) * np.clip(-weather, 0, None)[..., None]
    rough = np.clip(0.75 + 0.2 * weather - 0.1 * grain, 0.45, 0.98)  # worn patches are smoother
    mr = np.stack([np.full((n, n), 255), np.round(rough * 255), np.zeros((n, n))], -1).astype(np.uint8)
    return to_srgb8(base), mr


def banner_texture(seed: int = 3, width: int = 128, height: int = 256) -> np.ndarray:
    """(H, W, 4) uint8 sRGB + alpha: a madder-red cloth with a gold border and a gold sun, and a
    swallow-tail cut out of the bottom (alpha 0, for alphaMode MASK; the cut-out keeps the
    cloth's colour so a reader without MASK shows a plain edge)."""
    rng = np.random.default_rng(seed)
    v, u = np.mgrid[0:height, 0:width]
    u = (u + 0.5) / width
    v = (v + 0.5) / height
    weave = 1 + 0.06 * fbm((height, width), (64, 32), 2, rng) + 0.03 * np.sin(np.pi * width * u) ** 2
    red = np.array([0.28, 0.02, 0.025])
    gold = np.array([0.62, 0.42, 0.1])
    border = (np.minimum(u, 1 - u) < 0.07) | ((np.minimum(u, 1 - u) > 0.1) & (np.minimum(u, 1 - u) < 0.12))
    border |= (v < 0.035) | ((v > 0.05) & (v < 0.06))
    du, dv = (u - 0.5), (v - 0.36) * height / width
    r = np.hypot(du, dv)
    a = np.arctan2(dv, du)
    sun = (r < 0.14) & (r > 0.11) | (r < 0.08)
    sun |= (r > 0.16) & (r < 0.26 + 0.04 * np.cos(8 * a)) & (np.cos(12 * a) > 0.55)
    colour = np.where((border | sun)[..., None], gold, red) * weave[..., None]
    notch = np.abs(u - 0.5) < 0.5 * (v - 0.86) / 0.14  # a V cut up from the bottom edge: two tails
    alpha = np.where(notch, 0, 255)
    return np.concatenate([to_srgb8(colour), alpha[..., None].astype(np.uint8)], -1)


# ------------------------------------------------------------------------------------ the set


def courtyard_walls():
    """Three stone walls with a doorway in the left one, a low step and a bench."""
    boxes = [
        ([8.0, 3.6, 0.3], [0.0, 1.8, -3.15]),  # back wall
        ([0.3, 3.6, 2.4], [-3.15, 1.8, -1.8]),  # left wall, behind the doorway
        ([0.3, 3.6, 3.2], [-3.15, 1.8, 2.4]),  # left wall, in front of it
        ([0.3, 1.0, 1.6], [-3.15, 3.1, 0.2]),  # lintel over the doorway
        ([0.3, 3.6, 7.0], [3.15, 1.8, 0.5]),  # right wall
        ([2.4, 0.45, 0.5], [0.9, 0.225, -2.6]),  # bench
        ([8.0, 0.12, 0.8], [0.0, 0.06, -2.6]),  # step along the back wall
    ]
    return merge([box(e, c, STONE_PERIOD) for e, c in boxes])


def courtyard_floor():
    """Flagstones: a grid of slightly separated slabs of uneven height, each showing its own
    part of the flagstone texture, on a base that shows in the joints."""
    rng = np.random.default_rng(7)
    parts = [box([8.0, 0.02, 8.0], [0.0, 0.01, 0.5], FLAG_PERIOD)]
    for i in range(8):
        for j in range(8):
            h = 0.04 + 0.015 * rng.random()
            parts.append(box([0.96, h, 0.96], [-3.5 + i, h / 2, -3.0 + j], FLAG_PERIOD, rng.random(2)))
    return merge(parts)


def wall_bracket():
    """The iron arm the lantern hangs from, with its wall plate."""
    return merge([box([0.06, 0.06, 0.9], [1.6, 2.62, -2.55]), box([0.1, 0.3, 0.04], [1.6, 2.55, -2.98])])


def lantern_parts():
    """(brass frame, glass panes, candle) of a four-post lantern whose origin is the hook it
    swings from (y = 0 at the top). The panes are single quads between the posts (thin-walled
    glass); the candle's foot is sunk into the base plate, so no thin gap under the emitter
    traps paths."""
    frame = [cylinder(0.015, 0.25, [0.0, -0.125, 0.0], 8),  # hanger rod
             box([0.34, 0.03, 0.34], [0.0, -0.27, 0.0]),  # roof plate
             box([0.22, 0.05, 0.22], [0.0, -0.23, 0.0]),  # roof cap
             box([0.30, 0.03, 0.30], [0.0, -0.66, 0.0])]  # base plate
    for sx in (-0.14, 0.14):
        for sz in (-0.14, 0.14):
            frame.append(box([0.025, 0.38, 0.025], [sx, -0.465, sz]))  # posts
    lo, hi, e = -0.645, -0.285, 0.14
    panes = [quad([[-e, lo, e], [e, lo, e], [e, hi, e], [-e, hi, e]], [0, 0, 1]),
             quad([[e, lo, -e], [-e, lo, -e], [-e, hi, -e], [e, hi, -e]], [0, 0, -1]),
             quad([[e, lo, e], [e, lo, -e], [e, hi, -e], [e, hi, e]], [1, 0, 0]),
             quad([[-e, lo, -e], [-e, lo, e], [-e, hi, e], [-e, hi, -e]], [-1, 0, 0])]
    candle = cylinder(0.045, 0.17, [0.0, -0.565, 0.0], 12)
    return merge(frame), merge(panes), candle


def pot():
    """A glazed pot, turned: a surface of revolution standing on the flagstones."""
    profile = [(0.0, 0.0), (0.15, 0.0), (0.18, 0.015), (0.26, 0.1), (0.32, 0.22), (0.335, 0.3),
               (0.31, 0.4), (0.24, 0.5), (0.17, 0.57), (0.15, 0.62), (0.17, 0.67), (0.195, 0.69),
               (0.18, 0.705), (0.14, 0.68), (0.12, 0.62), (0.0, 0.58)]
    return lathe(profile, 40, [1.9, 0.05, -1.6])


BANNER_TOP = np.array([-1.7, 3.3, -2.88])  # where the banner hangs from its pole
BANNER_SIZE = (0.8, 1.6)  # width, length (m)
BANNER_JOINTS = (0.0, 0.55, 1.1)  # joint depths below the top (m); each bends the cloth below it


def banner_cloth(cols: int = 9, rows: int = 25):
    """The banner in its bind pose (world space): a grid hanging from BANNER_TOP, with soft
    vertical folds; and its skin: joints (V, 4) and weights (V, 4) over the three joints,
    blended linearly between neighbouring segments so the cloth bends smoothly."""
    w, length = BANNER_SIZE
    x = np.linspace(-w / 2, w / 2, cols)
    d = np.linspace(0, length, rows)
    xx, dd = np.meshgrid(x, d)  # (rows, cols)
    fold = 0.022 * np.sin(2 * np.pi * (xx + w / 2) / 0.4) * (0.3 + 0.7 * dd / length)
    pos = (BANNER_TOP + np.stack([xx, -dd, fold], -1)).reshape(-1, 3)
    uv = np.stack([(xx + w / 2) / w, dd / length], -1).reshape(-1, 2)
    r, c = np.meshgrid(np.arange(rows - 1), np.arange(cols - 1), indexing="ij")
    a = (r * cols + c).ravel()
    faces = np.concatenate([np.stack([a, a + cols, a + cols + 1], 1), np.stack([a, a + cols + 1, a + 1], 1)])
    # segment centres of the three joints; weights are tents between them, summing to 1
    centres = np.array([BANNER_JOINTS[0] + BANNER_JOINTS[1], BANNER_JOINTS[1] + BANNER_JOINTS[2],
                        BANNER_JOINTS[2] + length]) / 2
    depth = dd.ravel()
    tent = np.clip(1 - np.abs(depth[:, None] - centres[None, :]) / np.diff(centres).mean(), 0, 1)
    tent[depth <= centres[0], 0] = 1.0
    tent[depth >= centres[-1], -1] = 1.0
    tent /= tent.sum(1, keepdims=True)
    joints = np.zeros((len(depth), 4), np.int64)
    weights = np.zeros((len(depth), 4))
    for v in range(len(depth)):
        nz = np.flatnonzero(tent[v] > 1e-9)
        joints[v, :len(nz)] = nz
        weights[v, :len(nz)] = tent[v, nz]
    faces = faces.astype(np.int64)
    return (pos, smooth_normals(pos, faces), uv, None, faces), joints, weights


def banner_pole():
    """The iron pole over the banner and the two arms that hold it off the wall."""
    t = BANNER_TOP
    pole = cylinder(0.018, BANNER_SIZE[0] + 0.16, [0, 0, 0], 10)
    pole = (pole[0][:, [1, 0, 2]] + t + [0, 0.02, 0], pole[1][:, [1, 0, 2]], pole[2], None,
            pole[4][:, [0, 2, 1]])  # the cylinder laid along x (the axis swap mirrors it: faces flipped)
    arms = [box([0.03, 0.03, 0.14], [t[0] + sx, t[1] + 0.02, -2.93]) for sx in (-0.45, 0.45)]
    return merge([pole] + arms)


# ------------------------------------------------------------------------------------ motion
CAMERA_KEYS = ((1, [0.4, 1.5, 5.2], [0.2, 1.0, -1.0]), (48, [-1.2, 1.3, 4.0], [0.6, 1.1, -1.5]))
CAMERA_YFOV = 50.0  # degrees, as the shot file's [camera] fov
LANTERN_HOOK = [1.6, 2.6, -2.15]
LANTERN_SCALE = 1.8
SWING_DEGREES = 12.0
CANDLE_COLOUR = (1.0, 0.6, 0.25)
CANDLE_STRENGTH = 2.5  # the wax's glow: KHR_materials_emissive_strength
FLAME_INTENSITY = 1.8  # the flame: a point light above the wick (KHR_lights_punctual), in the
# shot's radiance units (irradiance I cos θ / d²); it carries most of the candle's light, which
# next-event estimation then finds every time, so the frame is far less noisy than with the
# glowing wax alone
FLAME_HEIGHT = -0.43  # in the lantern's frame (hook at 0), 5 cm above the wick
SWING_PERIOD = (FRAMES - 1) / FPS  # seconds: one full swing there and back over the shot


def look_at_quat(position, target, up=(0.0, 1.0, 0.0)) -> np.ndarray:
    """glTF rotation (x, y, z, w) of a camera at `position` looking at `target`: the camera looks
    down its local -Z with +Y up (glTF 2.0 spec, 3.10.1); right = forward × up, as the shot
    file's camera builds it."""
    f = np.asarray(target, float) - np.asarray(position, float)
    f /= np.linalg.norm(f)
    r = np.cross(f, up)
    r /= np.linalg.norm(r)
    u = np.cross(r, f)
    return Rotation.from_matrix(np.stack([r, u, -f], 1)).as_quat()  # scipy's order is x, y, z, w


def camera_track():
    """(translations (48, 3), rotations (48, 4)) of shot_cam at every frame: the shot file's
    move (position and target interpolated linearly between its keys), one key per frame."""
    (f0, p0, t0), (f1, p1, t1) = CAMERA_KEYS
    s = ((np.arange(FRAMES) + 1 - f0) / (f1 - f0))[:, None]
    pos = np.asarray(p0) * (1 - s) + np.asarray(p1) * s
    tgt = np.asarray(t0) * (1 - s) + np.asarray(t1) * s
    rot = np.array([look_at_quat(p, t) for p, t in zip(pos, tgt)])
    for k in range(1, len(rot)):  # keep neighbouring keys in the same hemisphere
        if rot[k] @ rot[k - 1] < 0:
            rot[k] = -rot[k]
    return pos, rot


def lantern_swing():
    """(times (3,), values (3, 3, 4)) of a CUBICSPLINE rotation about z: out to +A at 0 s, -A
    at half the period, +A again, with zero tangents at each turn (a pendulum's ends). The
    values are (in-tangent, value, out-tangent) per key (glTF 2.0 spec, Appendix C)."""
    a = math.radians(SWING_DEGREES)
    times = np.array([0.0, SWING_PERIOD / 2, SWING_PERIOD])
    values = np.zeros((3, 3, 4))
    for k, sign in enumerate((1, -1, 1)):
        values[k, 1] = quat_xyzw([0, 0, 1], sign * a)
    return times, values


def banner_sway():
    """Per-frame rotations (x, y, z, w) about x of the banner's three joints (each (48, 4)):
    the cloth lifts away from the wall and falls back, the lower joints later and further."""
    out = []
    for j, (rest, amp, lag) in enumerate(((3.0, 3.0, 0.0), (2.0, 5.0, 0.12), (2.0, 7.0, 0.24))):
        s = 0.5 + 0.5 * np.sin(2 * np.pi * (TIMES - lag) / SWING_PERIOD)
        # negative angles about +x swing the cloth below the joint towards +z, off the wall
        out.append(np.array([quat_xyzw([1, 0, 0], -math.radians(rest + amp * x)) for x in s]))
    return out


# ------------------------------------------------------------------------------------ the file


def _prim(b: GltfBuilder, part, material: int, uv: bool = False, tangents: bool = False, **kw) -> dict:
    """A primitive of `part`, with UVs only for textured materials and tangents only for
    normal-mapped ones."""
    pos, nrm, uv0, tan, faces = part
    return b.primitive(pos, normals=nrm, uv0=uv0 if uv else None, tangents=tan if tangents else None,
                       indices=faces, material=material, **kw)


def courtyard_scene() -> GltfBuilder:
    """The whole courtyard as a glTF document (images written last, after all other data)."""
    b = GltfBuilder(generator="lampyr examples/make_assets.py")
    # textures: (image, sampler) pairs filled in at the end, so the PNG bytes come last
    stone_color, stone_normal = stone_textures()
    flag_color, flag_mr = flagstone_textures()
    cloth = banner_texture()
    images = [("stone_color", stone_color), ("stone_normal", stone_normal), ("flagstone_color", flag_color),
              ("flagstone_roughness", flag_mr), ("banner_color", cloth)]
    # textures refer to images by index; the images themselves are added at the end
    repeat = b.add_sampler(REPEAT, REPEAT, LINEAR_FILTER, LINEAR_MIPMAP_LINEAR)
    clamp = b.add_sampler(CLAMP_TO_EDGE, CLAMP_TO_EDGE, LINEAR_FILTER, LINEAR_MIPMAP_LINEAR)
    for k, (name, _) in enumerate(images):
        b.add_texture(k, clamp if name == "banner_color" else repeat, name=name)
    t_stone, t_stone_n, t_flag, t_flag_mr, t_banner = range(len(images))

    stone = b.add_material("stone", base_color=(1, 1, 1, 1), metallic=0.0, roughness=0.9,
                           base_color_tex=tex(t_stone), normal_tex=tex(t_stone_n, scale=1.0))
    flagstone = b.add_material("flagstone", base_color=(1, 1, 1, 1), metallic=1.0, roughness=1.0,
                               base_color_tex=tex(t_flag), metallic_roughness_tex=tex(t_flag_mr))
    iron = b.add_material("iron", base_color=(0.35, 0.34, 0.33, 1), metallic=1.0, roughness=0.5)
    brass = b.add_material("brass", base_color=(0.91, 0.73, 0.42, 1), metallic=1.0, roughness=0.3)
    glass = b.add_material("lantern_glass", base_color=(1, 1, 1, 1), metallic=0.0, roughness=0.0,
                           double_sided=True,
                           extensions={"KHR_materials_transmission": {"transmissionFactor": 1.0},
                                       "KHR_materials_ior": {"ior": 1.5}})
    candle = b.add_material("candle", base_color=(0.9, 0.85, 0.7, 1), metallic=0.0, roughness=0.6,
                            emissive=CANDLE_COLOUR,
                            extensions={"KHR_materials_emissive_strength": {"emissiveStrength": CANDLE_STRENGTH}})
    glaze = b.add_material("glazed_pot", base_color=(0.12, 0.3, 0.22, 1), metallic=0.0, roughness=0.15)
    banner = b.add_material("banner_cloth", base_color=(1, 1, 1, 1), metallic=0.0, roughness=0.85,
                            base_color_tex=tex(t_banner), alpha_mode="MASK", alpha_cutoff=0.5,
                            double_sided=True)

    walls = b.add_mesh([_prim(b, courtyard_walls(), stone, uv=True, tangents=True)], name="walls")
    floor = b.add_mesh([_prim(b, courtyard_floor(), flagstone, uv=True)], name="floor")
    bracket = b.add_mesh([_prim(b, wall_bracket(), iron)], name="bracket")
    frame, panes, wick = lantern_parts()
    lantern = b.add_mesh([_prim(b, frame, brass), _prim(b, panes, glass), _prim(b, wick, candle)],
                         name="lantern")
    pot_mesh = b.add_mesh([_prim(b, pot(), glaze)], name="pot")
    pole = b.add_mesh([_prim(b, banner_pole(), iron)], name="banner_pole")
    cloth_part, joints, weights = banner_cloth()
    cloth_mesh = b.add_mesh([_prim(b, cloth_part, banner, uv=True, joints=joints, weights=weights)], name="banner")

    b.add_node("walls", mesh=walls)
    b.add_node("floor", mesh=floor)
    b.add_node("bracket", mesh=bracket)
    b.add_node("pot", mesh=pot_mesh)
    b.add_node("banner_pole", mesh=pole)
    lantern_node = b.add_node("lantern", mesh=lantern)
    hung = [lantern_node]
    if FLAME_INTENSITY > 0:
        flame = b.add_light("point", color=CANDLE_COLOUR, intensity=FLAME_INTENSITY, name="flame")
        hung.append(b.add_node("flame", light=flame, translation=[0.0, FLAME_HEIGHT, 0.0]))
    times, values = lantern_swing()
    pivot = b.add_node("lantern_pivot", translation=LANTERN_HOOK, rotation=values[0, 1],
                       scale=[LANTERN_SCALE] * 3, children=hung)

    # the banner's skeleton: a rig node at the top of the cloth, three joints in a chain
    j2 = b.add_node("banner_joint2", translation=[0, -(BANNER_JOINTS[2] - BANNER_JOINTS[1]), 0])
    j1 = b.add_node("banner_joint1", translation=[0, -(BANNER_JOINTS[1] - BANNER_JOINTS[0]), 0], children=[j2])
    j0 = b.add_node("banner_joint0", translation=[0, -BANNER_JOINTS[0], 0], children=[j1])
    rig = b.add_node("banner_rig", translation=BANNER_TOP, children=[j0])
    inverse_bind = np.array([np.linalg.inv(_translation(BANNER_TOP - [0, d, 0])) for d in BANNER_JOINTS])
    skin = b.add_skin([j0, j1, j2], inverse_bind, skeleton=rig, name="banner_skin")
    b.add_node("banner", mesh=cloth_mesh, skin=skin)  # a skinned mesh's node is placed by its joints

    cam = b.add_camera(math.radians(CAMERA_YFOV), znear=0.05, zfar=100.0, aspect=16 / 9, name="shot_cam")
    cam_pos, cam_rot = camera_track()
    cam_node = b.add_node("shot_cam", camera=cam, translation=cam_pos[0], rotation=cam_rot[0])

    b.add_animation([(pivot, "rotation", times, values, "CUBICSPLINE")], name="lantern_swing")
    b.add_animation([(j, "rotation", TIMES, q, "LINEAR") for j, q in zip((j0, j1, j2), banner_sway())],
                    name="banner_sway")
    b.add_animation([(cam_node, "translation", TIMES, cam_pos, "LINEAR"),
                     (cam_node, "rotation", TIMES, cam_rot, "LINEAR")], name="camera_move")

    for name, pixels in images:  # last: PNG bytes vary with the zlib that encodes them
        b.add_image(pixels, name=name)
    return b


def _translation(t) -> np.ndarray:
    m = np.eye(4)
    m[:3, 3] = t
    return m


# ------------------------------------------------------------------------------------ the sky


def dusk_sky(width: int = 128, height: int = 64) -> np.ndarray:
    """(height, width, 3) float32 radiance: deep blue zenith, a warm glow low in the west."""
    v = (np.arange(height) + 0.5) / height  # 0 at the zenith, 1 straight down
    u = (np.arange(width) + 0.5) / width
    elev = (0.5 - v)[:, None] * np.pi  # radians above the horizon
    phi = (u - 0.5)[None, :] * 2 * np.pi  # 0 looks towards -z
    zenith = np.array([0.015, 0.025, 0.07])
    horizon = np.array([0.16, 0.09, 0.05])
    t = np.clip(np.sin(np.maximum(elev, 0.0)), 0, 1) ** 0.5
    sky = horizon * (1 - t[..., None]) + zenith * t[..., None]
    glow = np.exp(-((phi + 1.2) ** 2) / 0.5) * np.exp(-np.maximum(elev, 0) / 0.12)
    sky = sky + glow[..., None] * np.array([0.5, 0.22, 0.08])
    ground = np.array([0.02, 0.018, 0.016])
    sky = np.where((elev < 0)[..., None], ground, sky)
    return np.ascontiguousarray(np.broadcast_to(sky, (height, width, 3)), dtype=np.float32)


def write_exr(path: Path, rgb: np.ndarray) -> None:
    import OpenEXR

    channels = {c: np.ascontiguousarray(rgb[..., i]) for i, c in enumerate("RGB")}
    header = {"compression": OpenEXR.ZIP_COMPRESSION, "type": OpenEXR.scanlineimage}
    OpenEXR.File(dict(header), dict(channels)).write(str(path))


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=Path(__file__).parent / "courtyard" / "assets")
    args = ap.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)
    scene = courtyard_scene().save(args.out / "courtyard.glb")
    write_exr(args.out / "dusk_sky.exr", dusk_sky())
    print(f"wrote {scene.name} and dusk_sky.exr to {args.out}")


if __name__ == "__main__":
    main()
