"""The head's tiles in memory and their group commit (scheduler/tilestore.py), on a real disk.
Reference for the sums: numpy's own addition of the same arrays (docs/design.md, invariant 2)."""

from __future__ import annotations

import numpy as np
import pytest

from lampyr.engine.film import Film
from lampyr.scheduler.accumulator import TileAccumulator, read_header
from lampyr.scheduler import file_swap
from lampyr.scheduler.file_swap import spare_of
from lampyr.scheduler.tilestore import TileStore


def film(seed: int, n: int = 2) -> Film:
    f = Film.zeros(8, 8)
    f.n[:] = n
    f.rgb_sum[:] = np.random.default_rng(seed).random((8, 8, 3))
    f.rgb_sq[:] = f.rgb_sum ** 2
    return f


def test_a_merge_reaches_the_disk_at_the_commit_and_not_before(tmp_path):
    store = TileStore()
    path = tmp_path / "tiles" / "0001" / "00000.acc"
    a, b = film(1), film(2)
    acc = store.get(path, 8, 8)
    assert acc.add(a, 0, 2)
    noise = []
    store.stage(acc, noise.append)
    assert not path.exists() and store.dirty == 1
    assert store.commit() == {}
    assert store.dirty == 0 and len(noise) == 1
    acc = store.get(path, 8, 8)
    assert acc.add(b, 2, 2)
    store.stage(acc)
    assert read_header(path)[0] == [(0, 2)]  # the file still holds the first merge alone
    assert store.commit() == {}
    on_disk = TileAccumulator.load(path, 8, 8)
    assert on_disk.ranges == [(0, 2), (2, 2)]
    np.testing.assert_array_equal(on_disk.film.rgb_sum, a.rgb_sum + b.rgb_sum)
    np.testing.assert_array_equal(on_disk.film.n, np.full((8, 8), 4.0))
    if file_swap.exchange_available():  # the second write kept the first as its spare
        assert sorted(q.name for q in path.parent.iterdir()) == ["00000.acc", "00000.acc.spare"]


def test_memory_stays_under_its_cap_but_never_drops_a_tile_not_yet_written(tmp_path):
    one = film(0).rgb_sum.nbytes  # a lower bound of a tile's size in memory
    store = TileStore(cap_bytes=1)  # smaller than any tile: only unwritten tiles stay
    paths = [tmp_path / f"{i:05d}.acc" for i in range(4)]
    for i, p in enumerate(paths):
        acc = store.get(p, 8, 8)
        acc.add(film(i), 0, 2)
        store.stage(acc)
    assert store.dirty == 4 and len(store._tiles) == 4 and store._bytes >= 4 * one
    assert store.commit() == {}
    assert len(store._tiles) == 0 and store._bytes == 0  # written: they may go, and went
    acc = store.get(paths[0], 8, 8)  # read back from its file
    assert acc.ranges == [(0, 2)] and len(store._tiles) == 1


def test_a_tile_the_disk_refuses_is_reported_and_read_again_from_its_file(tmp_path):
    store = TileStore()
    good, bad = tmp_path / "a" / "00000.acc", tmp_path / "b" / "00000.acc"
    for p in (good, bad):
        acc = store.get(p, 8, 8)
        acc.add(film(3), 0, 2)
        store.stage(acc)
    assert store.commit() == {}
    for p in (good, bad):
        acc = store.get(p, 8, 8)
        acc.add(film(4), 2, 2)
        store.stage(acc)
    bad.unlink()
    bad.parent.rmdir()
    bad.parent.write_text("the tiles' folder became a file")  # every write into it: OSError
    failed = store.commit()
    assert list(failed) == [bad] and isinstance(failed[bad], OSError)
    assert read_header(good)[0] == [(0, 2), (2, 2)]  # the other tile of the group is written
    # the refused tile left memory: its next merge starts from what its file holds
    assert bad not in store._tiles and good in store._tiles


def short_writev(calls):
    """os.writev that writes at most 1000 bytes of its first piece per call, as a kernel may."""
    import os

    real = os.writev

    def writev(fd, buffers):
        calls.append(len(buffers))
        return real(fd, [memoryview(buffers[0])[:1000]])
    return writev


