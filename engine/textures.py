"""Textures: every image of a scene packed as 8-bit RGBA, texture references, and the lookup.

Storage (8 bits per channel, never float: 4 bytes per texel, so forty 4096² images take
40 · 4096² · 4 B = 2.68 GB):

  tex_pixels  (N,) uint8       the RGBA texels of every image, row after row, image after image
  tex_info    (I, 4) int64     per image [offset of its first byte in tex_pixels, width, height, 0]
  texrefs     (R, TEXREF_SIZE) float64, one row per use of a texture by a material (TR_* columns)
  srgb_lut    (256,) float64   8-bit sRGB-encoded value -> linear (`srgb_table`)

The lookup follows the glTF 2.0 specification (section 3.8, textures and samplers): UV (0, 0) is
the corner of the first pixel the file stores (the top-left one), u grows to the right and v
downwards; `tex_lookup` applies the reference's (2, 3) UV transform (KHR_texture_transform's
T · R · S, see `khr_texture_transform`), wraps each axis with the sampler's mode and filters
bilinearly. Wrapping and filtering are OpenGL's (The OpenGL 4.6 Core Profile specification,
section 8.14.2, "Coordinate wrapping and texel selection", and its table 8.20; cited from memory):
texel centres sit at (i + 0.5) / width, the two texels around x = u · width - 0.5 are blended,
and their integer indices are wrapped with

  REPEAT           i mod n
  CLAMP_TO_EDGE    clamp(i, 0, n - 1)
  MIRRORED_REPEAT  (n - 1) - mirror((i mod 2n) - n),  mirror(a) = a if a >= 0 else -(1 + a)

Colour data (base colour, emissive, specular colour) is sRGB-encoded and decoded through the
table before filtering (filtering happens on linear values); other data (metallic-roughness,
normal, transmission, ...) is read as byte / 255. Alpha is always linear.

Pool processes of one machine can share one copy of `tex_pixels`: `shared_textures` writes it to
a file once and maps the file copy-on-write, so the pages live once in the page cache (measured
in bench/textures.py: two processes mapping 2.68 GB have a PSS of 1.39 GB each, against 2.73 GB
each for private copies). `save_images` writes the file from the decoded images without making
the packed copy first.
"""

from __future__ import annotations

import math
import os
import secrets
from pathlib import Path

import numpy as np
from numba import njit

from .scene_data import WRAP_CLAMP, WRAP_MIRROR, WRAP_REPEAT, TexRef

# texture-reference table columns
TR_IMAGE = 0  # row of tex_info
TR_TEXCOORD = 1  # UV set: 0 or 1
TR_WRAP_S = 2  # WRAP_* (scene_data.py) along u
TR_WRAP_T = 3  # WRAP_* along v
TR_UV = 4  # 6 columns: the (2, 3) UV transform, row-major: u' = a00 u + a01 v + a02, v' = a10 u + ...
TR_SCALE = 10  # normalTexture.scale, or 1
TR_SRGB = 11  # 1: rgb is sRGB-encoded; 0: linear data
TEXREF_SIZE = 12

# tex_info columns
TI_OFFSET = 0
TI_WIDTH = 1
TI_HEIGHT = 2


# --------------------------------------------------------------------------------------------
# tables


def srgb_table() -> np.ndarray:
    """(256,) float64: linear value of each 8-bit sRGB-encoded value.

    IEC 61966-2-1:1999, section 5.2 (the decoding): c' = byte / 255;
    c = c' / 12.92 when c' <= 0.04045, else ((c' + 0.055) / 1.055) ** 2.4.
    """
    c = np.arange(256, dtype=np.float64) / 255.0
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def _image_table(images) -> np.ndarray:
    """tex_info (I, 4) int64 of a sequence of `Image`, after checking each is (H, W, 4) uint8."""
    info = np.zeros((len(images), 4), np.int64)
    offset = 0
    for i, img in enumerate(images):
        rgba = img.rgba
        if rgba.dtype != np.uint8 or rgba.ndim != 3 or rgba.shape[2] != 4 or rgba.shape[0] < 1 or rgba.shape[1] < 1:
            raise ValueError(f"image {i} ({img.name!r}): expected rgba (H, W, 4) uint8, got {rgba.dtype} "
                             f"{rgba.shape}")
        info[i] = (offset, rgba.shape[1], rgba.shape[0], 0)
        offset += rgba.size
    return info


