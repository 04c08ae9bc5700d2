"""Textures: packing, the sRGB table, wrap modes, bilinear filtering and the UV transform.

Sources: IEC 61966-2-1:1999 (sRGB) sections 5.2 (decoding) and 5.3 (encoding); The OpenGL 4.6
Core Profile specification, section 8.14.2 (texel selection, wrap modes; from memory where said);
the glTF 2.0 specification, section 3.8.1 (UV (0, 0) is the first pixel's top-left corner);
the KHR_texture_transform README (its two example JSON objects). numpy's rot90 / flipud are the
independent reference for where the examples move the texels.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from lampyr.engine.scene_data import IDENTITY_UV, WRAP_CLAMP, WRAP_MIRROR, WRAP_REPEAT, Image, TexRef
from lampyr.engine.textures import (
    TEXREF_SIZE, TR_IMAGE, TR_SCALE, TR_SRGB, TR_TEXCOORD, TR_UV, TR_WRAP_S, TR_WRAP_T,
    khr_texture_transform, map_textures, pack_images, save_images, save_textures, shared_textures, srgb_table,
    tex_lookup, tex_lookup_reference, texref_row,
)

LUT = srgb_table()
MODES = {"repeat": WRAP_REPEAT, "clamp": WRAP_CLAMP, "mirror": WRAP_MIRROR}


def random_image(rng, h, w, name="t"):
    return Image(name, rng.integers(0, 256, size=(h, w, 4), dtype=np.uint8))


class Scene:
    """One packed set of images and texture references, looked up through the kernel."""

    def __init__(self, images, refs_and_srgb):
        self.images = images
        self.pixels, self.info = pack_images(images)
        self.refs = np.array([texref_row(r, s) for r, s in refs_and_srgb]).reshape(-1, TEXREF_SIZE)

    def look(self, ref, u, v):
        return np.array(tex_lookup(self.pixels, self.info, self.refs, LUT, ref, u, v))


def one(rgba, wrap_s=WRAP_REPEAT, wrap_t=WRAP_REPEAT, srgb=False, uv=IDENTITY_UV):
    return Scene([Image("img", rgba)], [(TexRef(0, wrap_s=wrap_s, wrap_t=wrap_t, uv_transform=uv), srgb)])


def linear(texel):
    return np.asarray(texel, np.float64) / 255.0


# ------------------------------------------------------------------------------------ sRGB


def test_srgb_table_inverts_the_standards_encoding():
    # IEC 61966-2-1 section 5.3 (encoding): V = 12.92 L for L <= 0.0031308, else 1.055 L^(1/2.4) - 0.055;
    # encoding the decoded table must give back byte / 255
    lin = LUT
    enc = np.where(lin <= 0.0031308, 12.92 * lin, 1.055 * lin ** (1.0 / 2.4) - 0.055)
    np.testing.assert_allclose(enc, np.arange(256) / 255.0, atol=1e-12)


@pytest.mark.parametrize("byte, expected, tol", [
    (0, 0.0, 0.0),  # black stays black (the standard's formula)
    (255, 1.0, 1e-15),  # white stays white (the standard's formula)
    (10, 10 / 255 / 12.92, 1e-15),  # the linear toe below 0.04045 (the standard's formula)
    (128, 0.2158605, 1e-6),  # 50 % encoded grey is ~0.214-0.216 linear (from memory: 0.2158605)
    (188, 0.5028865, 1e-6),  # sRGB 188 is about 50 % linear (from memory: 0.50289)
])
def test_srgb_table_hand_values(byte, expected, tol):
    assert abs(LUT[byte] - expected) <= tol


def test_srgb_branches_meet_at_the_threshold():
    # IEC 61966-2-1: the two pieces of the decoding agree at 0.04045 (to the standard's rounding)
    c = 0.04045
    assert abs(c / 12.92 - ((c + 0.055) / 1.055) ** 2.4) < 1e-7


@pytest.mark.parametrize("srgb", [True, False])
def test_lookup_decodes_rgb_by_flag_and_alpha_linearly(srgb):
    texel = np.array([[[128, 10, 255, 128]]], np.uint8)
    got = one(texel, srgb=srgb).look(0, 0.5, 0.5)
    rgb = LUT[texel[0, 0, :3]] if srgb else linear(texel[0, 0, :3])
    np.testing.assert_allclose(got, list(rgb) + [128 / 255.0], rtol=0, atol=1e-15)


# ------------------------------------------------------------------------------- UV layout


def test_uv_origin_is_the_first_pixel():
    # glTF 2.0 section 3.8.1: UV (0, 0) is the top-left corner of the first pixel of the image
    rng = np.random.default_rng(1)
    img = random_image(rng, 3, 5).rgba
    s = one(img, WRAP_CLAMP, WRAP_CLAMP)
    np.testing.assert_allclose(s.look(0, 0.0, 0.0), linear(img[0, 0]), atol=1e-15)
    np.testing.assert_allclose(s.look(0, 0.5 / 5, 0.5 / 3), linear(img[0, 0]), atol=1e-15)


@pytest.mark.parametrize("axis", ["u", "v"])
def test_u_runs_along_columns_and_v_down_the_rows(axis):
    # glTF 2.0 section 3.8.1: u to the right, v downwards (row 0 is the image's top row)
    rng = np.random.default_rng(2)
    img = random_image(rng, 4, 4).rgba
    s = one(img)
    u, v = (1.5 / 4, 0.5 / 4) if axis == "u" else (0.5 / 4, 1.5 / 4)
    expected = img[0, 1] if axis == "u" else img[1, 0]
    np.testing.assert_allclose(s.look(0, u, v), linear(expected), atol=1e-15)


@pytest.mark.parametrize("mode", list(MODES))
@pytest.mark.parametrize("shape", [(1, 1), (3, 5), (4, 4), (7, 2)])
def test_bilinear_at_texel_centres_returns_the_texel(mode, shape):
    # OpenGL 4.6 section 8.14.2 (from memory): at a texel centre the neighbour's weight is 0
    rng = np.random.default_rng(3)
    img = random_image(rng, *shape).rgba
    s = one(img, MODES[mode], MODES[mode])
    h, w = shape
    for row in range(h):
        for col in range(w):
            np.testing.assert_allclose(s.look(0, (col + 0.5) / w, (row + 0.5) / h), linear(img[row, col]),
                                       rtol=0, atol=1e-12)


def test_bilinear_halfway_is_the_mean():
    # OpenGL 4.6 section 8.14.2 (from memory): weights (1 - alpha, alpha) with alpha = frac(u W - 1/2)
    img = np.array([[[0, 100, 200, 255], [50, 150, 250, 55]]], np.uint8)
    got = one(img, WRAP_CLAMP, WRAP_CLAMP).look(0, 0.5, 0.5)
    np.testing.assert_allclose(got, (linear(img[0, 0]) + linear(img[0, 1])) / 2, atol=1e-15)


def test_bilinear_filters_after_srgb_decoding():
    # the sRGB texels are decoded before they are blended (linear filtering of linear values)
    img = np.array([[[0, 0, 0, 255], [255, 255, 255, 255]]], np.uint8)
    got = one(img, WRAP_CLAMP, WRAP_CLAMP, srgb=True).look(0, 0.5, 0.5)
    np.testing.assert_allclose(got[:3], [0.5, 0.5, 0.5], atol=1e-15)


# ------------------------------------------------------------------------------ wrap modes


def repeat_texel(col, n):
    return col % n  # OpenGL 4.6 section 8.14.2 (from memory): REPEAT reads frac(s), the image tiles the plane


def mirror_texel(col, n, k):
    # OpenGL (from memory): MIRRORED_REPEAT reflects the image across every integer s,
    # so period k of the plane reads the image mirrored when k is odd
    return col if k % 2 == 0 else n - 1 - col


@pytest.mark.parametrize("k", [-3, -2, -1, 1, 2, 5])
@pytest.mark.parametrize("mode", list(MODES))
def test_wrap_outside_the_unit_square(mode, k):
    rng = np.random.default_rng(4)
    w = 5
    img = random_image(rng, 1, w).rgba
    s = one(img, MODES[mode], WRAP_CLAMP)
    for col in range(w):
        u = (col + 0.5) / w + k
        if mode == "repeat":
            expected = repeat_texel(col, w)
        elif mode == "mirror":
            expected = mirror_texel(col, w, k)
        else:  # CLAMP_TO_EDGE: the edge texel beyond the edge
            expected = 0 if k < 0 else w - 1
        np.testing.assert_allclose(s.look(0, u, 0.5), linear(img[0, expected]), atol=1e-12,
                                   err_msg=f"{mode} k={k} col={col}")


@pytest.mark.parametrize("mode, blend", [("repeat", 0.5), ("clamp", 0.0), ("mirror", 0.0)])
def test_wrap_at_the_edge(mode, blend):
    # at u = 0 the filter straddles the edge: REPEAT blends the last texel in half, CLAMP_TO_EDGE
    # and MIRRORED_REPEAT read texel 0 on both sides (OpenGL 4.6 table 8.20, from memory)
    img = np.array([[[0, 0, 0, 0], [9, 9, 9, 9], [200, 200, 200, 200]]], np.uint8)
    got = one(img, MODES[mode], WRAP_CLAMP).look(0, 0.0, 0.5)
    np.testing.assert_allclose(got, (1 - blend) * linear(img[0, 0]) + blend * linear(img[0, 2]), atol=1e-15)


def test_wrap_t_is_independent_of_wrap_s():
    rng = np.random.default_rng(5)
    img = random_image(rng, 4, 1).rgba
    got = one(img, WRAP_CLAMP, WRAP_MIRROR).look(0, 0.5, 1.0 + 0.5 / 4)  # first row of the mirrored copy
    np.testing.assert_allclose(got, linear(img[3, 0]), atol=1e-12)


# ------------------------------------------------------------------ KHR_texture_transform


def sample_grid(s, n):
    """(n, n, 4) lookups at the centres of an n x n grid of output texels."""
    c = (np.arange(n) + 0.5) / n
    return np.array([[s.look(0, u, v) for u in c] for v in c])


def test_khr_texture_transform_readme_quadrant_example():
    # KHR_texture_transform README: offset [0, 1], rotation pi/2, scale [0.5, 0.5] "utilizes only the
    # lower left quadrant of the source image, rotated clockwise 90°"
    rng = np.random.default_rng(6)
    img = random_image(rng, 4, 4).rgba
    m = khr_texture_transform((0.0, 1.0), 1.57079632679, (0.5, 0.5))
    got = sample_grid(one(img, uv=m), 2)
    quadrant = img[2:4, 0:2]  # rows 2-3 are the lower half, columns 0-1 the left half
    np.testing.assert_allclose(got, linear(np.rot90(quadrant, k=-1)), atol=1e-9)  # k=-1: clockwise


def test_khr_texture_transform_readme_flip_example():
    # KHR_texture_transform README: offset [0, 1], scale [1, -1] "inverts the T axis"
    rng = np.random.default_rng(7)
    img = random_image(rng, 4, 4).rgba
    got = sample_grid(one(img, uv=khr_texture_transform((0.0, 1.0), 0.0, (1.0, -1.0))), 4)
    np.testing.assert_allclose(got, linear(np.flipud(img)), atol=1e-12)


def test_khr_texture_transform_offset_moves_the_origin():
    # README: offset is "the offset of the UV coordinate origin as a factor of the texture dimensions"
    rng = np.random.default_rng(8)
    img = random_image(rng, 4, 4).rgba
    got = sample_grid(one(img, uv=khr_texture_transform((0.25, 0.5), 0.0, (1.0, 1.0))), 4)
    np.testing.assert_allclose(got, linear(np.roll(img, (-2, -1), axis=(0, 1))), atol=1e-12)


def test_khr_texture_transform_scale_tiles_under_repeat():
    # README: scale multiplies the UVs; with REPEAT a scale of 2 shows the image twice per axis
    rng = np.random.default_rng(9)
    img = random_image(rng, 2, 2).rgba
    got = sample_grid(one(img, uv=khr_texture_transform((0.0, 0.0), 0.0, (2.0, 2.0))), 4)
    np.testing.assert_allclose(got, linear(np.tile(img, (2, 2, 1))), atol=1e-12)


# --------------------------------------------------------------------- kernel vs reference


@pytest.mark.parametrize("seed", range(6))
def test_kernel_matches_the_reference(seed):
    rng = np.random.default_rng(100 + seed)
    images = [random_image(rng, int(rng.integers(1, 9)), int(rng.integers(1, 9)), f"i{k}") for k in range(3)]
    refs = []
    for _ in range(8):
        uv = khr_texture_transform(rng.uniform(-1, 1, 2), rng.uniform(-4, 4), rng.uniform(-3, 3, 2))
        ref = TexRef(int(rng.integers(0, 3)), wrap_s=int(rng.integers(0, 3)), wrap_t=int(rng.integers(0, 3)),
                     uv_transform=uv)
        refs.append((ref, bool(rng.integers(0, 2))))
    s = Scene(images, refs)
    for _ in range(300):
        r = int(rng.integers(0, len(refs)))
        u, v = rng.uniform(-3, 3, 2)
        expected = tex_lookup_reference([im.rgba for im in images], s.refs[r], u, v)
        np.testing.assert_allclose(s.look(r, u, v), expected, rtol=0, atol=1e-12)


@pytest.mark.parametrize("u", [math.nan, math.inf, -math.inf, 1e300])
def test_non_finite_or_huge_uv_reads_a_texel_like_the_reference(u):
    rng = np.random.default_rng(11)
    img = random_image(rng, 3, 3).rgba
    for mode in MODES.values():
        s = one(img, mode, mode)
        np.testing.assert_allclose(s.look(0, u, 0.5), tex_lookup_reference([img], s.refs[0], u, 0.5), atol=1e-12)


def test_negative_reference_is_the_neutral_factor():
    s = one(np.zeros((1, 1, 4), np.uint8))
    assert tuple(s.look(-1, 0.3, 0.3)) == (1.0, 1.0, 1.0, 1.0)


# ------------------------------------------------------------------------------ the tables


def test_pack_images_keeps_every_texel_and_its_address():
    rng = np.random.default_rng(12)
    images = [random_image(rng, 3, 5), random_image(rng, 1, 1), random_image(rng, 2, 7)]
    pixels, info = pack_images(images)
    assert pixels.dtype == np.uint8 and info.dtype == np.int64
    assert pixels.nbytes == sum(im.rgba.size for im in images)  # 4 bytes per texel, nothing else
    for im, (offset, w, h, _) in zip(images, info):
        assert (w, h) == (im.rgba.shape[1], im.rgba.shape[0])
        np.testing.assert_array_equal(pixels[offset:offset + w * h * 4].reshape(h, w, 4), im.rgba)


def test_pack_images_of_nothing():
    pixels, info = pack_images([])
    assert pixels.shape == (0,) and info.shape == (0, 4)


def test_pack_images_refuses_float_pixels():
    with pytest.raises(ValueError, match="uint8"):
        pack_images([Image("f", np.zeros((2, 2, 4), np.float32))])


def test_texref_row_columns():
    uv = np.array([[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]])
    row = texref_row(TexRef(7, texcoord=1, wrap_s=WRAP_MIRROR, wrap_t=WRAP_CLAMP, uv_transform=uv, scale=0.5), True)
    assert row.shape == (TEXREF_SIZE,)
    assert (row[TR_IMAGE], row[TR_TEXCOORD], row[TR_WRAP_S], row[TR_WRAP_T]) == (7, 1, WRAP_MIRROR, WRAP_CLAMP)
    assert list(row[TR_UV:TR_UV + 6]) == [1, 2, 3, 4, 5, 6]
    assert (row[TR_SCALE], row[TR_SRGB]) == (0.5, 1.0)
    assert texref_row(TexRef(0), False)[TR_SRGB] == 0.0


# ----------------------------------------------------------------------- one copy per machine


def test_saved_textures_map_back_equal(tmp_path):
    rng = np.random.default_rng(13)
    pixels, info = pack_images([random_image(rng, 3, 4), random_image(rng, 2, 2)])
    save_textures(pixels, info, tmp_path / "tex.rgba8")
    got_pixels, got_info = map_textures(tmp_path / "tex.rgba8")
    np.testing.assert_array_equal(got_pixels, pixels)
    np.testing.assert_array_equal(got_info, info)
    assert got_pixels.dtype == np.uint8 and got_pixels.flags.c_contiguous


def test_saved_images_equal_the_packed_ones(tmp_path):
    rng = np.random.default_rng(16)
    images = [random_image(rng, 3, 4), random_image(rng, 1, 2)]
    save_images(images, tmp_path / "s")
    pixels, info = pack_images(images)
    got_pixels, got_info = map_textures(tmp_path / "s")
    np.testing.assert_array_equal(got_pixels, pixels)
    np.testing.assert_array_equal(got_info, info)


def test_shared_textures_builds_once(tmp_path):
    rng = np.random.default_rng(14)
    packed = pack_images([random_image(rng, 2, 3)])
    calls = []

    def build():
        calls.append(1)
        return packed

    first = shared_textures(tmp_path / "t", build)
    second = shared_textures(tmp_path / "t", build)
    assert len(calls) == 1
    np.testing.assert_array_equal(second[0], packed[0])
    np.testing.assert_array_equal(first[0], second[0])


def test_a_write_to_the_mapped_pixels_never_reaches_the_file(tmp_path):
    pixels, info = pack_images([Image("z", np.zeros((1, 1, 4), np.uint8))])
    save_textures(pixels, info, tmp_path / "t")
    mapped, _ = map_textures(tmp_path / "t")
    mapped[0] = 99
    assert map_textures(tmp_path / "t")[0][0] == 0


def test_mapped_pixels_work_in_the_kernel(tmp_path):
    rng = np.random.default_rng(15)
    img = random_image(rng, 2, 2)
    pixels, info = pack_images([img])
    save_textures(pixels, info, tmp_path / "t")
    mapped, minfo = map_textures(tmp_path / "t")
    refs = texref_row(TexRef(0), False).reshape(1, TEXREF_SIZE)
    got = tex_lookup(mapped, minfo, refs, LUT, 0, 0.75, 0.25)
    np.testing.assert_allclose(got, linear(img.rgba[0, 1]), atol=1e-15)
