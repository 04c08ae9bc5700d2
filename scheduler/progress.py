"""Per-frame and per-tile progress of jobs: the compact summary the head publishes, and its readers.

The head keeps, for every tile of every frame, the samples it holds and the relative noise of its
film; the noise is computed when a batch is merged, from the film already in memory (and once at
start-up, when the accumulators are read anyway), never by rereading accumulators to publish.
`ProgressPublisher.publish` writes only the frames that changed since its last turn:

    layout:<job>    string  {"width", "height", "fps", "frames": [f, ...],
                             "tiles": [[x0, y0, w, h], ...]}
    progress:<job>  hash    frame → {"frame", "state", "held", "target", "noise"}
    tiles:<job>     hash    frame → [[held, target, noise, state], ...] (one row per tile)

A tile's `state` is one of TILE_STATES: `failed` when one of its batches failed, `done` when it
holds its target, `rendering` while a worker holds a lease on one of its batches, else `waiting`.
`noise` is the mean over the tile's pixels of the relative standard error of the luminance
(`Film.rel_noise`, the measure `refine --noise` compares with); None while unknown (a pixel with
fewer than 2 samples). A frame's `held` is its lowest tile's, its `target` its highest tile's,
its `noise` the pixel-weighted mean of its tiles' (None while any is unknown).
"""

from __future__ import annotations

import json
import weakref

from . import protocol as P
from .accumulator import samples_held, tile_noise  # noqa: F401  (tile_noise: read here too)

TILE_STATES = ("waiting", "rendering", "done", "failed")


def frame_summary(run, frame: int, rendering: set, failed: set) -> dict:
    """The published summary of one frame of a `JobRun`.

    rendering, failed: tile indices of this frame with a leased / a failed batch.
    """
    tiles, area, weighted, known = [], 0, 0.0, True
    for i, t in enumerate(run.tiles):
        held = samples_held(run.held[(frame, i)])
        target = run.tile_target(frame, i)
        noise = run.noise.get((frame, i))
        if i in failed:
            state = "failed"
        elif held >= target:
            state = "done"
        elif i in rendering:
            state = "rendering"
        else:
            state = "waiting"
        tiles.append([held, target, noise, state])
        if noise is None:
            known = False
        else:
            weighted += noise * t.w * t.h
        area += t.w * t.h
    states = {row[3] for row in tiles}
    if states == {"done"}:
        state = "done"
    else:  # any failed tile marks the frame; else any tile being rendered; else it waits
        state = next(s for s in ("failed", "rendering", "waiting") if s in states or s == "waiting")
    return {"frame": frame, "state": state, "held": min(row[0] for row in tiles),
            "target": max(row[1] for row in tiles),
            "noise": round(weighted / area, 6) if known and area else None, "tiles": tiles}


class ProgressPublisher:
    """Head side: writes `layout:<job>` once per job and `progress:<job>` for changed frames.

    A frame is republished when a batch of it was merged (`JobRun.dirty`), when the set of its
    leased or failed tiles changed, or after `publish(force=True)` (Redis lost its data)."""

    def __init__(self):
        self._seen = weakref.WeakKeyDictionary()  # JobRun → (leased set, failed set)

    def publish(self, runs: dict, leased: dict, pipe, force: bool = False) -> None:
        """runs: job id → JobRun; leased: job id → {(frame, tile)} a worker holds a lease on
        (`Dispatcher.leased_tiles`)."""
        for run in runs.values():
            now_leased = leased.get(run.rec.id, set())
            now_failed = {P.parse_batch_id(bid)[1:3] for bid in run.rec.failed}
            seen = self._seen.get(run)
            if seen is None or force:
                pipe.set(P.k_layout(run.rec.id), json.dumps(layout(run)))
                dirty = set(run.frames)
            else:
                dirty = set(run.dirty)
                dirty |= {f for f, _ in seen[0] ^ now_leased}
                dirty |= {f for f, _ in seen[1] ^ now_failed}
            run.dirty.clear()
            self._seen[run] = (now_leased, now_failed)
            if not dirty:
                continue
            frames, rows = {}, {}
            for f in sorted(dirty):
                rendering = {i for g, i in now_leased if g == f}
                failed = {i for g, i in now_failed if g == f}
                d = frame_summary(run, f, rendering, failed)
                rows[str(f)] = json.dumps(d.pop("tiles"), separators=(",", ":"))
                frames[str(f)] = json.dumps(d, separators=(",", ":"))
            # the strip reads every frame's summary often; tile rows only for the frame shown
            pipe.hset(P.k_progress(run.rec.id), mapping=frames)
            pipe.hset(P.k_tiles(run.rec.id), mapping=rows)


