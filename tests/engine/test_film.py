"""Film sums against statistics computed by numpy and scipy from the very samples accumulated."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from lampyr.engine.film import (FIELDS, MIXED, RGB_FIELDS, WIDE, Film, FilmDataError,
                                add_into, from_bytes, merge, to_bytes, to_parts)
from lampyr.errors import LampyrError

H, W = 5, 6


def make_samples(rng, s, h=H, w=W, grey=False):
    """Per-sample values of a plausible render: (h, w, s[, 3]) arrays."""
    mu = rng.normal(0.0, 1.0, (h, w, 1, 3))
    rgb = np.exp(mu + rng.normal(0.0, 1.0, (h, w, s, 3)))  # lognormal radiance
    if grey:
        rgb[...] = rgb[..., :1]
    hit = rng.random((h, w, s)) < rng.uniform(0.2, 1.0, (h, w, 1))
    albedo = rng.uniform(0.0, 1.0, (h, w, s, 3)) * hit[..., None]
    normal = rng.normal(0.0, 1.0, (h, w, s, 3))
    normal *= hit[..., None] / np.linalg.norm(normal, axis=-1, keepdims=True)
    depth = rng.uniform(1.0, 20.0, (h, w, s)) * hit
    return dict(rgb=rgb, hit=hit, albedo=albedo, normal=normal, depth=depth)


def accumulate(smp) -> Film:
    """The sums the integrator writes, computed plainly from per-sample values."""
    h, w, s = smp["hit"].shape
    film = Film.zeros(h, w)
    film.n[:] = s
    film.rgb_sum[:] = smp["rgb"].sum(axis=2)
    film.rgb_sq[:] = (smp["rgb"] ** 2).sum(axis=2)
    film.alpha_sum[:] = smp["hit"].sum(axis=2)
    film.hits[:] = smp["hit"].sum(axis=2)
    film.albedo_sum[:] = smp["albedo"].sum(axis=2)
    film.normal_sum[:] = smp["normal"].sum(axis=2)
    film.depth_sum[:] = smp["depth"].sum(axis=2)
    return film


@pytest.fixture
def rng():
    return np.random.default_rng(11)


@pytest.fixture
def smp(rng):
    return make_samples(rng, 40)


# the fields of film bytes before format 4 (no odd half): accumulate() leaves the odd half empty
OLD_FIELDS = tuple(f for f in FIELDS if f not in ("odd_n", "odd_sum"))


def fields_equal(a: Film, b: Film) -> bool:
    return all(np.array_equal(getattr(a, f), getattr(b, f)) for f in FIELDS)


# -- layout -------------------------------------------------------------------------------------

@pytest.mark.parametrize("field", FIELDS)
def test_zeros_are_c_contiguous_float64_of_the_documented_shape(field):
    a = getattr(Film.zeros(3, 4), field)
    assert a.dtype == np.float64 and a.flags.c_contiguous and not a.any()
    assert a.shape == ((3, 4, 3) if field in RGB_FIELDS else (3, 4))


@pytest.mark.parametrize("bad", [np.zeros((3, 4), np.float32), np.zeros((3, 5)),
                                 np.zeros((4, 3)).T])
def test_arrays_of_the_wrong_type_shape_or_layout_are_refused(bad):
    arrays = {f: getattr(Film.zeros(3, 4), f) for f in FIELDS}
    with pytest.raises(FilmDataError):
        Film(**dict(arrays, depth_sum=bad))


# -- statistics -----------------------------------------------------------------------------------

def test_mean_is_the_sample_mean(smp):
    np.testing.assert_allclose(accumulate(smp).mean(), smp["rgb"].mean(axis=2), rtol=1e-12)


def test_variance_is_the_unbiased_sample_variance(smp):
    # numpy's var with ddof=1: Σ(x − x̄)² / (n − 1), the unbiased estimator of one sample's variance
    np.testing.assert_allclose(accumulate(smp).variance(), smp["rgb"].var(axis=2, ddof=1),
                               rtol=1e-9)


def test_std_error_is_scipys_standard_error_of_the_mean(smp):
    np.testing.assert_allclose(accumulate(smp).std_error(), stats.sem(smp["rgb"], axis=2),
                               rtol=1e-9)


@pytest.mark.parametrize("n", [0, 1])
def test_too_few_samples_give_zero_variance_and_error(rng, n):
    film = accumulate(make_samples(rng, n)) if n else Film.zeros(H, W)
    assert not film.variance().any() and not film.std_error().any()
    assert np.isfinite(film.mean()).all()


def test_rounding_never_makes_the_variance_negative():
    film = Film.zeros(1, 1)
    x = 0.1  # Σx² − (Σx)²/n of identical samples rounds to a tiny ±value
    film.n[:] = 3
    film.rgb_sum[:] = 3 * x
    film.rgb_sq[:] = 3 * x * x
    assert (film.variance() >= 0).all()


# Rec. 709 luma weights, ITU-R BT.709-6 item 3.2: E'Y = 0.2126 E'R + 0.7152 E'G + 0.0722 E'B
# (written out here, not taken from the code under test)
REC709 = np.array([0.2126, 0.7152, 0.0722])


def test_the_luminance_weights_are_rec_709():
    from lampyr.engine.film import LUMA_709

    np.testing.assert_array_equal(LUMA_709, REC709)


def test_rel_noise_is_exact_for_grey_pixels(rng):
    # grey: the channels' noise is perfectly correlated, so the bound Σ w_c se_c is se_Y itself
    smp = make_samples(rng, 30, grey=True)
    y = smp["rgb"] @ REC709
    expected = stats.sem(y, axis=2) / y.mean(axis=2)
    np.testing.assert_allclose(accumulate(smp).rel_noise(eps=1e-9), expected, rtol=1e-9)


def test_rel_noise_bounds_the_luminance_error_from_above(smp):
    y = smp["rgb"] @ REC709
    true = stats.sem(y, axis=2) / y.mean(axis=2)
    assert np.all(accumulate(smp).rel_noise(eps=1e-9) >= true * (1 - 1e-12))


def test_rel_noise_is_unknown_below_two_samples(rng):
    assert np.isinf(accumulate(make_samples(rng, 1)).rel_noise()).all()


def test_rel_noise_floors_black_pixels_at_eps():
    film = Film.zeros(1, 1)
    film.n[:] = 4
    film.rgb_sq[:] = 4e-6  # mean 0, variance 4e-6 / 3, std error √(var / 4) = 1e-3 / √3
    se_y = 1e-3 / np.sqrt(3)  # the same in every channel, and the Rec. 709 weights sum to 1
    np.testing.assert_allclose(film.rel_noise(eps=0.01), se_y / 0.01, rtol=1e-12)


def test_alpha_is_the_hit_fraction(smp):
    np.testing.assert_allclose(accumulate(smp).alpha(), smp["hit"].mean(axis=2), rtol=1e-12)


def test_albedo_averages_over_all_samples(smp):
    np.testing.assert_allclose(accumulate(smp).albedo(), smp["albedo"].mean(axis=2), rtol=1e-12)


def test_normal_is_the_normalised_mean_normal(smp):
    m = smp["normal"].sum(axis=2)
    np.testing.assert_allclose(accumulate(smp).normal(), m / np.linalg.norm(m, axis=-1)[..., None],
                               rtol=1e-12)


def test_depth_averages_over_hits_only(smp):
    hit = smp["hit"]
    expected = np.array([[smp["depth"][y, x][hit[y, x]].mean() if hit[y, x].any() else 0.0
                          for x in range(W)] for y in range(H)])
    np.testing.assert_allclose(accumulate(smp).depth(), expected, rtol=1e-12)


@pytest.mark.parametrize("aov", ["alpha", "albedo", "normal", "depth", "normal_mean"])
def test_aovs_are_zero_where_nothing_was_hit(aov):
    film = Film.zeros(2, 2)
    film.n[:] = 8
    assert not getattr(film, aov)().any()


# -- merge and tiles ----------------------------------------------------------------------------

def test_merge_equals_accumulating_all_samples(smp):
    cut = lambda a, b: {k: v[:, :, a:b] for k, v in smp.items()}  # noqa: E731
    merged = merge(accumulate(cut(0, 13)), accumulate(cut(13, 40)))
    whole = accumulate(smp)
    for f in FIELDS:  # float64 sums in another order: far below float32 rounding
        np.testing.assert_allclose(getattr(merged, f), getattr(whole, f), rtol=1e-13, atol=1e-13)


def test_merge_leaves_its_inputs_alone(smp):
    a, b = accumulate(smp), accumulate(smp)
    before = a.copy()
    merge(a, b)
    assert fields_equal(a, before)


def test_merge_refuses_films_of_different_shapes():
    with pytest.raises(FilmDataError):
        merge(Film.zeros(2, 3), Film.zeros(3, 2))


def test_tiles_added_into_a_frame_rebuild_the_whole_film(smp):
    whole = accumulate(smp)
    frame = Film.zeros(H, W)
    for y0, y1, x0, x1 in [(0, 2, 0, 4), (0, 2, 4, 6), (2, 5, 0, 4), (2, 5, 4, 6)]:
        tile = Film(**{f: np.ascontiguousarray(getattr(whole, f)[y0:y1, x0:x1]) for f in FIELDS})
        if (y0, x0) == (0, 0):
            frame.add_into(tile, y0, x0)  # the method and the function are the same operation
        else:
            add_into(frame, tile, y0, x0)
    assert fields_equal(frame, whole)


@pytest.mark.parametrize("y0, x0", [(-1, 0), (0, 5), (4, 0)])
def test_a_tile_outside_the_frame_is_refused(y0, x0):
    with pytest.raises(FilmDataError):
        add_into(Film.zeros(5, 6), Film.zeros(2, 2), y0, x0)


# -- bytes ----------------------------------------------------------------------------------------

def test_bytes_round_trip_exactly(smp):
    film = accumulate(smp)
    film.dropped[1, 2] = 3.0
    back = from_bytes(to_bytes(film))
    assert fields_equal(back, film)
    assert all(getattr(back, f).flags.writeable for f in FIELDS)


def test_bytes_hold_the_sums_and_little_more():
    # 21 values per pixel (6 counts and scalar sums + 5 colours, the odd half's count and sum
    # among them), float64 for the head's disk and float32 on the wire, a 25-byte header and a
    # 4-byte CRC (docs/design.md, film bytes)
    assert len(to_bytes(Film.zeros(7, 9))) == 7 * 9 * 21 * 8 + 25 + 4
    assert len(to_bytes(Film.zeros(7, 9), bits=32)) == 7 * 9 * 21 * 4 + 25 + 4
    # each layer adds 3 values per pixel and its name (a length byte and the UTF-8 bytes)
    names = ("diffuse_direct", "group_key")
    assert len(to_bytes(Film.zeros(7, 9, names))) == 7 * 9 * 27 * 8 + 25 + 15 + 10 + 4
    # each ID matte kind adds 8 (id, coverage) slots per pixel and its name
    assert len(to_bytes(Film.zeros(7, 9, (), ("object",)))) == 7 * 9 * 37 * 8 + 25 + 7 + 4


@pytest.mark.parametrize("bits", [32, 64])
def test_the_pieces_are_the_bytes_and_their_checksum_is_zlibs_crc32_of_the_body(smp, bits):
    import zlib

    film = accumulate(smp)
    parts = to_parts(film, bits)
    data = b"".join(parts)
    assert data == to_bytes(film, bits)
    # the checksum, built piece by piece, is zlib's CRC-32 of everything before it at once
    assert int.from_bytes(data[-4:], "little") == zlib.crc32(data[:-4])


def test_float64_pieces_are_the_films_own_memory_not_copies(smp):
    film = accumulate(smp)
    parts = to_parts(film)
    for name in ("rgb_sum", "n"):
        assert any(np.shares_memory(np.frombuffer(p, np.uint8), getattr(film, name))
                   for p in parts if isinstance(p, memoryview))


def mixed_film(smp) -> Film:
    film = accumulate(smp)
    film.odd_n[:] = film.n // 2
    film.odd_sum[:] = film.rgb_sum / 3.0
    film.dropped[0, 1] = 2.0
    return film


def test_mixed_bytes_keep_the_radiance_sums_in_float64_and_round_the_rest_to_float32(smp):
    film = mixed_film(smp)
    back = from_bytes(to_bytes(film, MIXED))
    for f in FIELDS:  # numpy's own float32 rounding is the reference for the narrow fields
        want = getattr(film, f) if f in WIDE else getattr(film, f).astype(np.float32)
        np.testing.assert_array_equal(getattr(back, f), want, err_msg=f)
    for f in ("n", "hits", "dropped", "odd_n", "alpha_sum"):  # counts: exact
        np.testing.assert_array_equal(getattr(back, f), getattr(film, f), err_msg=f)


def test_mixed_bytes_take_120_bytes_a_pixel_against_168():
    # 9 radiance values of 8 bytes (rgb_sum, rgb_sq, odd_sum) and 12 others of 4; a layer is
    # radiance (3 × 8), an ID matte kind's 8 slots of (id, coverage) are float32 (8 × 2 × 4)
    assert len(to_bytes(Film.zeros(7, 9), MIXED)) == 7 * 9 * 120 + 25 + 4
    names = ("diffuse_direct",)
    assert len(to_bytes(Film.zeros(7, 9, names, ("object",)), MIXED)) == \
        7 * 9 * (120 + 24 + 64) + 25 + 15 + 7 + 4


@pytest.mark.parametrize("field", ["n", "hits", "dropped", "alpha_sum"])
def test_a_count_float32_would_round_makes_the_whole_film_64_bits(smp, field):
    film = mixed_film(smp)
    big = 2.0 ** 24 + 1.0  # the first integer float32 cannot hold (IEEE 754 binary32)
    getattr(film, field)[2, 3] = big
    data = to_bytes(film, MIXED)
    assert data == to_bytes(film, 64)
    assert getattr(from_bytes(data), field)[2, 3] == big


def test_mixed_bytes_claiming_a_uniform_width_are_refused(smp):
    import struct
    import zlib

    data = bytearray(to_bytes(mixed_film(smp), MIXED))
    data[20] = 64  # the bits byte, after the 20-byte first header
    body = bytes(data[:-4])
    with pytest.raises(FilmDataError, match="bits per value in format version 5"):
        from_bytes(body + struct.pack("<I", zlib.crc32(body)))


def test_float32_bytes_round_the_sums_to_float32(smp):
    # IEEE 754 binary32 keeps 24 significant bits: each value within 2^-24 of itself, relative
    film = accumulate(smp)
    back = from_bytes(to_bytes(film, bits=32))
    for f in FIELDS:
        a, b = getattr(film, f), getattr(back, f)
        assert np.all(np.abs(b - a) <= np.abs(a) * 2.0**-24)
        assert np.array_equal(b, a.astype(np.float32).astype(np.float64))


def test_version_1_bytes_are_still_read(smp):
    # the format before layers (float64, no bits or layer fields): tile accumulators written by
    # an older head
    import struct
    import zlib

    film = accumulate(smp)
    h, w = film.shape
    body = struct.pack("<8sHHII", b"LMPFILM\x00", 1, len(OLD_FIELDS), h, w)
    body += b"".join(np.ascontiguousarray(getattr(film, f), dtype="<f8").tobytes() for f in OLD_FIELDS)
    back = from_bytes(body + struct.pack("<I", zlib.crc32(body)))
    assert fields_equal(back, film) and back.layer_names == ()


def test_version_2_bytes_are_still_read(smp):
    # the format before ID mattes (bits and layers, no matte kinds or slots): tile accumulators
    # written by an older head
    import struct
    import zlib

    film = accumulate(smp)
    h, w = film.shape
    body = struct.pack("<8sHHII", b"LMPFILM\x00", 2, len(OLD_FIELDS), h, w) + struct.pack("<BH", 64, 1)
    body += bytes([len(b"emission")]) + b"emission"
    body += b"".join(np.ascontiguousarray(getattr(film, f), dtype="<f8").tobytes() for f in OLD_FIELDS)
    body += np.full((h, w, 1, 3), 0.5).tobytes()
    back = from_bytes(body + struct.pack("<I", zlib.crc32(body)))
    assert fields_equal(back, film) and back.layer_names == ("emission",)
    assert np.all(back.layers == 0.5) and back.matte_kinds == ()


def _corrupt(kind: str, data: bytes) -> bytes:
    if kind == "truncated":
        return data[:-9]
    if kind == "padded":
        return data + b"\0" * 8
    if kind == "empty":
        return b""
    if kind == "magic":
        return b"NOTAFILM" + data[8:]
    if kind == "version":
        return data[:8] + (99).to_bytes(2, "little") + data[10:]
    flipped = bytearray(data)
    flipped[len(data) // 2] ^= 0x10  # one bit of one sum: only the checksum notices
    return bytes(flipped)


@pytest.mark.parametrize("kind", ["truncated", "padded", "empty", "magic", "version", "bitflip"])
def test_corrupt_bytes_raise_a_film_data_error(smp, kind):
    with pytest.raises(FilmDataError) as err:
        from_bytes(_corrupt(kind, to_bytes(accumulate(smp))))
    assert isinstance(err.value, LampyrError) and str(err.value).startswith("film bytes:")
