"""Files written whole through a temporary file (scheduler/accumulator.py write_atomic,
scheduler/redis_server.py write_private) get the mode asked for even when a temporary file of
an earlier run was left behind: os.open's mode applies to a file it creates, not to one that is
already there (POSIX open(2), O_CREAT)."""

from __future__ import annotations

import os

import pytest

from lampyr.scheduler.accumulator import write_atomic
from lampyr.scheduler.redis_server import write_private

pytestmark = pytest.mark.skipif(os.name != "posix", reason="POSIX file modes")


def test_write_atomic_gives_the_mode_asked_for_over_a_stale_temp_file(tmp_path):
    path = tmp_path / "head.json"
    stale = tmp_path / "head.json.tmp"  # left by a run killed between open and rename
    stale.write_text("old")
    stale.chmod(0o644)
    write_atomic(path, b'{"address": "redis://head:pw@127.0.0.1:1/0"}', mode=0o600)
    assert path.stat().st_mode & 0o777 == 0o600
    assert path.read_bytes().startswith(b'{"address"') and not stale.exists()


def test_write_private_is_0600_over_a_stale_temp_file(tmp_path):
    path = tmp_path / "redis.conf"
    stale = tmp_path / f".redis.conf.{os.getpid()}.tmp"  # an earlier process with this pid
    stale.write_text("old")
    stale.chmod(0o644)
    write_private(path, "user head on #abc\n")
    assert path.stat().st_mode & 0o777 == 0o600
    assert path.read_text() == "user head on #abc\n"
