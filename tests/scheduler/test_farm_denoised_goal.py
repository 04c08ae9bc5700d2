"""`lampyr refine JOB --denoised-noise E` on a real farm (a head and a worker process, real Redis):
the head measures each tile's denoised error when it writes a frame complete and denoised
(engine/dual_buffer.py, docs/denoising.md) and refines only the tiles above the goal, each in
proportion to its error."""

from __future__ import annotations

import numpy as np

from .farmtools import LAYOUT, wait_for


def test_refine_with_a_denoised_goal_adds_only_to_tiles_above_it(farm, tiny_shot, tmp_path):
    from lampyr.engine.dual_buffer import tile_errors, tile_targets
    from lampyr.engine.exr import read_frame
    from lampyr.engine.render import tiles_for
    from lampyr.frames import read_errors

    farm.start_head()
    farm.start_worker("a")
    out = tmp_path / "out"
    job = farm.submit(tiny_shot, "--out", out, "--frames", 1, *LAYOUT)
    farm.wait(job)
    path = out / "tiny.0001.exr"
    errors, spp = read_errors(path)  # what the head wrote into the frame's header
    assert spp == 8 and len(errors) == 4 and all(e is not None and e > 0 for e in errors)
    # the header's values are the estimator's, recomputed here from the file (float32 means, so
    # to a rounding the denoiser may amplify: 1 %)
    film, _ = read_frame(path)
    again = tile_errors(film, tiles_for(16, 12, 8))
    np.testing.assert_allclose(errors, again, rtol=1e-2)
    ordered = sorted(errors)
    goal = (ordered[1] + ordered[2]) / 2  # two tiles above, two below
    want = tile_targets(errors, 8, goal, 40)  # ceil(8 e / goal) above the goal, at most 40
    assert sorted(want)[:2] == [8, 8] and min(want[want > 8]) > 8
    farm.cli("refine", job, "--samples", 40, "--denoised-noise", goal, "--head", farm.url)
    wait_for(lambda: farm.status(job)["pixel_samples_total"] > 16 * 12 * 8, what="the refine")
    farm.wait(job)
    film, _ = read_frame(path)
    held = film.n + film.dropped
    for tile, t in enumerate(tiles_for(16, 12, 8)):
        block = held[t.y0:t.y0 + t.h, t.x0:t.x0 + t.w]
        assert (block == want[tile]).all(), (tile, errors, goal, want)
    # the refined frame is complete again: denoised, with its errors measured anew
    errors_after, spp_after = read_errors(path)
    assert spp_after == 8 and len(errors_after) == 4  # the lowest count of any pixel
