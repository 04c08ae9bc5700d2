"""The preview's sRGB curve against IEC 61966-2-1 and against LittleCMS's built-in sRGB profile
(through Pillow's ImageCms); PNGs read back with Pillow."""

from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image, ImageCms

from lampyr.engine.film import Film
from lampyr.engine.preview import srgb_decode, srgb_encode, to_8bit, to_png_bytes, write_preview


def iec_encode(x: float) -> float:
    """IEC 61966-2-1:1999 §5.2 (constants from memory), written out independently of the module."""
    return 12.92 * x if x <= 0.0031308 else 1.055 * x ** (1 / 2.4) - 0.055


# -- the transfer function ------------------------------------------------------------------------

def test_linear_knee_maps_to_the_encoded_knee():
    # IEC 61966-2-1: L = 0.0031308 ↔ V' = 0.04045 (12.92 × 0.0031308 = 0.040449936)
    assert srgb_encode(0.0031308) == pytest.approx(0.04045, abs=1e-7)
    assert srgb_decode(0.04045) == pytest.approx(0.0031308, abs=1e-8)


def test_the_two_segments_meet_at_the_knee():
    # the standard's rounded constants leave a gap of about 3e-8 between the segments
    below = srgb_encode(np.nextafter(0.0031308, 0.0))
    above = srgb_encode(np.nextafter(0.0031308, 1.0))
    assert abs(above - below) < 1e-7


@pytest.mark.parametrize("linear, encoded", [(0.0, 0.0), (1.0, 1.0)])
def test_end_points_are_fixed(linear, encoded):
    assert srgb_encode(linear) == pytest.approx(encoded, abs=1e-15)
    assert srgb_decode(encoded) == pytest.approx(linear, abs=1e-15)


@pytest.mark.parametrize("x", [0.001, 0.0031308, 0.01, 0.18, 0.5, 0.9])
def test_encode_follows_the_standards_formula(x):
    assert srgb_encode(x) == pytest.approx(iec_encode(x), rel=1e-12)


def test_middle_value():
    assert srgb_encode(0.5) == pytest.approx(0.7354, abs=5e-5)  # 0.73536 (from the formula)


def test_decode_inverts_encode():
    x = np.concatenate([np.linspace(0.0, 0.004, 41), np.linspace(0.004, 1.0, 200), [3.0, 10.0]])
    np.testing.assert_allclose(srgb_decode(srgb_encode(x)), x, rtol=1e-12, atol=1e-15)


def _cie_l8(y: np.ndarray) -> np.ndarray:
    """8-bit CIELAB L (0..255 for L* 0..100) of relative luminance Y: CIE 15:2004, L* =
    116 (Y/Yn)^(1/3) − 16 above (6/29)³, else (29/3)³ Y (exact fractions, from memory)."""
    y = np.asarray(y, dtype=np.float64)
    lstar = np.where(y > (6 / 29) ** 3, 116 * np.cbrt(y) - 16, (29 / 3) ** 3 * y)
    return np.floor(lstar * 2.55 + 0.5)


def _littlecms_l8() -> np.ndarray:
    """L codes LittleCMS gives the 256 grey sRGB code values (built-in sRGB -> built-in Lab)."""
    t = ImageCms.buildTransform(ImageCms.createProfile("sRGB"), ImageCms.createProfile("LAB"),
                                "RGB", "LAB")
    v = np.arange(256, dtype=np.uint8)
    grey = Image.fromarray(np.repeat(v[None, :, None], 3, axis=2))
    return np.array(ImageCms.applyTransform(grey, t))[0, :, 0].astype(np.float64)


def test_decode_agrees_with_littlecms_builtin_srgb_profile():
    # Grey sRGB code values through LittleCMS (its own sRGB profile, independent of our code) to
    # CIELAB: L* depends on luminance only, so our decode composed with the CIE L* formula must
    # give the same 8-bit L codes, within one code of quantisation.
    ref = _littlecms_l8()
    ours = _cie_l8(srgb_decode(np.arange(256) / 255))
    assert np.abs(ours - ref).max() <= 1
    # the comparison is sharp enough to tell the sRGB curve from a plain 2.2 power law
    assert np.abs(_cie_l8((np.arange(256) / 255) ** 2.2) - ref).max() > 1


# -- 8-bit PNG -------------------------------------------------------------------------------------

def _png_pixels(data: bytes) -> np.ndarray:
    img = Image.open(io.BytesIO(data))
    assert img.format == "PNG" and img.mode == "RGB"
    return np.array(img)


def test_png_holds_the_rounded_encoded_values():
    rgb = np.linspace(0.0, 1.0, 4 * 5 * 3).reshape(4, 5, 3)
    expected = np.vectorize(lambda x: int(np.floor(255 * iec_encode(x) + 0.5)))(rgb)
    np.testing.assert_array_equal(_png_pixels(to_png_bytes(rgb)), expected)


def test_png_keeps_rows_top_to_bottom():
    rgb = np.zeros((3, 2, 3))
    rgb[0] = 1.0
    px = _png_pixels(to_png_bytes(rgb))
    assert px.shape == (3, 2, 3) and (px[0] == 255).all() and (px[1:] == 0).all()


@pytest.mark.parametrize("value, code", [(-1.0, 0), (np.nan, 0), (2.0, 255), (np.inf, 255)])
def test_values_out_of_range_are_clipped(value, code):
    assert (to_8bit(np.full((1, 1, 3), value)) == code).all()


def test_one_stop_of_exposure_doubles_the_radiance():
    rgb = np.random.default_rng(31).uniform(0.0, 0.5, (4, 4, 3))
    np.testing.assert_array_equal(to_8bit(rgb, exposure_stops=1.0), to_8bit(2.0 * rgb))


def test_a_non_rgb_image_is_refused():
    with pytest.raises(ValueError):
        to_png_bytes(np.zeros((2, 2)))


def test_write_preview_of_a_film_shows_its_mean(tmp_path):
    film = Film.zeros(2, 3)
    film.n[:] = 4
    film.rgb_sum[:] = 4 * 0.18
    write_preview(tmp_path / "f.png", film)
    assert (tmp_path / "f.png").read_bytes() == to_png_bytes(np.full((2, 3, 3), 0.18))
    assert [p.name for p in tmp_path.iterdir()] == ["f.png"]  # no temporary file is left
