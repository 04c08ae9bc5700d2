"""`lampyr render` when a job fails on its local farm for a reason the submitting side did not
see: one line (RenderFailed, exit status 1), never a traceback or a hang. Real parts: the
embedded Redis, the head thread and a real `lampyr worker` process."""

from __future__ import annotations

import signal
from pathlib import Path

import pytest

from lampyr.engine.shot import load_shot
from lampyr.errors import RenderFailed
from lampyr.scheduler.local_farm import first_line, render_on_farm

SHOT = """name = "broken"
frames = 1
[image]
width = 8
height = 6
[sampling]
samples = 2
[camera]
position = [0.0, 1.0, 4.0]
target = [0.0, 0.8, 0.0]
[[object]]
name = "pot"
mesh = "pot.obj"
"""


class Hang(Exception):
    pass


def test_a_batch_that_fails_on_the_worker_ends_the_render_with_its_one_line(tmp_path, compiled_kernels):
    shot_path = tmp_path / "broken.toml"
    shot_path.write_text(SHOT)
    (tmp_path / "pot.obj").write_text("v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n")
    spec = load_shot(shot_path)  # read while the file was good, as a submitter would ...
    (tmp_path / "pot.obj").write_text("v 0 0 0\nv 1 0 0\nv 2 0 0\nf 1 2 3\n")  # ... then broken

    def ring(signum, frame):
        raise Hang("lampyr render did not end within 300 s")

    old = signal.signal(signal.SIGALRM, ring)
    signal.alarm(300)
    try:
        with pytest.raises(RenderFailed) as info:
            render_on_farm(shot_path, spec, tmp_path / "out", 1, 8, {})
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, old)
    text = str(info.value)
    assert "\n" not in text and "Traceback" not in text, text
    assert "object[pot].mesh" in text and "degenerate" in text, text
    assert info.value.exit_code == 1


def test_the_first_line_drops_lampyr_s_exception_class_only():
    assert first_line("lampyr.errors.AssetError: object[m].mesh: bad\nmore") == "object[m].mesh: bad"
    assert first_line("ValueError: x") == "ValueError: x"
    assert first_line("") == "?"


def test_lampyr_render_of_an_empty_shot_writes_its_frame(tmp_path, compiled_kernels):
    import subprocess
    import sys

    import numpy as np
    import OpenEXR

    shot = tmp_path / "nothing.toml"
    shot.write_text(SHOT.split("[[object]]")[0] + "[environment]\ncolor = [0.2, 0.25, 0.3]\n")
    res = subprocess.run([sys.executable, "-m", "lampyr.cli", "render", str(shot), "--out", str(tmp_path / "out"),
                          "--quiet", "--workers", "1", "--no-denoise"], capture_output=True, text=True, timeout=600)
    assert res.returncode == 0, res.stderr
    with OpenEXR.File(str(tmp_path / "out" / "broken.0001.exr"), separate_channels=True) as f:
        ch = f.channels()
        rgb = np.stack([np.array(ch[c].pixels) for c in "RGB"], -1)
    # every camera ray sees the constant environment (docs/shot-file.md, "Units"); the frame file
    # keeps it as HALF or FLOAT, so compare to its float16 rounding at most
    assert np.allclose(rgb, [0.2, 0.25, 0.3], rtol=1e-3, atol=0)