@pytest.mark.parametrize("how", ["writev", "short writes", "no writev"])
def test_a_tile_file_holds_exactly_its_bytes_however_the_system_writes(tmp_path, monkeypatch,
                                                                       how):
    import os

    calls = []
    if how == "short writes":
        monkeypatch.setattr(os, "writev", short_writev(calls))
    elif how == "no writev":  # as on Windows
        monkeypatch.delattr(os, "writev")
    store = TileStore()
    path = tmp_path / "tiles" / "0001" / "00000.acc"
    acc = store.get(path, 8, 8)
    acc.add(film(1), 0, 2)
    store.stage(acc)
    assert store.commit() == {}
    assert path.read_bytes() == acc.to_bytes(read_header(path)[1])
    assert (len(calls) > 5) == (how == "short writes")


def merge_and_commit(store, path, f, first):
    acc = store.get(path, 8, 8)
    assert acc.add(f, first, 2)
    store.stage(acc)
    assert store.commit() == {}


@pytest.mark.skipif(not file_swap.exchange_available(), reason="no exchange of names here")
@pytest.mark.parametrize("how", ["memory cap", "forget", "close"])
def test_a_tile_keeps_a_spare_file_while_in_memory_and_not_after(tmp_path, how):
    store = TileStore(cap_bytes=1 if how == "memory cap" else TileStore().cap_bytes)
    path = tmp_path / "00000.acc"
    merge_and_commit(store, path, film(1), 0)
    merge_and_commit(store, path, film(2), 2)  # the second write keeps the first as its spare
    if how == "memory cap":  # over the cap: written tiles leave memory at once
        assert path not in store._tiles
    else:
        assert spare_of(path).exists()
        store.forget(path) if how == "forget" else store.close()
    assert not spare_of(path).exists()
    assert read_header(path)[0] == [(0, 2), (2, 2)]


def test_no_spare_is_kept_when_the_store_is_told_so(tmp_path):
    store = TileStore(spares=False)
    path = tmp_path / "00000.acc"
    for i in range(3):
        merge_and_commit(store, path, film(i), 2 * i)
    assert [q.name for q in tmp_path.iterdir()] == ["00000.acc"]
    assert read_header(path)[0] == [(0, 2), (2, 2), (4, 2)]


def test_a_frame_read_from_a_tile_file_is_whole_while_the_loop_writes_that_tile_twice(
        tmp_path, monkeypatch):
    """The frame writer's thread reads a tile file not in memory (`film()`); meanwhile the loop
    merges into that tile and commits it twice. The file the reader opened became the spare at
    the first commit: the second must not write over it (the reader would get a mix)."""
    import threading

    path = tmp_path / "00000.acc"
    store = TileStore()
    first = film(1)
    merge_and_commit(store, path, first, 0)
    store.forget(path)  # on disk only: `film()` reads the file
    opened, go = threading.Event(), threading.Event()

    def slow_load(p, w, h):  # reads a little, waits, reads the rest of the same open file
        with open(p, "rb") as f:
            head = f.read(64)
            opened.set()
            assert go.wait(30)
            return TileAccumulator.from_bytes(p, head + f.read())

    monkeypatch.setattr(TileAccumulator, "load", staticmethod(slow_load))
    got = {}
    reader = threading.Thread(target=lambda: got.setdefault("film", store.film(path, 8, 8)))
    reader.start()
    assert opened.wait(30)
    monkeypatch.undo()  # the loop reads the tile normally
    merge_and_commit(store, path, film(2), 2)
    merge_and_commit(store, path, film(3), 4)
    go.set()
    reader.join(30)
    np.testing.assert_array_equal(got["film"].rgb_sum, first.rgb_sum)  # the first write, whole
    assert read_header(path)[0] == [(0, 2), (2, 2), (4, 2)]


@pytest.mark.skipif(not file_swap.exchange_available(), reason="no exchange of names here")
def test_a_folder_the_system_would_not_fsync_keeps_no_spare(tmp_path, monkeypatch):
    """After a failed folder fsync a power cut may bring the old names back, the spare (the old
    file) named as the tile: it must not be written over in place, so it goes."""
    from lampyr.scheduler import tilestore

    store = TileStore()
    path = tmp_path / "00000.acc"
    merge_and_commit(store, path, film(1), 0)
    merge_and_commit(store, path, film(2), 2)
    assert spare_of(path).exists()
    monkeypatch.setattr(tilestore, "fsync_folder", lambda folder: False)
    merge_and_commit(store, path, film(3), 4)
    assert not spare_of(path).exists()
    assert read_header(path)[0] == [(0, 2), (2, 2), (4, 2)]