def pack_images(images) -> tuple[np.ndarray, np.ndarray]:
    """(tex_pixels (N,) uint8, tex_info (I, 4) int64) of a sequence of `Image` (rgba (H, W, 4) uint8).

    Images keep their order: image i is row i of tex_info. No image gives empty arrays.
    """
    info = _image_table(images)
    offset = int(info[-1, TI_OFFSET]) + images[-1].rgba.size if len(images) else 0
    pixels = np.empty(offset, np.uint8)
    for i, img in enumerate(images):
        start = int(info[i, TI_OFFSET])
        pixels[start:start + img.rgba.size] = img.rgba.reshape(-1)  # row-major: (row, col, channel)
    return pixels, info


def texref_row(ref: TexRef, srgb: bool) -> np.ndarray:
    """(TEXREF_SIZE,) float64 row of the texture-reference table for `ref`.

    srgb: True for colour data whose rgb is sRGB-encoded (base colour, emissive, specular colour).
    """
    row = np.zeros(TEXREF_SIZE, np.float64)
    row[TR_IMAGE] = ref.image
    row[TR_TEXCOORD] = ref.texcoord
    row[TR_WRAP_S] = ref.wrap_s
    row[TR_WRAP_T] = ref.wrap_t
    row[TR_UV:TR_UV + 6] = np.asarray(ref.uv_transform, np.float64).reshape(6)
    row[TR_SCALE] = ref.scale
    row[TR_SRGB] = 1.0 if srgb else 0.0
    return row


def khr_texture_transform(offset=(0.0, 0.0), rotation: float = 0.0, scale=(1.0, 1.0)) -> np.ndarray:
    """(2, 3) float64 UV transform of a KHR_texture_transform object: T · R · S.

    The extension's README gives T · R · S in GLSL and describes `rotation` as turning the UVs
    counter-clockwise (the image clockwise), its example being "offset [0, 1], rotation pi/2,
    scale [0.5, 0.5] uses the lower left quadrant of the image, rotated clockwise 90°". With v
    pointing down the image, that text and that example are R = [[cos, sin], [-sin, cos]] (the
    README's GLSL constructor read row by row); the tests check the example.
    """
    c, s = math.cos(rotation), math.sin(rotation)
    sx, sy = float(scale[0]), float(scale[1])
    return np.array([[c * sx, s * sy, float(offset[0])],
                     [-s * sx, c * sy, float(offset[1])]], np.float64)


# --------------------------------------------------------------------------------------------
# the lookup


@njit(cache=True, inline="always")
def _wrap(i, n, mode):
    """Texel index i wrapped into [0, n) (OpenGL 4.6, table 8.20)."""
    if 0 <= i < n:
        return i  # every mode leaves an index inside the image as it is
    if mode == WRAP_CLAMP:
        return min(max(i, 0), n - 1)
    if mode == WRAP_MIRROR:
        m = i % (2 * n) - n  # Python's modulo: never negative for a positive divisor
        if m < 0:
            m = -(1 + m)
        return n - 1 - m
    return i % n


@njit(cache=True, inline="always")
def _reduce(s, mode):
    """Coordinate s moved by whole periods (1 for REPEAT, 2 for MIRRORED_REPEAT) into a small
    range, or clamped for CLAMP_TO_EDGE, so that s · n fits an integer; NaN becomes 0."""
    if not (s == s) or math.isinf(s):
        return 0.0
    if mode == WRAP_CLAMP:
        return min(max(s, -1.0), 2.0)
    if mode == WRAP_MIRROR:
        return s - 2.0 * np.floor(0.5 * s)  # np.floor: numba's math.floor returns an int64
    return s - np.floor(s)


@njit(cache=True, inline="always")
def _texel(tex_pixels, offset, width, col, row, srgb, srgb_lut):
    """(r, g, b, a) float64 of one texel, rgb decoded through the table when srgb."""
    p = offset + 4 * (row * width + col)
    if srgb:
        r = srgb_lut[tex_pixels[p]]
        g = srgb_lut[tex_pixels[p + 1]]
        b = srgb_lut[tex_pixels[p + 2]]
    else:
        r = tex_pixels[p] / 255.0
        g = tex_pixels[p + 1] / 255.0
        b = tex_pixels[p + 2] / 255.0
    return r, g, b, tex_pixels[p + 3] / 255.0


