"""PNG previews of frames: linear radiance -> exposure -> sRGB curve -> 8-bit RGB.

The EXR keeps scene-linear radiance; only previews get a transfer function, the one of
IEC 61966-2-1:1999 (sRGB), constants below.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
from PIL import Image

from .exr import atomic_target
from .film import Film

# IEC 61966-2-1 transfer function: V = 12.92 L for L <= 0.0031308, else 1.055 L^(1/2.4) − 0.055;
# its inverse switches at V = 0.04045 (the two knees differ by design: 12.92 × 0.0031308 =
# 0.040449936).
_LINEAR_KNEE = 0.0031308
_ENCODED_KNEE = 0.04045
_SLOPE = 12.92
_GAMMA = 2.4
_A = 0.055


def srgb_encode(linear: np.ndarray) -> np.ndarray:
    """Linear values (any shape) -> sRGB-encoded values, float64; negative inputs give their
    mirror image (the curve is applied to |x| with x's sign), values above 1 are not clipped."""
    x = np.asarray(linear, dtype=np.float64)
    a = np.abs(x)
    curve = (1.0 + _A) * np.power(a, 1.0 / _GAMMA) - _A
    return np.copysign(np.where(a <= _LINEAR_KNEE, _SLOPE * a, curve), x)


def srgb_decode(encoded: np.ndarray) -> np.ndarray:
    """sRGB-encoded values (any shape) -> linear values, float64 (inverse of srgb_encode)."""
    v = np.asarray(encoded, dtype=np.float64)
    a = np.abs(v)
    curve = np.power((a + _A) / (1.0 + _A), _GAMMA)
    return np.copysign(np.where(a <= _ENCODED_KNEE, a / _SLOPE, curve), v)


def to_8bit(rgb_linear: np.ndarray, exposure_stops: float = 0.0) -> np.ndarray:
    """(h, w, 3) linear radiance -> (h, w, 3) uint8 sRGB code values.

    Radiance is scaled by 2^exposure_stops, encoded, clipped to [0, 1] and rounded to the nearest
    code value; NaN shows as black.
    """
    rgb = np.asarray(rgb_linear, dtype=np.float64)
    if rgb.ndim != 3 or rgb.shape[2] != 3:
        raise ValueError(f"expected an (h, w, 3) image, got shape {rgb.shape}")
    scaled = np.nan_to_num(rgb * 2.0 ** float(exposure_stops), nan=0.0, posinf=1.0, neginf=0.0)
    v = np.clip(srgb_encode(np.clip(scaled, 0.0, 1.0)), 0.0, 1.0)
    return np.floor(v * 255.0 + 0.5).astype(np.uint8)


def to_png_bytes(rgb_linear: np.ndarray, exposure_stops: float = 0.0) -> bytes:
    """(h, w, 3) linear radiance -> an 8-bit RGB PNG file's bytes (see `to_8bit`)."""
    buf = io.BytesIO()
    Image.fromarray(to_8bit(rgb_linear, exposure_stops)).save(buf, format="PNG")
    return buf.getvalue()


def write_preview(path, film_or_rgb: Film | np.ndarray, exposure_stops: float = 0.0) -> None:
    """Write a PNG preview of a film's mean (or of an (h, w, 3) linear image), atomically."""
    rgb = film_or_rgb.mean() if isinstance(film_or_rgb, Film) else film_or_rgb
    data = to_png_bytes(rgb, exposure_stops)
    with atomic_target(path) as tmp:
        Path(tmp).write_bytes(data)
