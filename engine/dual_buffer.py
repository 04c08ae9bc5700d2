"""The denoised frame's remaining error, estimated from its two half-frames (docs/denoising.md,
"A noise goal for the denoised frame").

A film keeps, beside the sum of all of a pixel's samples, the sum of its odd-numbered ones
(engine/film.py, `odd_n`, `odd_sum`), so the frame splits into two half-frames A (even sample
indices) and B (odd) made of disjoint samples: two independent estimates of the same picture.
This module denoises each half with the frame's own guides and reads the remaining error of the
denoised frame from the difference of the two denoised halves. It follows the dual-buffer
variance estimate of Rousselle, Knaus and Zwicker, "Adaptive rendering with non-local means
filtering" (ACM Transactions on Graphics 31(6), 2012; from memory): samples are split into two
buffers, each is filtered, and the squared difference of the filtered buffers estimates the
variance of the filtered frame, which then decides where the next samples go.

The estimator. With D_A, D_B the denoised halves' luminance (Rec. 709) at a pixel and n_A, n_B
the halves' sample counts, the variance of the denoised frame (all n_A + n_B samples) is taken as

    v = (D_A - D_B)^2 * n_A n_B / (n_A + n_B)^2        ((D_A - D_B)^2 / 4 for equal halves)

and a tile's error is the root mean square over its pixels, relative to the whole frame's mean
luminance,

    E_tile = sqrt(mean_tile(v)) / max(mean_frame(Y), eps)

with Y the denoised frame's luminance. Relative to the frame, not the tile: a goal E met by every
tile bounds the whole frame's relative RMS noise, sqrt(mean_frame(v)) / mean_frame(Y), by E, so
samples go where they lower the frame's error most; a dark tile's noise counts as much as it
shows against the frame's brightness. (Measured with an all-or-nothing allocation: ranking tiles
by their error relative to their own luminance sent samples to dark corners and gained nothing
over uniform sampling on one of the two test scenes; see docs/denoising.md.)

Assumptions, each only approximately true:
  1. the two halves are independent (disjoint samples; docs/design.md, invariant 1) and are
     denoised with the same guides (the whole frame's albedo and normal), so only their colour
     noise differs;
  2. the denoiser acts on a half as it acts on the whole frame, its output's variance falling as
     1/n like a mean's: then Var(D_A - D_B) = Var(D_A) + Var(D_B) = c (1/n_A + 1/n_B) and the
     whole frame's variance is c / (n_A + n_B), which gives the weight above. A neural denoiser
     smooths a half (fewer samples) more than the whole, so this is a rule of thumb, not a law;
  3. bias is left out: what the denoiser gets wrong in the same way from both halves (a smeared
     texture, a lost highlight) does not show in their difference. The estimate is the denoised
     frame's remaining noise, a lower bound of its error.
A single pixel's (D_A - D_B)^2 is one squared difference, a very noisy estimate of v (one degree
of freedom per channel); the tile's mean over its pixels is what is used.
"""

from __future__ import annotations

import numpy as np

from .denoise import GUIDES_AS_IS, denoise_frame
from .film import LUMA_709

EPS = 1e-3  # radiance floor of the denominator, as Film.rel_noise has it


def denoise_halves(film, *, guides: str = GUIDES_AS_IS, quality: str = "high"):
    """(D_A, D_B): each half-frame's mean through the denoiser, guided by the whole film's albedo
    and normal means; (h, w, 3) float32 each."""
    even, odd, _, _ = film.halves()
    albedo, normal = film.albedo(), film.normal_mean()
    return (denoise_frame(even, albedo, normal, guides=guides, quality=quality),
            denoise_frame(odd, albedo, normal, guides=guides, quality=quality))


def pixel_variance(d_a, d_b, n_a, n_b) -> np.ndarray:
    """(h, w) v of the module docstring: the estimated variance of the denoised frame's luminance;
    NaN where a half holds no sample (the difference says nothing there)."""
    dy = (np.asarray(d_a, np.float64) - np.asarray(d_b, np.float64)) @ LUMA_709
    n_a = np.asarray(n_a, np.float64)
    n_b = np.asarray(n_b, np.float64)
    total = n_a + n_b
    weight = np.full(n_a.shape, np.nan)
    ok = (n_a > 0) & (n_b > 0)
    weight[ok] = n_a[ok] * n_b[ok] / (total[ok] * total[ok])
    return dy * dy * weight


def tile_errors(film, tiles, denoised=None, halves=None, eps: float = EPS, **denoise) -> np.ndarray:
    """(len(tiles),) E_tile of the module docstring for each tile (an object with x0, y0, w, h):
    the RMS noise of the denoised frame's luminance over the tile, relative to the frame's mean
    luminance; inf where some pixel of the tile has an empty half (the error is not known).

    denoised: the whole frame's denoised picture when the caller has it (else the mean of the
    denoised halves stands in for it); halves: (D_A, D_B) when the caller has them (else they are
    denoised here, with the keyword arguments of `denoise_halves`)."""
    d_a, d_b = denoise_halves(film, **denoise) if halves is None else halves
    _, _, n_a, n_b = film.halves()
    v = pixel_variance(d_a, d_b, n_a, n_b)
    picture = 0.5 * (np.asarray(d_a, np.float64) + np.asarray(d_b, np.float64)) \
        if denoised is None else np.asarray(denoised, np.float64)
    scale = max(float(np.mean(picture @ LUMA_709)), eps) if picture.size else eps
    out = np.empty(len(tiles))
    for k, t in enumerate(tiles):
        block = (slice(t.y0, t.y0 + t.h), slice(t.x0, t.x0 + t.w))
        vt = v[block]
        if vt.size == 0 or not np.isfinite(vt).all():
            out[k] = np.inf
            continue
        out[k] = float(np.sqrt(vt.mean()) / scale)
    return out


def tile_targets(errors, held, goal: float, cap: int) -> np.ndarray:
    """Samples per pixel each tile should reach for a denoised-error goal: a tile whose error e
    (measured at `held` spp) is above `goal` gets held · e / goal, rounded up, at most `cap`; the
    others keep what they hold; a tile whose error is not known (inf, NaN) gets `cap`.

    Samples in proportion to the error: under the Monte Carlo error law (a tile's squared error
    c / n) this is Neyman's optimum allocation of stratified sampling (J. Neyman, "On the two
    different aspects of the representative method", J. Royal Statistical Society 97, 1934; from
    memory), n proportional to each stratum's standard deviation, which makes the frame's summed
    squared error the least for the samples spent; the goal sets how many are spent. One round
    does not bring a tile to the goal (its error falls to about sqrt(e · goal)); refining again
    with the same goal goes on."""
    e = np.asarray(errors, np.float64)
    held = np.broadcast_to(np.asarray(held, np.float64), e.shape)
    out = held.copy()
    unknown = ~np.isfinite(e)
    above = ~unknown & (e > goal)
    out[above] = np.ceil(held[above] * e[above] / goal - 1e-9)
    out[unknown] = cap
    return np.maximum(np.minimum(out, cap), held).astype(np.int64)
