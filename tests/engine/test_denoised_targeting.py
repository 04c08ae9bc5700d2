"""Spending samples where the denoised error is highest beats spending them evenly, at equal total
samples (docs/denoising.md, "A noise goal for the denoised frame"; issue 12, part 7).

Each render is made twice from the same seed: uniform, every pixel at 20 spp; targeted, every
pixel at 8 spp and then each 16 px tile raised as `refine --denoised-noise E` raises it
(engine/dual_buffer.py: its estimated denoised error measured, and `tile_targets`, samples in
proportion to the error), with the goal E set as low as the same budget allows: targeted spends
at most the samples uniform does. Both are denoised as frame files are.
(bench/denoised_noise.py measured this on seeds 1 to 12; the test draws other seeds, from 101.)
The error is the relative RMSE of the denoised frame against an independent high-sample render
(another seed), the reference's own variance of the mean taken away (as tests/engine/
test_denoise.py measures it). The check: over K independent seeds, the mean of the paired
differences (uniform minus targeted) is above twice its standard error (a one-sided paired
comparison of means; the standard error of a mean of K differences is their sample standard
deviation / sqrt(K), any statistics textbook).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from .test_denoise import NOISY_SHOT, relative_rmse

DEMO = Path(__file__).resolve().parents[2] / "examples" / "courtyard" / "courtyard.toml"
BASE, UNIFORM, TILE = 8, 20, 16
W, H = 96, 48
FIRST_SEED = 101

# scene: (shot, frame, seeds, reference spp)
SCENES = {
    "courtyard": ("demo", 1, 12, 512),
    "bounce": ("noisy", 1, 8, 512),  # tests/engine/test_denoise.py's mostly indirectly lit room
}


def _shot(which: str):
    from lampyr.engine.shot import load_shot, parse_shot_text

    shot = load_shot(DEMO) if which == "demo" else parse_shot_text(NOISY_SHOT)
    return shot.with_overrides(width=W, height=H, samples=BASE)


def _frame(renderer, tiles, first: int, count: int):
    from lampyr.engine.film import Film

    film = Film.zeros(H, W)
    for t in tiles:
        film.add_into(renderer.render(t, first, count), t.y0, t.x0)
    return film


def goal_for_budget(errors, pixels, held: int, budget: float) -> float:
    """The lowest goal whose `tile_targets` spend at most `budget` spp on average (bisection on
    the goal's logarithm)."""
    from lampyr.engine.dual_buffer import tile_targets

    def spent(goal):
        return float(np.sum(tile_targets(errors, held, goal, 10**6) * pixels) / np.sum(pixels))

    lo, hi = np.log(np.min(errors)) - 10, np.log(np.max(errors)) + 1  # hi spends nothing more
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        lo, hi = (lo, mid) if spent(np.exp(mid)) <= budget else (mid, hi)
    return float(np.exp(hi))


def _both_ways(shot, frame: int, seed: int):
    from lampyr.engine.dual_buffer import tile_errors, tile_targets
    from lampyr.engine.render import FrameRenderer, tiles_for

    renderer = FrameRenderer(dataclasses.replace(shot, seed=seed), frame)
    tiles = tiles_for(W, H, TILE)
    pixels = np.array([t.w * t.h for t in tiles], float)
    targeted = _frame(renderer, tiles, 0, BASE)
    errors = tile_errors(targeted, tiles)
    targets = tile_targets(errors, BASE, goal_for_budget(errors, pixels, BASE, UNIFORM), 10**6)
    for t, n in zip(tiles, targets):
        if n > BASE:
            targeted.add_into(renderer.render(t, BASE, int(n) - BASE), t.y0, t.x0)
    return targeted, _frame(renderer, tiles, 0, UNIFORM)


@pytest.mark.parametrize("scene", sorted(SCENES))
def test_targeting_the_denoised_error_beats_uniform_sampling(scene, compiled_kernels):
    from lampyr.engine.denoise import denoise_film
    from lampyr.engine.render import render_frame

    which, frame, seeds, reference = SCENES[scene]
    shot = _shot(which)
    ref = render_frame(dataclasses.replace(shot, seed=99), frame, 0, reference)
    diffs = []
    for seed in range(FIRST_SEED, FIRST_SEED + seeds):
        targeted, uniform = _both_ways(shot, frame, seed)
        # no more samples than uniform (every sample kept or dropped is counted), and nearly as
        # many: whole samples per tile leave at most a few hundred pixel-samples unspent
        spent = (targeted.n + targeted.dropped).sum()
        assert 0.95 * UNIFORM * W * H <= spent <= (uniform.n + uniform.dropped).sum()
        diffs.append(relative_rmse(denoise_film(uniform), ref)
                     - relative_rmse(denoise_film(targeted), ref))
    d = np.array(diffs)
    se = d.std(ddof=1) / np.sqrt(len(d))
    assert d.mean() > 2.0 * se, f"{scene}: uniform - targeted = {d.mean():.4f} ± {se:.4f}: {d}"
