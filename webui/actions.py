"""What the page can ask of the farm: each action becomes one head command (store.send_command).

    POST /api/jobs/<job>/pause | resume | cancel
    POST /api/jobs/<job>/priority   {"priority": int}
    POST /api/jobs/<job>/retry      {} | {"frame": f} | {"frame": f, "tile": i}
    POST /api/jobs/<job>/refine     {"samples": n, "frames": [f, ...]?, "noise": e?}
    POST /api/workers/<name>/forget drop a worker not heard from from the list
    POST /api/submit                multipart: shot (file), assets (archive, optional),
                                    priority, samples, frames ("A-B" or "A"), width, height,
                                    tile (tile edge in px; default: the head's choice),
                                    until (a ready-by time: "07:00" or "2026-12-03T07:00", the
                                    head's local time)

Every one answers JSON: 202 {"ok": true, "message"} once queued, 400 {"error"} naming the field,
404 for an unknown job, frame or tile. The login and the anti-forgery token are checked before
any of them runs (auth.check_request).
"""

from __future__ import annotations

from pathlib import Path

from flask import Blueprint, abort, current_app, jsonify, request

from ..errors import UsageError
from ..scheduler import store
from .api import frame_or_404, job_or_404, layout_or_404, redis

bp = Blueprint("actions", __name__)
MAX_SAMPLES = 1_048_576


def _body() -> dict:
    if request.is_json:
        try:
            data = request.get_json(silent=True)
        except RecursionError:  # nested deeper than the interpreter's stack
            data = None
        if not isinstance(data, dict):
            raise UsageError("body: expected a JSON object")
        return data
    return request.form.to_dict()


def _shown(raw) -> str:
    """A value as an error line quotes it: its repr, cut to a readable length."""
    text = repr(raw)
    return text if len(text) <= 40 else text[:37] + "…"


def _int(data: dict, key: str, lo: int, hi: int, required: bool = True):
    raw = data.get(key)
    if raw is None or raw == "":
        if required:
            raise UsageError(f"{key}: expected a whole number between {lo} and {hi}, got nothing")
        return None
    try:
        value = int(raw)
        if isinstance(raw, float) and raw != value or isinstance(raw, bool):
            raise ValueError
    except (TypeError, ValueError, OverflowError):  # OverflowError: JSON's 1e999 is infinity
        raise UsageError(f"{key}: expected a whole number between {lo} and {hi}, "
                         f"got {_shown(raw)}") from None
    if not lo <= value <= hi:
        raise UsageError(f"{key}: expected a whole number between {lo} and {hi}, got {value}")
    return value


def _queued(message: str):
    return jsonify(ok=True, message=message), 202


def _simple(op: str, words: str):
    def view(job):
        job_or_404(job)
        store.send_command(redis(), op, job=job)
        return _queued(f"{job}: {words}")

    view.__name__ = f"job_{op}"
    return view


bp.add_url_rule("/api/jobs/<job>/pause", view_func=_simple("pause", "no new work is queued"),
                methods=["POST"])
bp.add_url_rule("/api/jobs/<job>/resume", view_func=_simple("resume", "work is queued again"),
                methods=["POST"])
bp.add_url_rule("/api/jobs/<job>/cancel", view_func=_simple("cancel", "the remaining work is "
                                                                      "dropped; written frames stay"),
                methods=["POST"])


@bp.route("/api/jobs/<job>/priority", methods=["POST"])
def priority(job):
    job_or_404(job)
    p = _int(_body(), "priority", -1000, 1000)
    store.send_command(redis(), "priority", job=job, priority=p)
    return _queued(f"{job}: priority {p}")


@bp.route("/api/jobs/<job>/retry", methods=["POST"])
def retry(job):
    job_or_404(job)
    data = _body()
    frame = _int(data, "frame", 0, 10**7, required=False)
    tile = _int(data, "tile", 0, 10**7, required=False)
    if tile is not None and frame is None:
        raise UsageError("tile: retrying one tile needs its frame too")
    if frame is not None:
        lay = frame_or_404(job, frame)
        if tile is not None and tile >= len(lay["tiles"]):
            abort(404, description=f"job {job!r} has no tile {tile} "
                                   f"(tiles 0–{len(lay['tiles']) - 1})")
    store.send_command(redis(), "retry", job=job, frames=None if frame is None else [frame, frame],
                       tile=tile)
    what = "job" if frame is None else f"frame {frame}" + ("" if tile is None else f", tile {tile}")
    return _queued(f"{job}: failed work of the {what} is queued again")


