"""The head's own decisions, driven in this process against a real Redis (no workers)."""

from __future__ import annotations

import base64
import json

import pytest

from lampyr.scheduler import protocol as P
from lampyr.scheduler.head import Head, submit_request


def queued_batches(r) -> list[P.Batch]:
    """The batches of the Celery messages waiting in the queue, oldest first."""
    out = []
    for raw in reversed(r.lrange(P.QUEUE, 0, -1)):  # kombu pushes on the left
        body = json.loads(base64.b64decode(json.loads(raw)["body"]))
        out.append(P.RenderTask.from_json(body[0][0]).batch)
    return out


@pytest.fixture
def head(redis_url, tmp_path):
    h = Head(tmp_path / "state", redis_url, lease_seconds=5)
    h.start()
    return h


def submit(head, shot, priority=0, **overrides):
    job = submit_request(head.r, shot, overrides, None, priority, tile_size=8, batch_samples=3)
    head.take_commands()
    return job


def test_a_higher_priority_job_is_queued_first(head, tiny_shot):
    low = submit(head, tiny_shot, priority=0)
    high = submit(head, tiny_shot, priority=5)
    head.dispatch()  # no workers: two messages ahead
    assert [b.job for b in queued_batches(head.r)] == [high, high]
    assert low != high


def test_every_frame_gets_its_first_pass_before_more_samples(head, tiny_shot):
    head.r.set(P.k_host("big"), json.dumps({"name": "big", "cores": 64}))
    submit(head, tiny_shot)
    head.dispatch()
    order = [(b.first, b.count, b.frame) for b in queued_batches(head.r)]
    first_pass = [o for o in order if o[:2] == (0, 1)]
    assert len(first_pass) == 2 * 4  # 2 frames × 4 tiles
    assert order[:len(first_pass)] == first_pass


def test_a_restarted_head_queues_only_what_its_disk_lacks(head, tiny_shot, redis_url, tmp_path):
    from lampyr.engine.render import FrameRenderer, Tile
    from lampyr.engine.shot import load_shot
    from lampyr.scheduler.accumulator import TileAccumulator
    from lampyr.scheduler.jobs import JobFolder

    job = submit(head, tiny_shot)
    total = len(head.jobs[job].pending)
    # docs/farm.md, "What happens to a job": 2 frames × 4 tiles of 8 px × ranges [0, 1), [1, 4),
    # [4, 7), [7, 8) (a first pass of 1/16 of 8 spp, at least 1, then batches of 3)
    assert total == 2 * 4 * 4
    # tile 0 of frame 1 holds its first pass on disk, as if merged before a crash
    acc = TileAccumulator(JobFolder(tmp_path / "state", job).tile(1, 0), 8, 8)
    acc.add(FrameRenderer(load_shot(tiny_shot), 1).render(Tile(0, 0, 8, 8), 0, 1), 0, 1)
    acc.save()
    again = Head(tmp_path / "state", redis_url, lease_seconds=5)
    again.start()
    pending = {b.id for b in again.jobs[job].pending}
    assert len(pending) == total - 1 and f"{job}/1/0/0/1" not in pending


def test_without_a_layout_the_head_measures_one(head, tiny_shot):
    from lampyr.scheduler.planner import TILE_SIZES

    job = submit_request(head.r, tiny_shot, {}, None)
    head.take_commands()
    rec = head.jobs[job].rec
    assert rec.tile_size in TILE_SIZES and 1 <= rec.batch_samples <= 8
    # a 16 × 12 shot renders in well under 10 s per tile: the whole range goes in few batches
    assert rec.ranges[-1][0] + rec.ranges[-1][1] == 8


HEAD_START_ALONE = """
import sys
from lampyr.engine.film_noise import mean_rel_noise
from lampyr.scheduler.head import Head

before = len(mean_rel_noise.signatures)
Head(sys.argv[1], sys.argv[2], lease_seconds=5).start()
print(before, len(mean_rel_noise.signatures))
"""


def test_a_heads_start_loads_the_tile_noise_kernel_before_its_first_commit(redis_url, tmp_path):
    # in a process of its own, as a head runs: numba's first call in a process sets up its
    # compiler (seconds), which the first group commit would otherwise pay inside the loop
    import subprocess
    import sys

    done = subprocess.run([sys.executable, "-c", HEAD_START_ALONE, str(tmp_path / "state"),
                           redis_url], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    assert done.stdout.split() == ["0", "1"]


def test_a_starting_head_removes_the_spare_files_a_killed_head_left(head, tiny_shot, redis_url,
                                                                     tmp_path):
    """The group commit keeps a spare beside each tile in memory (scheduler/file_swap.py); a
    head killed outright leaves them. They are never read: the next start removes them and
    leaves the tile files alone."""
    from lampyr.scheduler.accumulator import TileAccumulator
    from lampyr.scheduler.jobs import JobFolder

    job = submit(head, tiny_shot)
    folder = JobFolder(tmp_path / "state", job)
    tile = folder.tile(1, 0)
    acc = TileAccumulator(tile, 8, 8)
    acc.add(_film(), 0, 1)
    acc.save()
    left = [folder.tile(f, 0).with_name("00000.acc.spare") for f in (1, 2)]
    for spare in left:
        spare.parent.mkdir(parents=True, exist_ok=True)
        spare.write_bytes(b"the old bytes of a tile, or half of them")
    before = tile.read_bytes()
    again = Head(tmp_path / "state", redis_url, lease_seconds=5)
    again.start()
    assert not any(spare.exists() for spare in left)
    assert tile.read_bytes() == before and job in again.jobs


def _film():
    import numpy as np

    from lampyr.engine.film import Film

    f = Film.zeros(8, 8)
    f.n[:] = 1
    f.rgb_sum[:] = np.random.default_rng(5).random((8, 8, 3))
    f.rgb_sq[:] = f.rgb_sum ** 2
    return f
