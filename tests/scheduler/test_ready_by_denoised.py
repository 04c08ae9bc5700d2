"""The ready-by plan aims at the denoised error once every tile of a job has one
(scheduler/ready_by_keeper.py, `tile_states`; docs/denoising.md), and at the raw noise before.

The keeper reads a job run's tables; here a stand-in run holds them (two frames of two tiles), so
the choice is checked on its own, with no farm."""

from __future__ import annotations

from types import SimpleNamespace

from lampyr.engine.render import Tile
from lampyr.scheduler.ready_by import plan_night
from lampyr.scheduler.ready_by_keeper import ReadyByKeeper


def _run(denoised: dict):
    tiles = [Tile(0, 0, 8, 8), Tile(8, 0, 8, 8)]
    frames = [1, 2]
    return SimpleNamespace(
        rec=SimpleNamespace(ranges=[(0, 8), (8, 8), (16, 8), (24, 8)], extra={}),
        frames=frames, tiles=tiles,
        held={(f, i): [(0, 8)] for f in frames for i in range(2)},
        noise={(f, i): 0.2 for f in frames for i in range(2)},  # raw noise: all alike
        denoised_error=lambda f, i: denoised.get((f, i)),
    )


def test_the_denoised_errors_rank_the_tiles_when_every_tile_has_one():
    errors = {(1, 0): (0.01, 8), (1, 1): (0.08, 8), (2, 0): (0.02, 8), (2, 1): (0.01, 8)}
    keeper = ReadyByKeeper({}, None, None)
    states = keeper.tile_states(_run(errors), {})
    assert {s.key: (s.noise, s.noise_at) for s in states} == errors
    # the night's spare samples go to the tile with the highest denoised error: capacity for the
    # uniform step to 16 spp (4 tiles x 64 px x 8) and one more batch
    plan = plan_night(states, 4 * 64 * 8 + 64 * 8)
    assert plan.targets[(1, 1)] == 24 and all(plan.targets[k] == 16 for k in errors if k != (1, 1))


def test_the_raw_noise_ranks_the_tiles_while_one_lacks_a_denoised_error():
    errors = {(1, 0): (0.01, 8), (1, 1): (0.08, 8), (2, 0): (0.02, 8)}  # frame 2, tile 1: none
    states = ReadyByKeeper({}, None, None).tile_states(_run(errors), {})
    assert all(s.noise == 0.2 and s.noise_at == 8 for s in states)