def layout(run) -> dict:
    return {"width": run.shot.width, "height": run.shot.height, "fps": run.shot.fps,
            "frames": list(run.frames),
            "tiles": [[t.x0, t.y0, t.w, t.h] for t in run.tiles]}


# -- readers (the web page, the command line) ----------------------------------------------------

def job_layout(r, job: str) -> dict | None:
    raw = r.get(P.k_layout(job))
    return None if raw is None else json.loads(raw)


def _by_frame(raws) -> list[dict]:
    return sorted((json.loads(raw) for raw in raws), key=lambda d: d["frame"])


def job_frames(r, job: str) -> list[dict]:
    """Every published frame summary of a job, by frame number, without the tile lists."""
    return _by_frame(r.hvals(P.k_progress(job)))


STATE_LETTERS = {"waiting": "w", "rendering": "r", "done": "d", "failed": "f"}


def frame_states(r, jobs) -> dict[str, str]:
    """job → one letter per published frame, in frame order (w, r, d, f: the first letter of
    its TILE_STATES word), for several jobs in one round trip."""
    jobs = list(jobs)
    pipe = r.pipeline(transaction=False)
    for job in jobs:
        pipe.hvals(P.k_progress(job))
    return {job: "".join(STATE_LETTERS.get(d["state"], "w") for d in _by_frame(raws))
            for job, raws in zip(jobs, pipe.execute())}


def frame_tiles(r, job: str, frame: int) -> dict | None:
    """One frame's summary with its tiles as dicts {"tile", "x", "y", "w", "h", "held",
    "target", "noise", "state"}; None when the job or frame has none published."""
    pipe = r.pipeline(transaction=False)
    pipe.hget(P.k_progress(job), str(int(frame)))
    pipe.hget(P.k_tiles(job), str(int(frame)))
    pipe.get(P.k_layout(job))
    raw, rows, lay = pipe.execute()
    if raw is None or rows is None or lay is None:
        return None
    d, lay = json.loads(raw), json.loads(lay)
    d["tiles"] = [{"tile": i, "x": x, "y": y, "w": w, "h": h, "held": held, "target": target,
                   "noise": noise, "state": state}
                  for i, ((x, y, w, h), (held, target, noise, state))
                  in enumerate(zip(lay["tiles"], json.loads(rows)))]
    return d


def frame_file(r, job: str, frame: int, ext: str = "exr", st: dict | None = None,
               lay: dict | None = None):
    """The path of a job's frame file (`exr` or `png`) when it exists inside the job's frames
    folder; None otherwise (unknown job or frame, not written yet, or a name that would leave
    the folder). st, lay: the job's status and layout when the caller has read them."""
    from pathlib import Path

    from ..frames import frame_path
    from .store import job_status

    if ext not in ("exr", "png"):
        return None
    st = job_status(r, job) if st is None else st
    lay = job_layout(r, job) if lay is None else lay
    if st is None or lay is None or not st.get("out") or int(frame) not in lay["frames"]:
        return None
    folder = Path(st["out"]).resolve()
    path = frame_path(folder, st["name"], int(frame), ext).resolve()
    if path.parent != folder or not path.is_file():
        return None
    return path