@bp.route("/api/jobs/<job>/refine", methods=["POST"])
def refine(job):
    st = job_or_404(job)
    data = _body()
    samples = _int(data, "samples", 1, MAX_SAMPLES)
    frames = data.get("frames")
    if frames is not None:
        if isinstance(frames, str):
            frames = [f for f in frames.replace(",", " ").split() if f]
        if not isinstance(frames, list) or not frames:
            raise UsageError("frames: expected a list of frame numbers")
        frames = [_int({"frames": f}, "frames", 0, 10**7) for f in frames]
        lay = layout_or_404(job)
        known = set(lay["frames"])
        for f in frames:
            if f not in known:
                frame_or_404(job, f)  # the 404 naming the job's frames
    else:
        layout_or_404(job)
    noise = data.get("noise")
    if noise not in (None, ""):
        try:
            noise = float(noise)
            if not 0 < noise < 100:
                raise ValueError
        except (TypeError, ValueError):
            raise UsageError(f"noise: expected a relative noise goal above 0 (e.g. 0.05), "
                             f"got {_shown(data.get('noise'))}") from None
    else:
        noise = None
    if frames is None and noise is None and samples <= st.get("samples", 0):
        raise UsageError(f"samples: the job already reaches {st['samples']} samples per pixel; "
                         "ask for more")
    store.send_command(redis(), "refine", job=job, samples=samples, noise=noise, frames=frames)
    where = ("every frame" if not frames else f"frame {frames[0]}" if len(frames) == 1
             else f"frames {', '.join(map(str, frames))}")
    goal = f", tiles noisier than {noise:g}" if noise is not None else ""
    return _queued(f"{job}: adding samples up to {samples} per pixel to {where}{goal}")


@bp.route("/api/workers/<name>/forget", methods=["POST"])
def forget_worker(name):
    from ..scheduler.history import forget

    if not forget(redis(), name):
        abort(404, description=f"no worker {name!r} among those not heard from")
    return jsonify(ok=True, message=f"{name} is no longer listed"), 200


def _frames_field(text: str):
    text = (text or "").strip()
    if not text:
        return None
    try:
        if "-" in text:
            a, b = text.split("-", 1)
            return (int(a), int(b))
        return (int(text), int(text))
    except ValueError:
        raise UsageError(f"frames: expected a frame or a range like 1-48, "
                         f"got {_shown(text)}") from None


@bp.route("/api/submit", methods=["POST"])
def submit():
    from ..scheduler.uploads import submit_upload

    shot = request.files.get("shot")
    if shot is None or not shot.filename:
        raise UsageError("shot: choose the shot file (.toml) to upload")
    from ..scheduler.uploads import MAX_SHOT_BYTES

    shot_bytes = shot.read(MAX_SHOT_BYTES + 1)
    if len(shot_bytes) > MAX_SHOT_BYTES:
        raise UsageError(f"shot: larger than {MAX_SHOT_BYTES / 1024**2:g} MiB; expected a TOML "
                         "shot file (its assets go in the archive)")
    assets = request.files.get("assets")
    archive = assets.stream if assets is not None and assets.filename else None
    form = request.form
    overrides = {}
    for key, hi in (("samples", MAX_SAMPLES), ("width", 16384), ("height", 16384)):
        v = _int(form, key, 1, hi, required=False)
        if v is not None:
            overrides[key] = v
    frames = _frames_field(form.get("frames"))
    if frames is not None:
        overrides["frames"] = frames
    prio = _int(form, "priority", -1000, 1000, required=False) or 0
    tile = _int(form, "tile", 8, 1024, required=False)
    ready_by = None
    if (form.get("until") or "").strip():
        from ..scheduler.ready_by import parse_until

        try:
            ready_by = parse_until(form["until"])
        except UsageError as err:  # its message names the command-line option
            raise UsageError(str(err).replace("--until:", "until:", 1)) from None
    uploads = Path(current_app.config["STATE"]) / "web" / "uploads"
    try:
        job = submit_upload(redis(), uploads, shot.filename, shot_bytes,
                            assets.filename if archive is not None else None, archive, overrides,
                            prio, tile, ready_by)
    except RecursionError:  # a TOML nested deeper than the interpreter's stack
        raise UsageError(f"shot: {shot.filename!r} is nested too deeply to read; expected a "
                         "shot file (tables and arrays a few levels deep)") from None
    return jsonify(ok=True, job=job, message=f"{job} is queued"), 202
