"""The JSON the page reads (polled every couple of seconds), from the scheduler's state API only.

    GET /api/farm                       overview: jobs, workers online and offline, throughput
    GET /api/jobs/<job>                 one job: status, layout, every frame's summary (with
                                        `exr`: its frame file's mtime, or null before it is written)
    GET /api/jobs/<job>/frames/<frame>  one frame: summary, its tiles, failed batches, files,
                                        the layers its frame file holds
    GET /api/jobs/<job>/frames/<frame>/tiles/<tile>   one tile and its failed batches

`/api/farm` is what every open overview polls: it is built at most once a second and shared by
all clients (the farm's state changes at the head's publish rate, 4 per second, anyway).
"""

from __future__ import annotations

import json
import re
import threading
import time

from flask import Blueprint, abort, current_app, jsonify, request

from ..scheduler import history, progress
from ..scheduler import protocol as P
from ..scheduler import store

bp = Blueprint("api", __name__)
JOB_ID = re.compile(r"[A-Za-z0-9_-]{1,64}")
FARM_CACHE_SECONDS = 1.0
OVERVIEW_HOURS = 6.0


def redis():
    return current_app.extensions["lampyr.redis"]


def job_or_404(job: str) -> dict:
    """The job's status, or a 404 for an id that is malformed or not on this farm."""
    st = store.job_status(redis(), job) if JOB_ID.fullmatch(job) else None
    if st is None:
        abort(404, description=f"no job {job!r} on this farm")
    return st


def layout_or_404(job: str) -> dict:
    lay = progress.job_layout(redis(), job)
    if lay is None:
        abort(404, description=f"job {job!r} has no frames planned yet")
    return lay


def frame_or_404(job: str, frame: int) -> dict:
    lay = layout_or_404(job)
    if frame not in lay["frames"]:
        abort(404, description=f"job {job!r} has no frame {frame} "
                               f"(frames {lay['frames'][0]}–{lay['frames'][-1]})")
    return lay


def _slot_view(slot: dict) -> dict:
    out = dict(slot)
    try:
        job, frame, tile, first, count = P.parse_batch_id(slot["batch"])
        out.update(job=job, frame=frame, tile=tile, first=first, count=count)
    except (KeyError, ValueError):
        pass
    return out


def _worker_view(w: dict) -> dict:
    slots = [_slot_view(s) for s in w.get("slots", [])]
    return {**w, "slots": slots,
            "pixel_samples_per_second": round(sum(s.get("pixel_samples_per_second", 0)
                                                  for s in slots), 1)}


def _job_row(st: dict) -> dict:
    row = {k: v for k, v in st.items() if k != "failed"}
    row["failed_batches"] = len(st.get("failed") or [])
    total = st.get("pixel_samples_total") or 0
    row["progress"] = round(st.get("pixel_samples_done", 0) / total, 4) if total else 0.0
    return row


FOLD_AFTER = 24 * 3600.0  # a finished shot submitted longer ago is folded away


def _folds(st: dict, now: float) -> bool:
    return st.get("state") in ("done", "cancelled") and now - st.get("submitted", now) > FOLD_AFTER


def farm_overview(r, everything: bool = False) -> dict:
    """The overview's JSON (fields in docs/farm.md, "The web page"). Finished shots older than
    FOLD_AFTER are only counted in `folded` unless `everything`: the overview every page polls
    stays the size of the farm's current work, not of its whole past."""
    now = time.time()
    jobs, folded = [], {"shots": 0, "done": 0, "frames": 0}
    for st in store.list_jobs(r):
        if not everything and _folds(st, now):
            folded["shots"] += 1
            if st.get("state") == "done":
                folded["done"] += 1
                folded["frames"] += st.get("frames", 0)
            continue
        jobs.append(_job_row(st))
    letters = progress.frame_states(r, [row["job"] for row in jobs])
    for row in jobs:
        row["frame_states"] = letters[row["job"]]
    jobs.sort(key=lambda j: (j["state"] in ("done", "cancelled"), -j.get("submitted", 0)))
    crew = history.roster(r)
    return {
        "now": now,
        "jobs": jobs,
        "folded": folded,
        "workers": [_worker_view(w) for w in crew["online"]],
        "offline": crew["offline"],
        "throughput": history.throughput(r, OVERVIEW_HOURS, now),
    }


