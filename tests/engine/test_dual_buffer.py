"""The odd half-frame (engine/film.py `odd_n`, `odd_sum`) and the dual-buffer estimate of the
denoised frame's error (engine/dual_buffer.py; docs/denoising.md, "A noise goal for the denoised
frame")."""

from __future__ import annotations

import struct
import zlib

import numpy as np
import pytest

from lampyr.engine.dual_buffer import pixel_variance, tile_errors
from lampyr.engine.film import FIELDS, Film, from_bytes, merge, to_bytes
from lampyr.engine.shot import parse_shot_text

from ..conftest import TINY_SHOT


@pytest.fixture(scope="module")
def renderer(compiled_kernels):
    from lampyr.engine.render import FrameRenderer

    return FrameRenderer(parse_shot_text(TINY_SHOT), 1)


def _tile(renderer):
    from lampyr.engine.render import Tile

    return Tile(0, 0, renderer.shot.width, renderer.shot.height)


def test_the_odd_half_holds_exactly_the_odd_numbered_samples(renderer):
    # docs/design.md, invariant 1: a sample depends only on its keys, so rendering each sample
    # index alone and adding the odd ones gives the kernel's odd half (float64 sums of the same
    # values in the same order: equal to the last bit)
    tile = _tile(renderer)
    whole = renderer.render(tile, 0, 8)
    odd = Film.zeros(tile.h, tile.w)
    for s in (1, 3, 5, 7):
        renderer.render(tile, s, 1, odd)
    assert np.array_equal(whole.odd_n, odd.n)
    assert np.array_equal(whole.odd_sum, odd.rgb_sum)
    even, odd_mean, n_even, n_odd = whole.halves()
    assert np.array_equal(n_even + n_odd, whole.n)
    np.testing.assert_allclose(even * n_even[..., None] + odd_mean * n_odd[..., None],
                               whole.rgb_sum, rtol=1e-12, atol=1e-12)


def test_halves_merge_across_batches_like_the_other_sums(renderer):
    # docs/design.md, invariant 2: results are sums, and sums merge; an odd first sample keeps
    # the parity of the sample index, not of its place in the batch
    tile = _tile(renderer)
    whole = renderer.render(tile, 0, 7)
    parts = merge(renderer.render(tile, 0, 3), renderer.render(tile, 3, 4))
    assert np.array_equal(parts.odd_n, whole.odd_n)
    np.testing.assert_allclose(parts.odd_sum, whole.odd_sum, rtol=1e-12)
    assert np.all(whole.odd_n == 3)  # indices 1, 3, 5 of [0, 7), unless a sample was dropped


def test_film_bytes_carry_the_odd_half_as_float32_and_float64(renderer):
    film = renderer.render(_tile(renderer), 0, 8)
    for bits in (32, 64):
        back = from_bytes(to_bytes(film, bits=bits))
        dtype = np.float32 if bits == 32 else np.float64
        assert np.array_equal(back.odd_n, film.odd_n)
        assert np.array_equal(back.odd_sum, film.odd_sum.astype(dtype).astype(np.float64))


def test_version_3_bytes_are_read_with_every_sample_in_the_even_half(renderer):
    # the format before the halves (9 fields): a tile accumulator written by an older head
    film = renderer.render(_tile(renderer), 0, 8)
    old = tuple(f for f in FIELDS if f not in ("odd_n", "odd_sum"))
    h, w = film.shape
    body = struct.pack("<8sHHII", b"LMPFILM\x00", 3, len(old), h, w) + struct.pack("<BH", 64, 0)
    body += struct.pack("<BB", 0, 8)
    body += b"".join(np.ascontiguousarray(getattr(film, f), dtype="<f8").tobytes() for f in old)
    back = from_bytes(body + struct.pack("<I", zlib.crc32(body)))
    assert np.array_equal(back.rgb_sum, film.rgb_sum)
    assert not back.odd_n.any() and not back.odd_sum.any()
    even, _, n_even, _ = back.halves()
    assert np.array_equal(n_even, film.n)
    # merged with new samples, the halves stay disjoint: the old ones stay even
    both = merge(back, renderer.render(_tile(renderer), 8, 2))
    assert np.all(both.odd_n == 1) and np.all(both.n == 10)


def test_the_frame_file_keeps_the_odd_half(tmp_path, renderer):
    from lampyr.engine.exr import read_frame, write_frame

    film = renderer.render(_tile(renderer), 0, 8)
    write_frame(tmp_path / "f.0001.exr", film, {"frame": 1})
    back, _ = read_frame(tmp_path / "f.0001.exr")
    assert np.array_equal(back.odd_n, film.odd_n)
    # the file stores the odd mean as float32 (ZIP, lossless): the sum to float32 rounding
    np.testing.assert_allclose(back.odd_sum, film.odd_sum, rtol=2.0**-23, atol=1e-12)


