"""The JSON the page reads (polled every couple of seconds), from the scheduler's state API only.

    GET /api/farm                       overview: jobs, workers online and offline, throughput
    GET /api/jobs/<job>                 one job: status, layout, every frame's summary
    GET /api/jobs/<job>/frames/<frame>  one frame: summary, its tiles, failed batches, files
    GET /api/jobs/<job>/frames/<frame>/tiles/<tile>   one tile and its failed batches

`/api/farm` is what every open overview polls: it is built at most once a second and shared by
all clients (the farm's state changes at the head's publish rate, 4 per second, anyway).
"""

from __future__ import annotations

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


STATE_LETTERS = {"waiting": "w", "rendering": "r", "done": "d", "failed": "f"}


def farm_overview(r) -> dict:
    """The overview's JSON (fields in docs/farm.md, "The web page")."""
    jobs = [_job_row(st) for st in store.list_jobs(r)]
    for row in jobs:  # one letter per frame, in frame order: w(aiting) r(endering) d(one) f(ailed)
        row["frame_states"] = "".join(STATE_LETTERS.get(f["state"], "w")
                                      for f in progress.job_frames(r, row["job"]))
    jobs.sort(key=lambda j: (j["state"] in ("done", "cancelled"), -j.get("submitted", 0)))
    crew = history.roster(r)
    return {
        "now": time.time(),
        "jobs": jobs,
        "workers": [_worker_view(w) for w in crew["online"]],
        "offline": crew["offline"],
        "throughput": history.throughput(r, OVERVIEW_HOURS),
    }


class SharedSnapshot:
    """One overview built at most every `seconds`, shared by every request in that time."""

    def __init__(self, seconds: float):
        self.seconds = seconds
        self.lock = threading.Lock()
        self.at = -1e9
        self.value = None

    def get(self, build):
        with self.lock:
            if time.monotonic() - self.at > self.seconds:
                self.value = build()
                self.at = time.monotonic()
            return self.value


@bp.route("/api/farm")
def farm():
    snap = current_app.extensions["lampyr.overview"]
    return jsonify(snap.get(lambda: farm_overview(redis())))


@bp.route("/api/jobs/<job>")
def job(job):
    st = job_or_404(job)
    lay = progress.job_layout(redis(), job)
    return jsonify(job=st, layout=lay, frames=progress.job_frames(redis(), job))


@bp.route("/api/jobs/<job>/frames/<int:frame>")
def frame(job, frame):
    st = job_or_404(job)
    frame_or_404(job, frame)
    d = progress.frame_tiles(redis(), job, frame)
    if d is None:
        abort(404, description=f"frame {frame} of {job!r} has no progress yet")
    files = {}
    for ext in ("exr", "png"):
        path = progress.frame_file(redis(), job, frame, ext)
        files[ext] = None if path is None else {"bytes": path.stat().st_size,
                                                "mtime": path.stat().st_mtime}
    d["files"] = files
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
