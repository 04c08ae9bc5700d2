"""The one-pass mean relative noise (engine/film_noise.py) against its readable reference,
`Film.rel_noise` averaged by numpy, and against scipy's standard error of the very samples."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from lampyr.engine.film import LUMA_709, Film
from lampyr.engine.film_noise import film_mean_rel_noise, mean_rel_noise

from .test_film import REC709, accumulate, make_samples


@pytest.mark.parametrize("seed, samples", [(1, 2), (2, 7), (3, 40)])
def test_it_is_the_mean_of_the_reference_per_pixel_noise(seed, samples):
    film = accumulate(make_samples(np.random.default_rng(seed), samples))
    expected = np.mean(film.rel_noise())  # numpy's pairwise sum; the kernel's runs in order
    assert film_mean_rel_noise(film) == pytest.approx(expected, rel=1e-12)


def test_grey_pixels_give_scipys_relative_standard_error():
    # grey: the channels' noise is perfectly correlated, so Σ w_c se_c is se_Y itself
    smp = make_samples(np.random.default_rng(4), 30, grey=True)
    y = smp["rgb"] @ REC709
    expected = np.mean(stats.sem(y, axis=2) / y.mean(axis=2))
    assert film_mean_rel_noise(accumulate(smp), eps=1e-9) == pytest.approx(expected, rel=1e-9)


def test_a_pixel_below_two_samples_makes_the_noise_unknown():
    film = accumulate(make_samples(np.random.default_rng(5), 6))
    film.n[2, 3] = 1
    assert np.isinf(np.mean(film.rel_noise())) and np.isinf(film_mean_rel_noise(film))


def test_black_pixels_are_floored_at_eps():
    film = Film.zeros(2, 3)
    film.n[:] = 4
    film.rgb_sq[:] = 4e-6  # mean 0, std error 1e-3 / √3 per channel (see test_film.py)
    assert film_mean_rel_noise(film, eps=0.01) == pytest.approx(1e-3 / np.sqrt(3) / 0.01,
                                                                rel=1e-12)


def test_rounding_that_makes_a_variance_negative_counts_as_zero():
    film = Film.zeros(1, 1)
    film.n[:] = 3
    film.rgb_sum[:] = 0.1 * 3
    film.rgb_sq[:] = 0.1 * 0.1 * 3 * (1 - 1e-15)  # Σ L² a hair below (Σ L)² / n
    assert film_mean_rel_noise(film) == 0.0 == np.mean(film.rel_noise())


def test_an_empty_film_has_no_noise():
    assert np.isnan(mean_rel_noise(np.zeros((0, 4)), np.zeros((0, 4, 3)), np.zeros((0, 4, 3)),
                                   LUMA_709, 1e-3))