def test_a_frame_file_without_the_odd_half_reads_as_all_even(tmp_path, renderer):
    import OpenEXR

    from lampyr.engine.exr import ODD, ODD_COUNT, read_frame, write_frame

    film = renderer.render(_tile(renderer), 0, 8)
    path = tmp_path / "f.0001.exr"
    write_frame(path, film, {"frame": 1})
    with OpenEXR.File(str(path), separate_channels=True) as exr:
        header = dict(exr.header())
        chans = {k: v.pixels.copy() for k, v in exr.channels().items()
                 if k not in ODD + (ODD_COUNT,)}
    older = tmp_path / "older.0001.exr"
    OpenEXR.File(header, chans).write(str(older))  # as lampyr wrote frames before the halves
    back, _ = read_frame(older)
    assert not back.odd_n.any() and np.array_equal(back.n, film.n)


# -- the estimator ------------------------------------------------------------------------------


def test_the_dual_buffer_variance_is_the_variance_of_the_whole_mean():
    # For independent halves A, B of means with per-sample variance s2 over n_A and n_B samples,
    # E[(A - B)^2] = s2 (1/n_A + 1/n_B) (the variance of a difference of independent variables
    # is the sum of their variances, any probability textbook), so the weighted square
    # estimates s2 / (n_A + n_B), the variance of the mean of all samples. Tolerance: the
    # standard error of the mean of M squares of normal variables, sqrt(2 / M) relative
    # (Var(Z^2) = 2 for a standard normal Z, from memory), five of them.
    rng = np.random.default_rng(5)
    m, s2 = 200_000, 0.3
    for n_a, n_b in ((8, 8), (12, 4)):
        a = rng.normal(0.0, np.sqrt(s2 / n_a), (m, 1, 3)) + 0.5
        b = rng.normal(0.0, np.sqrt(s2 / n_b), (m, 1, 3)) + 0.5
        v = pixel_variance(a, b, np.full((m, 1), n_a), np.full((m, 1), n_b))
        # luminance of a grey noise with independent channels: s2 * sum(w_c^2) per sample
        want = s2 * float(np.sum(np.array([0.2126, 0.7152, 0.0722]) ** 2)) / (n_a + n_b)
        assert abs(v.mean() - want) <= 5 * np.sqrt(2.0 / m) * want


def test_a_pixel_with_an_empty_half_has_no_estimate():
    v = pixel_variance(np.ones((1, 2, 3)), np.zeros((1, 2, 3)), np.array([[4.0, 4.0]]),
                       np.array([[4.0, 0.0]]))
    assert np.isfinite(v[0, 0]) and np.isnan(v[0, 1])


def test_tile_errors_are_unknown_where_a_half_is_empty(renderer):
    from lampyr.engine.render import Tile

    film = renderer.render(_tile(renderer), 0, 1)  # one sample: index 0, the odd half is empty
    e = tile_errors(film, [Tile(0, 0, 8, 6)])
    assert e[0] == np.inf


def test_tile_errors_fall_as_samples_grow(renderer):
    # the estimate follows the frame's noise: 4x the samples, a clearly smaller error (for a
    # mean it would halve, the Monte Carlo error law; a denoiser is not a mean, so only the
    # direction is checked)
    from lampyr.engine.render import Tile

    tile = _tile(renderer)
    tiles = [Tile(0, 0, 16, 12)]
    few = tile_errors(renderer.render(tile, 0, 8), tiles)[0]
    many = tile_errors(renderer.render(tile, 0, 32), tiles)[0]
    assert 0 < many < few


# -- samples in proportion to the error ---------------------------------------------------------


def test_tile_targets_are_proportional_to_the_error_and_capped():
    from lampyr.engine.dual_buffer import tile_targets

    got = tile_targets([0.01, 0.02, 0.05, 0.5, np.inf], 8, 0.02, 64)
    # at or below the goal: kept; 2.5x the goal: 20 spp; 25x: capped at 64; unknown: the cap
    assert got.tolist() == [8, 8, 20, 64, 64]


def test_tile_targets_minimise_the_frames_squared_error_for_their_samples():
    # Neyman's optimum allocation (J. Neyman 1934, from memory; Cochran, "Sampling techniques",
    # ch. 5): with squared errors c_t / n_t (the Monte Carlo error law) and c_t = e_t^2 * n0, the
    # least sum for a given total is n_t proportional to e_t. Checked against scipy's general
    # constrained minimiser (SLSQP) on the same problem: same total, n_t >= n0.
    from scipy.optimize import minimize

    from lampyr.engine.dual_buffer import tile_targets

    rng = np.random.default_rng(3)
    e = rng.lognormal(-3.0, 0.8, 12)
    n0, goal = 8, float(np.quantile(e, 0.3))
    ours = tile_targets(e, n0, goal, 10**6).astype(float)
    c = e * e * n0
    total = ours.sum()
    best = minimize(lambda n: np.sum(c / n), np.full(12, total / 12), method="SLSQP",
                    bounds=[(n0, None)] * 12,
                    constraints=[{"type": "eq", "fun": lambda n: n.sum() - total}],
                    options={"ftol": 1e-14, "maxiter": 500})
    assert best.success
    # ours is rounded up to whole samples per tile: within 1 % of the continuous optimum (rule of
    # thumb for the rounding; without it the two agree to the minimiser's tolerance)
    assert np.sum(c / ours) <= best.fun * 1.01
    uniform = np.full(12, total / 12)
    assert np.sum(c / ours) < np.sum(c / uniform)
