"""Frame files: the EXR and the head's PNG as downloads, and a preview tone-mapped on request.

    GET /jobs/<job>/frames/<frame>.exr               the frame file (attachment)
    GET /jobs/<job>/frames/<frame>.png               the head's sRGB preview (attachment)
    GET /jobs/<job>/frames/<frame>/preview.png?exposure=STOPS&raw=0|1
        the frame's denoised layer (the raw mean with raw=1, or when the frame has no denoised
        layer yet) × 2^STOPS, then sRGB

Paths come only from `progress.frame_file`, which resolves a frame inside its job's frames
folder and nowhere else; anything else is a 404. Previews are cached by (file, mtime, exposure,
raw).
"""

from __future__ import annotations

import threading
from collections import OrderedDict

from flask import Blueprint, Response, abort, request, send_file

from ..scheduler import progress
from .api import frame_or_404, job_or_404, redis

bp = Blueprint("files", __name__)
EXPOSURE_RANGE = (-10.0, 10.0)  # stops
CACHE_ENTRIES = 48


class PreviewCache:
    """Tone-mapped PNG bytes by (path, mtime_ns, size, exposure, raw); least recently used
    dropped."""

    def __init__(self, entries: int = CACHE_ENTRIES):
        self.entries = entries
        self.data: OrderedDict = OrderedDict()
        self.lock = threading.Lock()

    def get(self, path, exposure: float, raw: bool = False) -> bytes:
        """FrameFileError when the file is unreadable or gone (removed since it was found)."""
        from ..errors import FrameFileError

        try:
            st = path.stat()
        except FileNotFoundError:
            raise FrameFileError(f"{path}: no such frame file") from None
        key = (str(path), st.st_mtime_ns, st.st_size, exposure, raw)
        with self.lock:
            if key in self.data:
                self.data.move_to_end(key)
                return self.data[key]
        png = tone_map(path, exposure, raw)
        with self.lock:
            self.data[key] = png
            while len(self.data) > self.entries:
                self.data.popitem(last=False)
        return png


def tone_map(path, exposure: float, raw: bool = False) -> bytes:
    """The frame's denoised layer (its raw mean radiance when `raw` or when it has no denoised
    layer), scaled by 2^exposure, through the sRGB curve, as PNG bytes."""
    from ..engine.exr import read_denoised, read_frame
    from ..engine.preview import to_png_bytes

    rgb = None if raw else read_denoised(path)
    if rgb is None:
        rgb = read_frame(path)[0].mean()
    return to_png_bytes(rgb, exposure)


def _file_or_404(job: str, frame: int, ext: str):
    job_or_404(job)
    frame_or_404(job, frame)
    path = progress.frame_file(redis(), job, frame, ext)
    if path is None:
        abort(404, description=f"frame {frame} of {job!r} has no {ext.upper()} file yet")
    return path


def _download(job: str, frame: int, ext: str, mimetype: str):
    path = _file_or_404(job, frame, ext)
    try:
        return send_file(path, mimetype=mimetype, as_attachment=True, download_name=path.name,
                         max_age=0)
    except FileNotFoundError:  # removed since it was found
        abort(404, description=f"frame {frame} of {job!r} has no {ext.upper()} file now")


@bp.route("/jobs/<job>/frames/<int:frame>.exr")
def exr(job, frame):
    return _download(job, frame, "exr", "image/x-exr")


@bp.route("/jobs/<job>/frames/<int:frame>.png")
def png(job, frame):
    return _download(job, frame, "png", "image/png")


@bp.route("/jobs/<job>/frames/<int:frame>/preview.png")
def preview(job, frame):
    from ..errors import FrameFileError

    raw = request.args.get("exposure", "0")
    try:
        exposure = round(float(raw), 2)
        if not EXPOSURE_RANGE[0] <= exposure <= EXPOSURE_RANGE[1]:
            raise ValueError
    except ValueError:
        abort(400, description=f"exposure: expected stops between {EXPOSURE_RANGE[0]:g} and "
                               f"{EXPOSURE_RANGE[1]:g}, got {raw!r}")
    raw_flag = request.args.get("raw", "0")
    if raw_flag not in ("0", "1"):
        abort(400, description=f"raw: expected 0 (denoised) or 1 (the raw mean), got {raw_flag!r}")
    path = _file_or_404(job, frame, "exr")
    from flask import current_app

    try:
        data = current_app.extensions["lampyr.previews"].get(path, exposure, raw_flag == "1")
    except FrameFileError:  # caught between two writes of the head, or damaged
        abort(404, description=f"frame {frame} of {job!r} cannot be read right now")
    resp = Response(data, mimetype="image/png")
    resp.headers["Cache-Control"] = "private, max-age=0, must-revalidate"
    return resp
