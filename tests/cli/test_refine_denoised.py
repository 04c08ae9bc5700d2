"""`lampyr refine --denoised-noise E` as a person runs it: the real console command in a
subprocess, on a frame file (docs/denoising.md, "A noise goal for the denoised frame")."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from ..conftest import TINY_SHOT


def lampyr(*args) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "lampyr.cli", *map(str, args)],
                          capture_output=True, text=True, timeout=600)


@pytest.mark.parametrize("value", ["abc", "0", "-0.5", "nan", "inf", ""])
def test_a_bad_goal_is_one_line_and_exit_status_2(tmp_path, value):
    res = lampyr("refine", tmp_path / "x.0001.exr", "--shot", tmp_path / "x.toml", "--samples", 16,
                 "--denoised-noise", value)
    assert res.returncode == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "--denoised-noise" in lines[0] and "above 0" in lines[0], res.stderr
    assert "Traceback" not in res.stderr


def test_both_goals_at_once_are_refused_in_one_line(tmp_path):
    res = lampyr("refine", tmp_path / "x.0001.exr", "--shot", tmp_path / "x.toml", "--samples", 16,
                 "--noise", "0.1", "--denoised-noise", "0.1")
    assert res.returncode == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "--noise" in lines[0] and "--denoised-noise" in lines[0]


def test_tiles_above_the_goal_get_samples_in_proportion_to_their_error(tmp_path, compiled_kernels):
    from lampyr.engine.dual_buffer import tile_errors
    from lampyr.engine.exr import read_frame
    from lampyr.engine.render import render_frame, tiles_for
    from lampyr.engine.shot import parse_shot_text
    from lampyr.frames import write_frame_files

    shot_path = tmp_path / "tiny.toml"
    shot_path.write_text(TINY_SHOT)
    shot = parse_shot_text(TINY_SHOT)
    path = write_frame_files(tmp_path / "out", shot, 1, render_frame(shot, 1), 1.0, final=True)
    film, _ = read_frame(path)
    tiles = tiles_for(shot.width, shot.height, 8)
    errors = tile_errors(film, tiles)  # what refine measures, from the same file
    goal = float(np.median(errors))
    # held 8 spp: a tile at error e > goal is to reach ceil(8 e / goal), at most --samples 40
    want = [8 if e <= goal else min(40, int(np.ceil(8 * e / goal - 1e-9))) for e in errors]
    assert 8 in want and any(n > 8 for n in want)
    res = lampyr("refine", path, "--shot", shot_path, "--samples", 40, "--tile", 8,
                 "--denoised-noise", goal)
    assert res.returncode == 0, res.stderr
    assert f"refined {sum(n > 8 for n in want)} of {len(tiles)} tile(s)" in res.stdout
    after, _ = read_frame(path)
    for t, n in zip(tiles, want):
        block = (slice(t.y0, t.y0 + t.h), slice(t.x0, t.x0 + t.w))
        assert np.all(after.n[block] + after.dropped[block] == n), (errors, goal, want)
    # the halves still split the samples: floor(n / 2) of the indices [0, n) are odd
    if not after.dropped.any():
        assert np.array_equal(after.odd_n, np.floor(after.n / 2))
