"""The farm in one process tree (scheduler/local_farm.py, `lampyr render`): what it opens, it
closes, whichever way the render ends."""

from __future__ import annotations

import os
import sys

import pytest


class Refused(Exception):
    pass


def open_paths() -> list[str]:
    """What this process's file descriptors point at (Linux: /proc/self/fd, proc(5)); a file
    removed since reads `PATH (deleted)`."""
    paths = []
    for fd in os.listdir("/proc/self/fd"):
        try:
            paths.append(os.readlink(f"/proc/self/fd/{fd}"))
        except OSError:  # the descriptor listdir itself used, closed by now
            pass
    return paths


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc/self/fd")
def test_the_worker_log_is_closed_when_the_render_ends_early(monkeypatch, tiny_shot, tmp_path):
    """The submit fails once the head and the local worker run: the render ends with that
    error, and this process holds worker.log open no longer (the exception's traceback keeps the
    function's frame, and so its local variables, alive while it is looked at)."""
    from lampyr.engine.shot import load_shot
    from lampyr.scheduler import local_farm, submit

    def refuse(*args, **kwargs):
        raise Refused("the test's submit")

    monkeypatch.setattr(submit, "submit_request", refuse)
    with pytest.raises(Refused) as err:  # err keeps the traceback, and so the frame
        local_farm.render_on_farm(tiny_shot, load_shot(tiny_shot), tmp_path / "out", 1, 16, {})
    assert err.value.args == ("the test's submit",)
    assert [p for p in open_paths() if "worker.log" in p] == []