@njit(cache=True)
def tex_lookup(tex_pixels, tex_info, texrefs, srgb_lut, ref, u, v):
    """(r, g, b, a) float64 of texture reference row `ref` at UV (u, v) (glTF UVs, v down).

    tex_pixels (N,) uint8; tex_info (I, 4) int64; texrefs (R, TEXREF_SIZE) float64;
    srgb_lut (256,) float64. A negative ref gives (1, 1, 1, 1), the neutral factor.
    """
    if ref < 0 or ref >= texrefs.shape[0]:  # no texture, or an empty table
        return 1.0, 1.0, 1.0, 1.0
    t = texrefs[ref]
    img = int(t[TR_IMAGE])
    if img < 0 or img >= tex_info.shape[0]:  # no image behind the reference (an empty list)
        return 1.0, 1.0, 1.0, 1.0
    offset = tex_info[img, TI_OFFSET]
    w = tex_info[img, TI_WIDTH]
    h = tex_info[img, TI_HEIGHT]
    if w <= 0 or h <= 0 or offset < 0 or offset + 4 * w * h > tex_pixels.shape[0]:
        return 1.0, 1.0, 1.0, 1.0
    mode_s = int(t[TR_WRAP_S])
    mode_t = int(t[TR_WRAP_T])
    srgb = t[TR_SRGB] > 0.5
    s = _reduce(t[TR_UV] * u + t[TR_UV + 1] * v + t[TR_UV + 2], mode_s)
    tt = _reduce(t[TR_UV + 3] * u + t[TR_UV + 4] * v + t[TR_UV + 5], mode_t)
    x = s * w - 0.5
    y = tt * h - 0.5
    fx = np.floor(x)
    fy = np.floor(y)
    ax = x - fx
    ay = y - fy
    i0 = int(fx)
    j0 = int(fy)
    c0 = _wrap(i0, w, mode_s)
    c1 = _wrap(i0 + 1, w, mode_s)
    r0 = _wrap(j0, h, mode_t)
    r1 = _wrap(j0 + 1, h, mode_t)
    w00 = (1.0 - ax) * (1.0 - ay)
    w10 = ax * (1.0 - ay)
    w01 = (1.0 - ax) * ay
    w11 = ax * ay
    ra, ga, ba, aa = _texel(tex_pixels, offset, w, c0, r0, srgb, srgb_lut)
    rb, gb, bb, ab = _texel(tex_pixels, offset, w, c1, r0, srgb, srgb_lut)
    rc, gc, bc, ac = _texel(tex_pixels, offset, w, c0, r1, srgb, srgb_lut)
    rd, gd, bd, ad = _texel(tex_pixels, offset, w, c1, r1, srgb, srgb_lut)
    return (w00 * ra + w10 * rb + w01 * rc + w11 * rd,
            w00 * ga + w10 * gb + w01 * gc + w11 * gd,
            w00 * ba + w10 * bb + w01 * bc + w11 * bd,
            w00 * aa + w10 * ab + w01 * ac + w11 * ad)


