"""Tile accumulators: what a file holds is what was merged, each sample range once."""

from __future__ import annotations

import json
import struct

import numpy as np
import pytest

from lampyr.engine.render import FrameRenderer, Tile
from lampyr.engine.shot import load_shot
from lampyr.scheduler.accumulator import MAGIC, TileAccumulator, overlaps

TILE = Tile(4, 2, 8, 6)


@pytest.fixture
def renderer(tiny_shot):
    return FrameRenderer(load_shot(tiny_shot), 1)


def test_two_ranges_merged_equal_one_range_rendered(renderer, tmp_path):
    acc = TileAccumulator(tmp_path / "t.acc", TILE.w, TILE.h)
    assert acc.add(renderer.render(TILE, 0, 3), 0, 3)
    assert acc.add(renderer.render(TILE, 3, 5), 3, 5)
    whole = renderer.render(TILE, 0, 8)
    # batches merge to the same sums (docs/design.md, invariant 2), to float64 rounding: a sum
    # of n non-negative terms in any order is within γ(n-1) = (n-1)u / (1 - (n-1)u) of the exact
    # one, u = 2**-53 (Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., §4.2);
    # two sums of n = 8 samples differ by at most 2 γ(7) ≈ 14 u; the division by 8 is exact
    np.testing.assert_allclose(acc.film.mean(), whole.mean(), rtol=16 * 2.0**-53, atol=0)


@pytest.mark.parametrize("first, count", [(0, 3), (2, 1), (1, 4)])
def test_a_range_overlapping_what_is_held_is_dropped(renderer, tmp_path, first, count):
    acc = TileAccumulator(tmp_path / "t.acc", TILE.w, TILE.h)
    acc.add(renderer.render(TILE, 0, 3), 0, 3)
    before = acc.film.mean().copy()
    assert not acc.add(renderer.render(TILE, first, count), first, count)
    assert acc.ranges == [(0, 3)]
    np.testing.assert_array_equal(acc.film.mean(), before)


def test_the_file_names_the_ranges_it_holds(renderer, tmp_path):
    acc = TileAccumulator(tmp_path / "t.acc", TILE.w, TILE.h)
    acc.add(renderer.render(TILE, 3, 2), 3, 2)
    acc.add(renderer.render(TILE, 0, 3), 0, 3)
    acc.save()
    raw = (tmp_path / "t.acc").read_bytes()
    assert raw[:8] == MAGIC
    (n,) = struct.unpack("<I", raw[8:12])
    assert json.loads(raw[12:12 + n])["ranges"] == [[0, 3], [3, 2]]
    back = TileAccumulator.load(tmp_path / "t.acc", TILE.w, TILE.h)
    assert back.ranges == [(0, 3), (3, 2)] and back.samples == 5
    np.testing.assert_array_equal(back.film.mean(), acc.film.mean())
    assert not list(tmp_path.glob("*.tmp"))


def test_a_tile_file_keeps_the_radiance_sums_whole_and_the_guides_as_float32(renderer, tmp_path):
    acc = TileAccumulator(tmp_path / "t.acc", TILE.w, TILE.h)
    acc.add(renderer.render(TILE, 0, 5), 0, 5)
    acc.save()
    back = TileAccumulator.load(tmp_path / "t.acc", TILE.w, TILE.h).film
    for f in ("rgb_sum", "rgb_sq", "odd_sum", "n", "hits", "alpha_sum"):  # exact
        np.testing.assert_array_equal(getattr(back, f), getattr(acc.film, f), err_msg=f)
    for f in ("albedo_sum", "normal_sum", "depth_sum"):  # numpy's float32 rounding
        np.testing.assert_array_equal(getattr(back, f), getattr(acc.film, f).astype(np.float32))


def test_a_tile_file_of_float64_throughout_is_still_read(renderer, tmp_path):
    from lampyr.engine.film import to_bytes

    film = renderer.render(TILE, 0, 4)
    head = json.dumps({"ranges": [[0, 4]], "w": TILE.w, "h": TILE.h, "noise": None}).encode()
    (tmp_path / "t.acc").write_bytes(MAGIC + struct.pack("<I", len(head)) + head
                                     + to_bytes(film, 64))  # as heads before the mixed widths
    back = TileAccumulator.load(tmp_path / "t.acc", TILE.w, TILE.h)
    assert back.ranges == [(0, 4)]
    np.testing.assert_array_equal(back.film.albedo_sum, film.albedo_sum)


def test_a_missing_file_is_an_empty_tile(tmp_path):
    acc = TileAccumulator.load(tmp_path / "none.acc", 8, 8)
    assert acc.ranges == [] and acc.film is None


@pytest.mark.parametrize("ranges, first, count, expected", [
    ([(0, 4)], 4, 4, False), ([(0, 4)], 3, 1, True), ([(4, 4)], 0, 5, True), ([], 0, 1, False),
])
def test_overlap(ranges, first, count, expected):
    assert overlaps(ranges, first, count) is expected
