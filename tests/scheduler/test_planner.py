"""Planning: sample ranges cover every sample once; batches sized from the measured cost."""

from __future__ import annotations

import pytest

from lampyr.scheduler.planner import (choose_layout, first_pass_samples,
                                      plan_batches, sample_ranges)


@pytest.mark.parametrize("start, target, batch, first", [(0, 128, 16, 8), (0, 7, 3, None),
                                                         (64, 128, 24, None), (0, 1, 4, 1)])
def test_ranges_cover_each_sample_exactly_once(start, target, batch, first):
    ranges = sample_ranges(start, target, batch, first)
    covered = [s for f, c in ranges for s in range(f, f + c)]
    assert covered == list(range(start, target))


def test_the_first_pass_comes_first_for_every_frame():
    from collections import namedtuple

    Tile = namedtuple("Tile", "x0 y0 w h")
    tiles = [Tile(0, 0, 8, 8), Tile(8, 0, 8, 8), Tile(0, 8, 8, 4), Tile(8, 8, 8, 4)]
    batches = plan_batches("j", [1, 2], tiles, sample_ranges(0, 8, 4, 1))
    n_first = 2 * len(tiles)
    assert {(b.first, b.count) for b in batches[:n_first]} == {(0, 1)}
    assert {b.frame for b in batches[:n_first]} == {1, 2}


@pytest.mark.parametrize("cost", [1e-7, 1e-6, 1e-5, 1e-4])
def test_a_batch_takes_about_the_target_time(cost):
    # a 1920 × 1080 frame with 1024 spp: every cost leaves a batch in the 10–60 s band
    layout = choose_layout(1920, 1080, 1024, cost)
    pixels = layout.tile_size ** 2
    seconds = pixels * layout.batch_samples * cost
    # cheaper than the band even at full samples, or dearer even at one sample: the bounds win
    assert 10 <= seconds <= 60 or layout.batch_samples in (1, 1024)
    assert seconds <= 60 or layout.tile_size == 16


def test_first_pass_is_a_small_part_of_the_samples():
    assert first_pass_samples(128, 32) == 8
    assert first_pass_samples(4, 2) == 1
