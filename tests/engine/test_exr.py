"""Frame files read back by the OpenEXR library itself, and refined from the file alone."""

from __future__ import annotations

import os

import numpy as np
import OpenEXR
import pytest

from lampyr.engine.exr import (CHANNELS, DENOISED, ODD, ODD_COUNT, UINT_CHANNELS, read_denoised,
                               read_frame, write_frame)
from lampyr.engine.film import FIELDS, Film, merge
from lampyr.errors import FrameFileError

H, W = 6, 7
ATTRS = {"shot": "courtyard", "frame": 12, "samples": 64, "render_seconds": 1.25,
         "version": "0.1.0"}


def accumulate(rng, s, h=H, w=W) -> Film:
    """A film summed from per-sample values of a plausible render (lognormal radiance, partial
    coverage, random albedo, unit normals and depths on hits), as the integrator would."""
    mu = rng.normal(0.0, 1.0, (h, w, 1, 3))
    rgb = np.exp(mu + rng.normal(0.0, 1.0, (h, w, s, 3)))
    hit = rng.random((h, w, s)) < rng.uniform(0.0, 1.0, (h, w, 1))
    normal = rng.normal(0.0, 1.0, (h, w, s, 3))
    normal /= np.linalg.norm(normal, axis=-1, keepdims=True)
    film = Film.zeros(h, w)
    film.n[:] = s
    film.rgb_sum[:] = rgb.sum(axis=2)
    film.rgb_sq[:] = (rgb**2).sum(axis=2)
    film.alpha_sum[:] = film.hits[:] = hit.sum(axis=2)
    film.albedo_sum[:] = (rng.uniform(0, 1, (h, w, s, 3)) * hit[..., None]).sum(axis=2)
    film.normal_sum[:] = (normal * hit[..., None]).sum(axis=2)
    film.depth_sum[:] = (rng.uniform(1, 30, (h, w, s)) * hit).sum(axis=2)
    film.dropped[:] = rng.integers(0, 2, (h, w))
    return film


def openexr_read(path):
    with OpenEXR.File(str(path), separate_channels=True) as f:
        header = dict(f.header())
        channels = {k: (v.type(), np.array(v.pixels)) for k, v in f.channels().items()}
    return header, channels


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    film = accumulate(np.random.default_rng(21), 16)
    path = tmp_path_factory.mktemp("frames") / "courtyard.0012.exr"
    write_frame(path, film, ATTRS)
    return path, film


# -- what OpenEXR sees ----------------------------------------------------------------------------

@pytest.mark.parametrize("name", CHANNELS)
def test_channel_is_stored_with_its_pixel_type(written, name):
    _, channels = openexr_read(written[0])
    kind, pixels = channels[name]
    assert kind == (OpenEXR.UINT if name in UINT_CHANNELS else OpenEXR.FLOAT)
    assert pixels.shape == (H, W)


def test_no_other_channels_are_stored(written):
    _, channels = openexr_read(written[0])
    # and the odd half-frame's mean and count (docs/denoising.md)
    assert sorted(channels) == sorted(CHANNELS + ODD + (ODD_COUNT,))


def test_compression_is_lossless_zip(written):
    header, _ = openexr_read(written[0])
    assert header["compression"] == OpenEXR.ZIP_COMPRESSION


@pytest.mark.parametrize("key, text", [("lampyr.shot", "courtyard"), ("lampyr.frame", "12"),
                                       ("lampyr.samples", "64"), ("lampyr.render_seconds", "1.25"),
                                       ("lampyr.version", "0.1.0"), ("lampyr.format", "1")])
def test_attributes_are_stored_as_prefixed_strings(written, key, text):
    header, _ = openexr_read(written[0])
    assert header[key] == text


def test_means_are_bit_exact_float32(written):
    path, film = written
    _, channels = openexr_read(path)
    stored = np.stack([channels[c][1] for c in "RGB"], axis=-1)
    assert stored.dtype == np.float32
    np.testing.assert_array_equal(stored.view(np.uint32), film.mean().astype(np.float32).view(np.uint32))
    # and read_frame's sums give those float32 values back exactly (mean·n is exact in float64)
    np.testing.assert_array_equal(read_frame(path)[0].mean(), stored.astype(np.float64))


@pytest.mark.parametrize("channel, stat", [("spp", "n"), ("hits", "hits"), ("dropped", "dropped"),
                                           ("A", "alpha"), ("Z", "depth")])
def test_scalar_channels_hold_their_statistic(written, channel, stat):
    path, film = written
    _, channels = openexr_read(path)
    value = getattr(film, stat)
    expected = value() if callable(value) else value
    np.testing.assert_array_equal(channels[channel][1], expected.astype(channels[channel][1].dtype))


@pytest.mark.parametrize("names, stat", [(("var.R", "var.G", "var.B"), "variance"),
                                         (("albedo.R", "albedo.G", "albedo.B"), "albedo"),
                                         (("N.X", "N.Y", "N.Z"), "normal_mean")])