def tex_lookup_reference(images, texref, u: float, v: float):
    """Slow readable `tex_lookup`: images a list of rgba (H, W, 4) uint8 arrays, texref a row of
    the texture-reference table. Same result, written straight from the definitions."""
    if texref is None:
        return (1.0, 1.0, 1.0, 1.0)
    rgba = images[int(texref[TR_IMAGE])]
    h, w = rgba.shape[:2]
    a = np.asarray(texref[TR_UV:TR_UV + 6], np.float64).reshape(2, 3)
    with np.errstate(invalid="ignore", over="ignore"):
        s, t = a @ np.array([u, v, 1.0])

    def wrap(i, n, mode):
        if mode == WRAP_REPEAT:
            return i % n
        if mode == WRAP_CLAMP:
            return min(max(i, 0), n - 1)

        def mirror(x):
            return x if x >= 0 else -(1 + x)

        return (n - 1) - mirror((i % (2 * n)) - n)

    def safe(c, mode):
        if not math.isfinite(c):
            return 0.0
        if mode == WRAP_CLAMP:
            return min(max(c, -1.0), 2.0)
        period = 2.0 if mode == WRAP_MIRROR else 1.0
        return c - period * math.floor(c / period)

    s = safe(s, int(texref[TR_WRAP_S]))
    t = safe(t, int(texref[TR_WRAP_T]))
    lut = srgb_table()

    def value(col, row):
        texel = rgba[wrap(row, h, int(texref[TR_WRAP_T])), wrap(col, w, int(texref[TR_WRAP_S]))]
        if texref[TR_SRGB] > 0.5:
            rgb = [lut[int(x)] for x in texel[:3]]
        else:
            rgb = [int(x) / 255.0 for x in texel[:3]]
        return np.array(rgb + [int(texel[3]) / 255.0])

    x, y = s * w - 0.5, t * h - 0.5
    i, j = math.floor(x), math.floor(y)
    fx, fy = x - i, y - j
    out = ((1 - fx) * (1 - fy) * value(i, j) + fx * (1 - fy) * value(i + 1, j)
           + (1 - fx) * fy * value(i, j + 1) + fx * fy * value(i + 1, j + 1))
    return tuple(float(c) for c in out)


# --------------------------------------------------------------------------------------------
# one copy per machine


def _info_path(path: Path) -> Path:
    return path.with_name(path.name + ".info.npy")


def _atomic_write(path: Path, write) -> None:
    """Call write(file) on a temporary file beside `path`, then rename it into place (a reader
    never sees half a file; of two writers of the same content the last rename wins)."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{secrets.token_hex(4)}.tmp")
    try:
        with open(tmp, "wb") as fh:
            write(fh)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def save_textures(tex_pixels: np.ndarray, tex_info: np.ndarray, path) -> Path:
    """Write `tex_pixels` (N,) uint8 as raw bytes to `path` and `tex_info` (I, 4) int64 beside it
    (`<path>.info.npy`), each atomically; the pixels go last, so their file marks a whole pair."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    _atomic_write(_info_path(path), lambda fh: np.save(fh, np.asarray(tex_info, np.int64)))
    _atomic_write(path, lambda fh: np.ascontiguousarray(tex_pixels, np.uint8).tofile(fh))
    return path


def save_images(images, path) -> Path:
    """`save_textures(*pack_images(images), path)` without the packed copy in memory: each image's
    texels are written straight to the file (the peak stays at the decoded images)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    info = _image_table(images)
    _atomic_write(_info_path(path), lambda fh: np.save(fh, info))

    def write(fh):
        for img in images:
            np.ascontiguousarray(img.rgba).tofile(fh)

    _atomic_write(path, write)
    return path


def map_textures(path) -> tuple[np.ndarray, np.ndarray]:
    """(tex_pixels (N,) uint8, tex_info (I, 4) int64) written by `save_textures`; the pixels are
    the file mapped copy-on-write.

    Every process that maps the same file reads the same physical pages (the page cache, which
    the system may also drop and read again under memory pressure, as they are clean); the array
    is writeable, so kernels compile as for an ordinary array, but a write would only change the
    writing process's private copy of that page, never the file. An empty file (no image) gives
    an empty array, as a file of zero bytes cannot be mapped.
    """
    path = Path(path)
    info = np.load(_info_path(path))
    if path.stat().st_size == 0:
        return np.zeros(0, np.uint8), info
    return np.asarray(np.memmap(path, dtype=np.uint8, mode="c")), info


def shared_textures(path, build) -> tuple[np.ndarray, np.ndarray]:
    """`map_textures(path)`; when the file is not there yet, `build()` -> (tex_pixels, tex_info)
    (`pack_images` of the decoded images) makes them and `save_textures` writes them first.

    `path` must name the content (the scene manifest's hash and member under the worker's cache
    folder, say): a process that finds the file maps it without decoding any image, and the
    pool processes of one machine then share one copy of the texels.
    """
    path = Path(path)
    if not path.is_file():
        pixels, info = build()
        save_textures(pixels, info, path)
    return map_textures(path)
