"""A film's mean relative noise in one pass: the number the head keeps per tile.

`Film.rel_noise` (engine/film.py) is the readable reference: per pixel the standard error of the
mean's Rec. 709 luminance over that luminance, built from numpy temporaries (variance, standard
error, mean, two matrix products). The head needs only its mean over a tile, once per tile and
group commit, on the threads that write tile files; there the temporaries cost 0.35 ms of a
64 × 64 tile's ~2 ms, held the GIL between operations, and competed with the head's loop.
`mean_rel_noise` computes the same mean in one loop over the pixels, without allocating, and
releases the GIL (nogil). tests/engine/test_film_noise.py compares the two.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit


@njit(cache=True, nogil=True)
def mean_rel_noise(n, rgb_sum, rgb_sq, luma, eps):
    """Mean over the pixels of se_Y / max(Y, eps), as np.mean(Film.rel_noise(eps)).

    n (h, w) float64 samples kept; rgb_sum, rgb_sq (h, w, 3) float64 Σ L and Σ L²;
    luma (3,) float64 luminance weights (film.LUMA_709); eps: radiance floor of the denominator.
    Returns inf when a pixel holds fewer than 2 samples (its noise is not known yet), nan for an
    empty film. The per-pixel formulas are the reference's: the unbiased variance of one sample
    (Σ L² − (Σ L)² / n) / (n − 1), clipped at 0; the standard error sqrt(variance / n) per
    channel, weighted by luma (an upper bound of se_Y, see Film.rel_noise)."""
    h, w = n.shape
    if h * w == 0:
        return np.nan
    total = 0.0
    for y in range(h):
        for x in range(w):
            k = n[y, x]
            if not k >= 2.0:
                return np.inf
            se = 0.0
            mean = 0.0
            for c in range(3):
                s = rgb_sum[y, x, c]
                var = (rgb_sq[y, x, c] - s * s / k) / (k - 1.0)
                if var < 0.0:
                    var = 0.0
                se += luma[c] * math.sqrt(var / k)
                mean += luma[c] * (s / k)
            total += se / max(mean, eps)
    return total / (h * w)


def film_mean_rel_noise(film, eps: float = 1e-3) -> float:
    """`mean_rel_noise` of a `Film` (see there)."""
    from .film import LUMA_709

    return float(mean_rel_noise(film.n, film.rgb_sum, film.rgb_sq, LUMA_709, eps))