def test_colour_channels_hold_their_statistic(written, names, stat):
    path, film = written
    _, channels = openexr_read(path)
    stored = np.stack([channels[c][1] for c in names], axis=-1)
    np.testing.assert_array_equal(stored, getattr(film, stat)().astype(np.float32))


# -- read back and refine -----------------------------------------------------------------------

def test_read_returns_the_attributes_without_prefix(written):
    _, attrs = read_frame(written[0])
    assert attrs == {k: str(v) for k, v in ATTRS.items()} | {"format": "1"}


def test_refining_from_the_file_equals_merging_in_memory(tmp_path):
    # docs/design.md, invariant 10: samples 0..24 written to a file, then samples 24..64 merged into what
    # the file gives back, agree with all 64 merged in memory to float32 rounding (the file holds
    # float32 means and variances: 2^-24 relative each, a few such terms per statistic)
    rng = np.random.default_rng(22)
    a, b = accumulate(rng, 24), accumulate(rng, 40)
    path = tmp_path / "f.0001.exr"
    write_frame(path, a, {"shot": "f"})
    refined = merge(read_frame(path)[0], b)
    direct = merge(a, b)
    for count in ("n", "hits", "dropped"):
        np.testing.assert_array_equal(getattr(refined, count), getattr(direct, count))
    for stat in ("mean", "variance", "alpha", "albedo", "normal", "depth"):
        np.testing.assert_allclose(getattr(refined, stat)(), getattr(direct, stat)(),
                                   rtol=1e-6, atol=1e-7, err_msg=stat)


def test_a_single_sample_pixel_keeps_its_square(tmp_path):
    # n = 1 has no sample variance; Σ L² = L² must still come back for later merges
    film = accumulate(np.random.default_rng(23), 1)
    path = tmp_path / "one.exr"
    write_frame(path, film, {})
    np.testing.assert_allclose(read_frame(path)[0].rgb_sq, film.rgb_sq, rtol=2e-7)


def test_pixels_without_samples_read_back_as_zeros(tmp_path):
    path = tmp_path / "empty.exr"
    write_frame(path, Film.zeros(3, 2), {})
    film, _ = read_frame(path)
    assert not any(getattr(film, f).any() for f in FIELDS)


# -- files that are not lampyr frames -------------------------------------------------------------