class SharedSnapshot:
    """One answer built at most every `seconds`, shared by every request in that time. While
    one request rebuilds it, the others are given the previous one instead of waiting."""

    def __init__(self, seconds: float):
        self.seconds = seconds
        self.lock = threading.Lock()
        self.building = False
        self.at = -1e9
        self.value = None

    def get(self, build):
        with self.lock:
            fresh = time.monotonic() - self.at <= self.seconds
            if fresh or (self.building and self.value is not None):
                return self.value
            self.building = True
        try:
            value = build()
        finally:
            with self.lock:
                self.building = False
        with self.lock:
            self.value, self.at = value, time.monotonic()
        return value


def _json_bytes(data) -> bytes:
    return json.dumps(data, separators=(",", ":")).encode()


@bp.route("/api/farm")
def farm():
    everything = request.args.get("all") == "1"
    snap = current_app.extensions["lampyr.overview.all" if everything else "lampyr.overview"]
    r = redis()
    body = snap.get(lambda: _json_bytes(farm_overview(r, everything)))
    return current_app.response_class(body, mimetype="application/json")


@bp.route("/api/jobs/<job>")
def job(job):
    """Polled by every open job page: the failed batches are counted here (`failed_batches`);
    their errors come with the frame they belong to."""
    st = job_or_404(job)
    lay = progress.job_layout(redis(), job)
    frames = progress.job_frames(redis(), job)
    mtimes = _exr_mtimes(st, [f["frame"] for f in frames])
    for f in frames:
        f["exr"] = mtimes.get(f["frame"])
    return jsonify(job=_job_row(st), layout=lay, frames=frames)


def _exr_mtimes(st: dict, frames: list[int]) -> dict[int, float]:
    """frame → its EXR's mtime, for the frames whose file exists in the job's frames folder (the
    thumbnails' and playback's version)."""
    from pathlib import Path

    from ..frames import frame_path

    if not st.get("out"):
        return {}
    folder = Path(st["out"]).resolve()
    out = {}
    for f in frames:
        path = frame_path(folder, st["name"], int(f))
        if path.parent.resolve() != folder:  # a name that would leave the folder
            continue
        try:
            out[f] = path.stat().st_mtime
        except OSError:
            pass
    return out


@bp.route("/api/jobs/<job>/frames/<int:frame>")
def frame(job, frame):
    st = job_or_404(job)
    lay = frame_or_404(job, frame)
    d = progress.frame_tiles(redis(), job, frame)
    if d is None:
        abort(404, description=f"frame {frame} of {job!r} has no progress yet")
    files = {}
    for ext in ("exr", "png"):
        path = progress.frame_file(redis(), job, frame, ext, st, lay)
        try:
            info = None if path is None else path.stat()
        except FileNotFoundError:  # removed since it was found
            info = None
        files[ext] = None if info is None else {"bytes": info.st_size, "mtime": info.st_mtime}
    d["files"] = files
    d["layers"] = []
    if files["exr"] is not None:
        from ..errors import FrameFileError

        path = progress.frame_file(redis(), job, frame, "exr", st, lay)
        try:
            if path is not None:
                d["layers"] = current_app.extensions["lampyr.previews"].layers(path)
        except FrameFileError:  # caught between two writes of the head, or removed since
            pass
    d["failed"] = [f for f in st.get("failed") or []
                   if P.parse_batch_id(f["batch"])[1] == frame]
    return jsonify(d)


@bp.route("/api/jobs/<job>/frames/<int:frame>/tiles/<int:tile>")
def tile(job, frame, tile):
    st = job_or_404(job)
    lay = frame_or_404(job, frame)
    d = progress.frame_tiles(redis(), job, frame)
    if d is None or not 0 <= tile < len(lay["tiles"]):
        abort(404, description=f"job {job!r} has no tile {tile} in frame {frame} "
                               f"(tiles 0–{len(lay['tiles']) - 1})")
    out = dict(d["tiles"][tile])
    out["frame"] = frame
    out["failed"] = [f for f in st.get("failed") or []
                     if P.parse_batch_id(f["batch"])[1:3] == (frame, tile)]
    return jsonify(out)


@bp.route("/api/throughput")
def throughput():
    try:
        hours = float(request.args.get("hours", OVERVIEW_HOURS))
    except ValueError:
        abort(400, description="hours: expected a number of hours between 0.1 and 24")
    if not 0.1 <= hours <= 24:
        abort(400, description="hours: expected a number of hours between 0.1 and 24")
    return jsonify(history.throughput(redis(), hours))
