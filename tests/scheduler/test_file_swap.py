"""Replacing a file whole through a spare and an exchange of names (scheduler/file_swap.py), on a
real disk with the real system calls. The reference is the kernel's own behaviour as the
renameat2(2) manual page describes RENAME_EXCHANGE (from memory): both names must exist, and
each afterwards names the file the other named, exchanged atomically."""

from __future__ import annotations

import os
import sys

import pytest

from lampyr.scheduler import file_swap
from lampyr.scheduler.file_swap import replace, spare_of

linux = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="renameat2 is Linux's")


@linux
def test_an_exchange_swaps_the_files_the_two_names_name(tmp_path):
    a, b = tmp_path / "a", tmp_path / "b"
    a.write_bytes(b"first")
    b.write_bytes(b"second")
    ino_a, ino_b = a.stat().st_ino, b.stat().st_ino
    assert file_swap.exchange(a, b)
    assert (a.stat().st_ino, b.stat().st_ino) == (ino_b, ino_a)
    assert (a.read_bytes(), b.read_bytes()) == (b"second", b"first")


@linux
def test_an_exchange_with_a_missing_name_raises_and_changes_nothing(tmp_path):
    a = tmp_path / "a"
    a.write_bytes(b"first")
    with pytest.raises(FileNotFoundError):
        file_swap.exchange(a, tmp_path / "missing")
    assert a.read_bytes() == b"first" and not (tmp_path / "missing").exists()


@linux
def test_a_replaced_file_holds_the_new_bytes_and_its_spare_the_old(tmp_path):
    path = tmp_path / "00000.acc"
    path.write_bytes(b"old bytes")
    assert replace(path, [b"new ", b"bytes!"])
    assert path.read_bytes() == b"new bytes!"
    assert spare_of(path).read_bytes() == b"old bytes"


@pytest.mark.parametrize("spare", [b"", b"x" * 100_000, b"torn \x00\x01 half-written spare"],
                         ids=["empty", "longer", "torn"])
def test_whatever_the_spare_held_the_file_holds_exactly_the_new_bytes(tmp_path, spare):
    """A spare left longer, shorter or torn (a crash while it was written) is written over and
    cut to length: nothing of it shows in the file."""
    path = tmp_path / "00000.acc"
    path.write_bytes(b"old")
    spare_of(path).write_bytes(spare)
    new = [bytes(range(256)) * 3, b"end"]
    replace(path, new)
    assert path.read_bytes() == b"".join(new)


@pytest.mark.parametrize("case", ["first write", "no spare wanted", "no exchange here"])
def test_without_an_exchange_the_new_file_is_renamed_over_and_no_spare_stays(tmp_path,
                                                                             monkeypatch, case):
    path = tmp_path / "00000.acc"
    if case != "first write":
        path.write_bytes(b"old bytes")
    if case == "no exchange here":  # another system, or a C library without renameat2
        monkeypatch.setattr(file_swap, "_renameat2", None)
    assert not replace(path, [b"new bytes"], use_spare=case != "no spare wanted")
    assert path.read_bytes() == b"new bytes"
    assert not spare_of(path).exists()


def test_a_write_the_disk_refuses_leaves_the_file_as_it_was_and_no_spare(tmp_path):
    folder = tmp_path / "tiles"
    folder.write_text("a file where the folder should be")
    with pytest.raises(OSError):
        replace(folder / "00000.acc", [b"new"])
    assert folder.read_text() == "a file where the folder should be"


def test_a_rename_refused_after_the_spare_was_written_leaves_no_spare(tmp_path):
    path = tmp_path / "00000.acc"
    path.mkdir()
    (path / "inside").write_text("a folder, not empty, where the file should be")
    with pytest.raises(OSError):
        replace(path, [b"new bytes"], use_spare=False)
    assert not spare_of(path).exists() and (path / "inside").exists()


@linux
def test_where_the_kernel_refuses_the_exchange_the_spare_is_renamed_over(tmp_path, monkeypatch):
    """RENAME_EXCHANGE with RENAME_NOREPLACE is invalid (the renameat2(2) manual page, from
    memory: EINVAL), as a file system without the exchange answers: `replace` renames."""
    monkeypatch.setattr(file_swap, "_RENAME_EXCHANGE", file_swap._RENAME_EXCHANGE | 1)
    path = tmp_path / "00000.acc"
    path.write_bytes(b"old bytes")
    assert not file_swap.exchange(path, path)  # refused: nothing changed
    assert not replace(path, [b"new bytes"])
    assert path.read_bytes() == b"new bytes" and not spare_of(path).exists()


@pytest.mark.parametrize("existing", [True, False], ids=["exchanged", "renamed"])
def test_the_spare_is_on_disk_before_its_name_changes(tmp_path, monkeypatch, existing):
    """fsync of the spare, then the exchange or rename: a crash between them leaves the old file
    under the name, never a new one whose bytes are not on disk yet."""
    calls = []
    real_fsync, real_exchange, real_replace = os.fsync, file_swap.exchange, os.replace
    monkeypatch.setattr(os, "fsync", lambda fd: (calls.append("fsync"), real_fsync(fd))[1])
    monkeypatch.setattr(file_swap, "exchange",
                        lambda a, b: (calls.append("exchange"), real_exchange(a, b))[1])
    monkeypatch.setattr(os, "replace", lambda a, b: (calls.append("rename"), real_replace(a, b))[1])
    path = tmp_path / "00000.acc"
    if existing:
        path.write_bytes(b"old bytes")
    replace(path, [b"new bytes"])
    assert calls[0] == "fsync" and len(calls) >= 2 and calls[1] in ("exchange", "rename")
    assert path.read_bytes() == b"new bytes"


@linux
@pytest.mark.parametrize("fsync", [True, False])
def test_the_spare_is_written_in_place_not_made_again(tmp_path, fsync):
    """The point of the spare: after the first exchange no new file is made for a write, so the
    file system allocates nothing (the two inodes alternate between the two names)."""
    path = tmp_path / "00000.acc"
    path.write_bytes(b"v0")
    inodes = set()
    for i in range(1, 5):
        replace(path, [f"v{i}".encode() * 1000], fsync=fsync)
        inodes.add(os.stat(path).st_ino)
    assert len(inodes) == 2
