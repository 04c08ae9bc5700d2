"""Temporary folders of killed processes are swept at the next start of the same kind
(lampyr/scratch.py): real processes, really killed with SIGKILL."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

from lampyr.scratch import OWNER, owner_alive, scratch_folder, sweep

MAKE = ("import sys, time; from lampyr.scratch import scratch_folder; "
        "print(scratch_folder(sys.argv[1], sys.argv[2]), flush=True); time.sleep(600)")


def _holder(prefix: str, base: Path) -> tuple[subprocess.Popen, Path]:
    """A real process that makes a scratch folder and keeps running."""
    proc = subprocess.Popen([sys.executable, "-c", MAKE, prefix, str(base)], stdout=subprocess.PIPE,
                            text=True)
    return proc, Path(proc.stdout.readline().strip())


def test_a_killed_owner_s_folder_is_swept_and_a_live_one_kept(tmp_path):
    dead, dead_folder = _holder("lampyr-render-", tmp_path)
    live, live_folder = _holder("lampyr-render-", tmp_path)
    try:
        (dead_folder / "redis").mkdir()  # contents go too
        os.kill(dead.pid, signal.SIGKILL)
        dead.wait(10)
        assert not owner_alive(dead_folder) and owner_alive(live_folder)
        mine = scratch_folder("lampyr-render-", tmp_path)  # the next start of the same kind
        assert not dead_folder.exists()
        assert live_folder.exists() and mine.exists()
        assert (mine / OWNER).read_text().split()[0] == str(os.getpid())
    finally:
        live.kill()
        live.wait(10)


def test_only_the_same_kind_and_only_folders_with_an_owner_record_are_swept(tmp_path):
    proc, gate_folder = _holder("lampyr-gate-", tmp_path)
    proc.kill()
    proc.wait(10)
    unowned = tmp_path / "lampyr-render-old"  # made before owner records existed: left alone
    unowned.mkdir()
    assert sweep("lampyr-render-", tmp_path) == []
    assert gate_folder.exists() and unowned.exists()
    assert sweep("lampyr-gate-", tmp_path) == [gate_folder]
    assert not gate_folder.exists() and unowned.exists()


def test_a_recycled_pid_is_not_taken_for_the_owner(tmp_path):
    # a record naming this (live) pid but another start time: the owner is gone, the pid reused
    folder = tmp_path / "lampyr-render-x"
    folder.mkdir()
    (folder / OWNER).write_text(f"{os.getpid()} {time.time() - 86400:.3f}\n")
    assert not owner_alive(folder)
    assert sweep("lampyr-render-", tmp_path) == [folder]
