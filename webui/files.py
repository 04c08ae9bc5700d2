"""Frame files: the EXR and the head's PNG as downloads, and a preview tone-mapped on request.

    GET /jobs/<job>/frames/<frame>.exr               the frame file (attachment)
    GET /jobs/<job>/frames/<frame>.png               the head's sRGB preview (attachment)
    GET /jobs/<job>/frames/<frame>/preview.png?exposure=STOPS&layer=NAME&width=PX
        one layer of the frame as a picture (webui/layers.py: which layers, and how each is
        mapped); without `layer`, the denoised layer, or the raw mean (`beauty`) when the
        frame has none yet; raw=1 is the older spelling of layer=beauty; `width` (one of
        layers.PLAY_WIDTHS, for playing the shot) shrinks a frame wider than that
    GET /jobs/<job>/frames/<frame>/thumb.jpg?exposure=STOPS
        a small JPEG of the frame for the strip (a few kB)

Paths come only from `progress.frame_file`, which resolves a frame inside its job's frames
folder and nowhere else; anything else is a 404, and so is a layer the frame does not hold.
Pictures are kept in memory by (file, mtime, size, layer, exposure) and on disk in the frames
folder's `.previews/` (layers.cached_picture); the frame file itself is only read. A request
that names the frame's version (`v=`, the page adds its mtime) may be kept by the browser.
"""

from __future__ import annotations

import threading
from collections import OrderedDict

from flask import Blueprint, Response, abort, request, send_file

from ..scheduler import progress
from . import layers as L
from .api import frame_or_404, job_or_404, redis

bp = Blueprint("files", __name__)
EXPOSURE_RANGE = (-10.0, 10.0)  # stops
CACHE_ENTRIES = 48


class PreviewCache:
    """Picture bytes by (path, mtime_ns, size, what); least recently used dropped. Behind it,
    the pictures kept on disk (layers.cached_picture)."""

    def __init__(self, entries: int = CACHE_ENTRIES):
        self.entries = entries
        self.data: OrderedDict = OrderedDict()
        self.lock = threading.Lock()
        self.channels = L.ChannelCache()

    def layers(self, path) -> list[str]:
        """The layers the frame file holds (FrameFileError when unreadable or gone)."""
        return self.channels.layers(path)

    def get(self, path, exposure: float, layer: str | None = None, thumb: bool = False,
            width: int | None = None) -> bytes:
        """The PNG of `layer` (None: the default layer) at `exposure` (at most `width` wide when
        given), or the thumbnail JPEG.
        FrameFileError when the file is unreadable or gone (removed since it was found);
        layers.NoSuchLayer when it holds no such layer."""
        from ..errors import FrameFileError

        try:
            st = path.stat()
        except FileNotFoundError:
            raise FrameFileError(f"{path}: no such frame file") from None
        layers = self.layers(path)
        layer = L.default_layer(layers) if layer is None else layer
        if layer not in layers:
            raise L.NoSuchLayer(layer, layers)
        if not thumb and not L.is_colour(layer):
            exposure = 0.0  # data layers have no exposure
        what = f"{'thumb' if thumb else layer}.e{exposure:+.2f}" + (f".w{width}" if width else "")
        key = (str(path), st.st_mtime_ns, st.st_size, what, thumb)
        with self.lock:
            if key in self.data:
                self.data.move_to_end(key)
                return self.data[key]
        if thumb:
            make = lambda: L.thumb_bytes(path, layers, exposure)  # noqa: E731
        else:
            make = lambda: L.png_bytes(L.layer_codes(path, layer, layers, exposure,  # noqa: E731
                                                     width))
        data = L.cached_picture(path, what, "jpg" if thumb else "png", make)
        with self.lock:
            self.data[key] = data
            while len(self.data) > self.entries:
                self.data.popitem(last=False)
        return data


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


def _exposure() -> float:
    raw = request.args.get("exposure", "0")
    try:
        exposure = round(float(raw), 2)
        if not EXPOSURE_RANGE[0] <= exposure <= EXPOSURE_RANGE[1]:
            raise ValueError
    except ValueError:
        abort(400, description=f"exposure: expected stops between {EXPOSURE_RANGE[0]:g} and "
                               f"{EXPOSURE_RANGE[1]:g}, got {raw!r}")
    return exposure


def _width() -> int | None:
    raw = request.args.get("width")
    if raw is None:
        return None
    if raw not in {str(w) for w in L.PLAY_WIDTHS}:
        abort(400, description=f"width: expected one of {', '.join(map(str, L.PLAY_WIDTHS))} "
                               f"(pixels), got {raw[:20]!r}")
    return int(raw)


def _picture(job: str, frame: int, layer: str | None, thumb: bool, mimetype: str,
             width: int | None = None):
    from flask import current_app

    from ..errors import FrameFileError

    exposure = _exposure()
    if layer is not None and not L.LAYER_NAME.fullmatch(layer):
        abort(404, description=f"layer: expected a layer name (letters, digits, _), got "
                               f"{layer[:40]!r}")
    path = _file_or_404(job, frame, "exr")
    try:
        data = current_app.extensions["lampyr.previews"].get(path, exposure, layer, thumb, width)
    except L.NoSuchLayer as err:
        abort(404, description=f"frame {frame} of {job!r} has no layer {err.layer!r} (it has "
                               f"{', '.join(err.layers)})")
    except FrameFileError:  # caught between two writes of the head, or damaged
        abort(404, description=f"frame {frame} of {job!r} cannot be read right now")
    resp = Response(data, mimetype=mimetype)
    # a request naming the frame's version gets the same bytes until the frame is rewritten
    resp.headers["Cache-Control"] = ("private, max-age=86400" if request.args.get("v")
                                     else "private, max-age=0, must-revalidate")
    return resp


@bp.route("/jobs/<job>/frames/<int:frame>/preview.png")
def preview(job, frame):
    layer = request.args.get("layer")
    raw_flag = request.args.get("raw", "0")
    if raw_flag not in ("0", "1"):
        abort(400, description=f"raw: expected 0 (denoised) or 1 (the raw mean), got {raw_flag!r}")
    if layer is None and raw_flag == "1":
        layer = "beauty"
    return _picture(job, frame, layer, False, "image/png", _width())


@bp.route("/jobs/<job>/frames/<int:frame>/thumb.jpg")
def thumb(job, frame):
    return _picture(job, frame, None, True, "image/jpeg")
