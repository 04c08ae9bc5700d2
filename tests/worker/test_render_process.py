"""The render process `lampyr worker` starts (worker/app.py, through Supervisor.child_command):
found wherever the worker was started, and one clear line when started without what the
supervisor gives it."""

from __future__ import annotations

import os
import subprocess

from lampyr.worker.supervisor import Supervisor


def _run(cwd):
    """The supervisor's command for its render process, run in cwd without LAMPYR_HEAD."""
    env = {k: v for k, v in os.environ.items() if k != "LAMPYR_HEAD"}
    cmd = Supervisor.child_command(None, {"cores": 1})
    return subprocess.run(cmd, cwd=cwd, env=env, capture_output=True, text=True, timeout=300)


def test_a_lampyr_folder_where_the_worker_starts_does_not_hide_the_package(tmp_path):
    """`lampyr worker` run inside a source checkout after `pip install .`: the checkout's own
    lampyr/ folder (no worker package in it) must not stand in for the installed package."""
    decoy = tmp_path / "lampyr"
    decoy.mkdir()
    (decoy / "__init__.py").write_text("raise SystemExit('the lampyr/ folder of the working directory was imported')\n")
    out = _run(tmp_path)
    assert "working directory" not in out.stderr
    # the real module ran: it stopped at the missing farm address (the supervisor always sets it)
    assert out.returncode == 2 and "LAMPYR_HEAD" in out.stderr


def test_started_by_hand_it_says_what_it_is_in_one_line(tmp_path):
    out = _run(tmp_path)
    assert out.returncode == 2
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and "run `lampyr worker`" in lines[0]
