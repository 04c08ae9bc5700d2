"""Planning: frames × tiles × sample batches, in the order the head dispatches them.

The plan is progressive: every tile of every frame first gets a low sample count (the first
pass), so a complete, watchable sequence exists early; then the remaining samples follow in
batches of `batch_samples`, pass after pass. Tile size and batch size come from a probe render
measuring this shot's cost per sample per pixel, so that one batch takes roughly
`target_seconds` on a worker like the head's machine.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

from .protocol import Batch

TILE_SIZES = (16, 32, 48, 64, 96, 128, 192, 256)
TARGET_SECONDS = 20.0  # one batch: inside the 10–60 s band, the middle of it in log scale
FIRST_PASS_FRACTION = 1 / 16  # rule of thumb: a noisy but watchable preview pass


@dataclass(frozen=True)
class Layout:
    """How a job's frames are cut: tile edge in pixels and samples per batch."""

    tile_size: int
    batch_samples: int


def sample_ranges(start: int, target: int, batch: int, first_pass: int | None = None) -> list:
    """Ranges (first, count) covering samples [start, target): a first pass of `first_pass`
    samples (when given and start == 0), then batches of `batch`."""
    out = []
    s = start
    if first_pass and s == 0 and first_pass < target:
        out.append((0, first_pass))
        s = first_pass
    while s < target:
        c = min(batch, target - s)
        out.append((s, c))
        s += c
    return out


def first_pass_samples(samples: int, batch: int) -> int:
    return max(1, min(batch, int(samples * FIRST_PASS_FRACTION)))


def plan_batches(job: str, frames, tiles, ranges) -> list[Batch]:
    """Every batch of a job in dispatch order: range by range, then frame, then tile.

    tiles: the `engine.render.Tile` list of the image; ranges: [(first, count), ...].
    """
    return [
        Batch(job, int(f), i, int(first), int(count), t.x0, t.y0, t.w, t.h)
        for first, count in ranges
        for f in frames
        for i, t in enumerate(tiles)
    ]


def choose_layout(width: int, height: int, samples: int, seconds_per_sample_pixel: float,
                  target: float = TARGET_SECONDS) -> Layout:
    """Tile and batch sizes so that one batch takes about `target` seconds.

    Prefer tiles big enough that a batch of a few samples already reaches the target, but small
    enough that a frame still has a few tiles per worker to share out.
    """
    cost = max(seconds_per_sample_pixel, 1e-12)
    longest = max(width, height)
    chosen = TILE_SIZES[0]
    for size in TILE_SIZES:
        if size > longest:
            break
        chosen = size
        # stop growing once a 4-sample batch fills the target: more pixels only coarsen sharing
        if size * size * 4 * cost >= target:
            break
    pixels = min(chosen, width) * min(chosen, height)
    batch = int(round(target / (pixels * cost)))
    return Layout(chosen, max(1, min(samples, batch)))


def probe_cost(shot, frame: int | None = None, size: int = 16, samples: int = 2) -> float:
    """Seconds per sample per pixel of `shot`, from a render of its central size × size tile
    (the kernels are warmed on a one-sample render first, so compile time is not counted)."""
    from ..engine.render import FrameRenderer, Tile

    frame = shot.first_frame if frame is None else frame
    w, h = min(size, shot.width), min(size, shot.height)
    tile = Tile((shot.width - w) // 2, (shot.height - h) // 2, w, h)
    renderer = FrameRenderer(shot, frame)
    renderer.render(tile, 0, 1)
    start = time.perf_counter()
    renderer.render(tile, 1, samples)
    return (time.perf_counter() - start) / (w * h * samples)