def _cut(data: bytes, kind: str) -> bytes:
    return {"empty": b"", "header only": data[:100], "half": data[: len(data) // 2],
            "last byte missing": data[:-1], "garbage": b"\x76\x2f\x31\x01" + os.urandom(500)}[kind]


@pytest.mark.parametrize("kind", ["empty", "header only", "half", "last byte missing", "garbage"])
def test_damaged_files_raise_frame_file_error(written, tmp_path, kind):
    bad = tmp_path / "bad.exr"
    bad.write_bytes(_cut(written[0].read_bytes(), kind))
    with pytest.raises(FrameFileError, match="bad.exr"):
        read_frame(bad)


def test_a_missing_file_raises_frame_file_error(tmp_path):
    with pytest.raises(FrameFileError, match="no such frame file"):
        read_frame(tmp_path / "nope.exr")


def _plain_exr(path, header_extra, names):
    ch = {n: np.zeros((2, 2), np.uint32 if n in UINT_CHANNELS else np.float32) for n in names}
    header = {"compression": OpenEXR.ZIP_COMPRESSION, "type": OpenEXR.scanlineimage, **header_extra}
    OpenEXR.File(header, ch).write(str(path))


def test_an_exr_from_elsewhere_is_not_a_lampyr_frame(tmp_path):
    path = tmp_path / "plain.exr"
    _plain_exr(path, {}, ["R", "G", "B", "A"])
    with pytest.raises(FrameFileError, match="not a lampyr frame"):
        read_frame(path)


@pytest.mark.parametrize("absent", ["var.G", "spp", "Z", "hits"])
def test_a_missing_channel_is_named(tmp_path, absent):
    path = tmp_path / "partial.exr"
    _plain_exr(path, {"lampyr.format": "1"}, [c for c in CHANNELS if c != absent])
    with pytest.raises(FrameFileError, match=f"without channel.*{absent}"):
        read_frame(path)


def test_counts_stored_as_float_are_refused(tmp_path):
    path = tmp_path / "floatspp.exr"
    ch = {n: np.zeros((2, 2), np.float32) for n in CHANNELS}
    OpenEXR.File({"lampyr.format": "1"}, ch).write(str(path))
    with pytest.raises(FrameFileError, match="UINT"):
        read_frame(path)


def test_a_newer_format_is_refused(tmp_path):
    path = tmp_path / "v2.exr"
    _plain_exr(path, {"lampyr.format": "2"}, CHANNELS)
    with pytest.raises(FrameFileError, match="format '2'"):
        read_frame(path)


# -- writing --------------------------------------------------------------------------------------

def test_writing_leaves_only_the_frame_in_its_folder(tmp_path):
    write_frame(tmp_path / "a.0001.exr", Film.zeros(2, 2), {})
    assert [p.name for p in tmp_path.iterdir()] == ["a.0001.exr"]


def test_a_failed_write_keeps_the_old_frame(tmp_path):
    path = tmp_path / "a.0001.exr"
    old = accumulate(np.random.default_rng(24), 4)
    write_frame(path, old, {"shot": "old"})
    # a lone surrogate cannot be encoded as UTF-8: the bindings fail while writing the file
    with pytest.raises(UnicodeEncodeError):
        write_frame(path, accumulate(np.random.default_rng(25), 8), {"shot": "\udcff"})
    film, attrs = read_frame(path)
    assert attrs["shot"] == "old"
    np.testing.assert_array_equal(film.n, old.n)
    assert [p.name for p in tmp_path.iterdir()] == ["a.0001.exr"]


def test_counts_that_are_not_whole_numbers_are_refused(tmp_path):
    film = Film.zeros(2, 2)
    film.n[0, 0] = 1.5
    with pytest.raises(FrameFileError, match="whole numbers"):
        write_frame(tmp_path / "x.exr", film, {})
    assert not any(tmp_path.iterdir())


@pytest.mark.parametrize("attrs, error", [({"format": "9"}, ValueError), ({"": 1}, ValueError),
                                          ({"shot": [1]}, TypeError)])
def test_unusable_attributes_are_refused(tmp_path, attrs, error):
    with pytest.raises(error):
        write_frame(tmp_path / "x.exr", Film.zeros(1, 1), attrs)



# -- the denoised layer ---------------------------------------------------------------------------

def _denoised_like(film: Film) -> np.ndarray:
    """Any (h, w, 3) image stands in for the denoiser's output: the file only stores it."""
    return (film.mean() * 0.5 + 0.25).astype(np.float32)


@pytest.fixture(scope="module")
def written_denoised(tmp_path_factory):
    film = accumulate(np.random.default_rng(22), 16)
    path = tmp_path_factory.mktemp("frames") / "courtyard.0013.exr"
    picture = _denoised_like(film)
    write_frame(path, film, ATTRS, picture)
    return path, film, picture


@pytest.mark.parametrize("name", DENOISED)
def test_the_denoised_layer_is_three_float_channels(written_denoised, name):
    # read back by the OpenEXR library itself; denoised.R/G/B are the channel names (issue 12)
    _, channels = openexr_read(written_denoised[0])
    kind, pixels = channels[name]
    assert kind == OpenEXR.FLOAT and pixels.dtype == np.float32 and pixels.shape == (H, W)


def test_the_denoised_layer_holds_the_given_picture_bit_exact(written_denoised):
    _, channels = openexr_read(written_denoised[0])
    got = np.stack([channels[c][1] for c in DENOISED], -1)
    assert np.array_equal(got, written_denoised[2])  # ZIP is lossless; float32 in, float32 out


def test_read_denoised_returns_the_layer(written_denoised):
    assert np.array_equal(read_denoised(written_denoised[0]), written_denoised[2])


def test_read_denoised_of_a_frame_without_the_layer_is_none(written):
    assert read_denoised(written[0]) is None


@pytest.mark.parametrize("field", FIELDS)
def test_reading_back_ignores_the_denoised_layer(tmp_path, field):
    # the same film written with and without the layer reads back to the same sums
    film = accumulate(np.random.default_rng(23), 8)
    write_frame(tmp_path / "a.exr", film, ATTRS)
    write_frame(tmp_path / "b.exr", film, ATTRS, _denoised_like(film))
    a, b = read_frame(tmp_path / "a.exr")[0], read_frame(tmp_path / "b.exr")[0]
    assert np.array_equal(getattr(a, field), getattr(b, field))


@pytest.mark.parametrize("name", CHANNELS)
def test_the_denoised_layer_leaves_every_other_channel_bit_identical(tmp_path, name):
    film = accumulate(np.random.default_rng(24), 8)
    write_frame(tmp_path / "a.exr", film, ATTRS)
    write_frame(tmp_path / "b.exr", film, ATTRS, _denoised_like(film))
    a = openexr_read(tmp_path / "a.exr")[1][name][1]
    b = openexr_read(tmp_path / "b.exr")[1][name][1]
    assert a.dtype == b.dtype and a.tobytes() == b.tobytes()


def test_a_denoised_picture_of_another_size_is_refused(tmp_path):
    film = accumulate(np.random.default_rng(25), 4)
    with pytest.raises(ValueError, match="denoised"):
        write_frame(tmp_path / "a.exr", film, ATTRS, np.zeros((H + 1, W, 3), np.float32))


def test_the_readme_frame_file_table_names_every_channel_the_writer_writes():
    import re
    from pathlib import Path

    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text()
    table = readme.split("| channel | meaning |", 1)[1].split("\n\n", 1)[0]
    named = set(re.findall(r"`([A-Za-z.]+)`", table))
    assert set(CHANNELS) | set(DENOISED) <= named, sorted(set(CHANNELS) | set(DENOISED) - named)
