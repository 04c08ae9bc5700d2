"""Helpers for the farm tests: reference renders, frame comparison, waiting, a queued batch."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

LAYOUT = ("--tile", 8, "--batch", 3)  # 16 × 12 px → 4 tiles; 8 spp → ranges 1, 3, 3, 1

# The heavy shot (tests/conftest.py) on the production chunking, no delay: one 32 px tile holds
# the whole 32 × 24 frame; 8192 spp in batches of 8192 after a first pass of 1/16 (docs/farm.md)
# → [0, 512) and the big batch [512, 8192). With leases of 8 s a worker renders chunks of about
# 2 s (lease / 4, worker/tasks.py), renewing its lease between them: about ten s of chunks at
# the engine's speed of December 2026 (2048 spp were enough before it became 3.5× faster, and
# then a whole batch fitted in two chunks, leaving nothing to stop it in the middle of).
HEAVY_LAYOUT = ("--tile", 32, "--batch", 8192)
HEAVY_LEASE = 8.0
BIG_FIRST, BIG_COUNT = 512, 7680


def big_chunks(log, pid=None) -> list[dict]:
    """The chunks of the heavy shot's big batch a chunk log holds (of one pool process)."""
    from ..harness import read_log

    return [c for c in read_log(log) if c["first"] >= BIG_FIRST and pid in (None, c["pid"])]


def big_batch_under_way(log):
    """Once a pool process has rendered two chunks of the big batch, the second of them a
    production one (more than one sample, so sized to the lease): its pid; else None."""
    chunks = big_chunks(log)
    for pid in {c["pid"] for c in chunks}:
        mine = [c for c in chunks if c["pid"] == pid]
        if len(mine) >= 2 and mine[1]["count"] > 1 and sum(c["count"] for c in mine) < BIG_COUNT:
            return pid
    return None


def wait_for(cond, timeout=60, what="condition"):
    give_up_at = time.monotonic() + timeout
    while not (value := cond()):
        if time.monotonic() > give_up_at:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.05)
    return value


def queue_one_batch(redis_url: str, shot_path: Path, lease_seconds: float):
    """The shot's files in Redis and one queued batch of 3 samples (frame 1, tile 0,
    samples 2–4, ticket 1), as a head leaves it; returns (redis client, its RenderTask)."""
    import redis

    from lampyr.engine.shot import load_shot
    from lampyr.scheduler import protocol as P
    from lampyr.scheduler.transfer import upload_shot

    r = redis.Redis.from_url(redis_url)
    sha, member, _ = upload_shot(r, load_shot(shot_path))
    r.hset(P.K_CONFIG, mapping={"lease_seconds": lease_seconds, "max_attempts": 2})
    batch = P.Batch("job", 1, 0, 2, 3, 0, 0, 8, 8)
    r.hset(P.K_INFLIGHT, batch.id, 1)
    return r, P.RenderTask(P.PROTOCOL_VERSION, batch, 1, sha, member, {})


def reference_mean(shot_path: Path, frame: int, samples: int | None = None) -> np.ndarray:
    """The engine-only render of one frame in this process: mean beauty (h, w, 3) float64."""
    from lampyr.engine.render import render_frame
    from lampyr.engine.shot import load_shot

    shot = load_shot(shot_path)
    if samples is not None:
        shot = shot.with_overrides(samples=samples)
    return render_frame(shot, frame, 0, shot.samples, tile_size=8).mean()


def frame_mean(out: Path, name: str, frame: int) -> np.ndarray:
    from lampyr.engine.exr import read_frame

    film, _ = read_frame(out / f"{name}.{frame:04d}.exr")
    return film.mean()


def assert_same_image(a: np.ndarray, b: np.ndarray) -> None:
    # the EXR holds float32; sums of the same samples merged in another order differ only by
    # float32 rounding (IEEE 754 single precision: 2**-24 relative per operation)
    np.testing.assert_allclose(a, b, rtol=2e-5, atol=1e-6)
