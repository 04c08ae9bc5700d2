"""The farm's web page: `create_app(config)` builds the Flask app (there is no module-level app).

config keys:
    STATE            the head's state folder (password files, upload scratch space)
    REDIS_URL        the farm's Redis, as the head prints it
    PASSWORD         the login password (default: auth.farm_password(STATE))
    VIEWER_PASSWORD  a read-only login's password (default: auth.viewer_password(STATE), or none)
    SECRET_KEY       signs the session cookie (default: auth.session_secret(STATE))
    MAX_UPLOAD_BYTES largest upload accepted, shot plus archive (default 512 MiB)
    any other Flask setting (TESTING, …) is passed through.

Errors meant for people (`LampyrError`) are caught here, once, and answered with their one line
(400); 404 / 413 / 500 never show a traceback.
"""

from __future__ import annotations

from pathlib import Path

from flask import Blueprint, Flask, render_template, request
from werkzeug.exceptions import HTTPException, RequestEntityTooLarge

from ..errors import LampyrError

DEFAULT_UPLOAD_BYTES = 512 * 1024**2
FORM_PARTS = 1000  # parts of a multipart form (werkzeug's default; the page sends about ten)
FORM_FIELD_BYTES = 500_000  # a form field that is not a file (werkzeug's default)

pages = Blueprint("pages", __name__)


@pages.route("/")
def overview():
    return render_template("overview.html")


@pages.route("/jobs/<job>")
def job_page(job):
    from .api import job_or_404

    st = job_or_404(job)
    return render_template("job.html", job=st)


def create_app(config: dict) -> Flask:
    from ..scheduler.store import connect
    from . import actions, api, auth, files

    app = Flask(__name__)
    state = Path(config["STATE"])
    app.config.update(
        SESSION_COOKIE_HTTPONLY=True,
        SESSION_COOKIE_SAMESITE="Strict",
        SESSION_COOKIE_NAME="lampyr_session",
        PERMANENT_SESSION_LIFETIME=14 * 24 * 3600,
        SESSION_REFRESH_EACH_REQUEST=False,  # polled answers carry no cookie
        MAX_CONTENT_LENGTH=int(config.get("MAX_UPLOAD_BYTES", DEFAULT_UPLOAD_BYTES)),
        MAX_FORM_MEMORY_SIZE=FORM_FIELD_BYTES,
        MAX_FORM_PARTS=FORM_PARTS + 1,  # PartCounter below refuses first, naming the limit
        JSON_SORT_KEYS=False,
    )
    app.config.update({k: v for k, v in config.items() if k != "MAX_UPLOAD_BYTES"})
    app.config["STATE"] = state
    app.config.setdefault("PASSWORD", None)
    if not app.config["PASSWORD"]:
        app.config["PASSWORD"] = auth.farm_password(state)
    if "VIEWER_PASSWORD" not in config:
        app.config["VIEWER_PASSWORD"] = auth.viewer_password(state)
    if not app.config.get("SECRET_KEY"):
        app.config["SECRET_KEY"] = auth.session_secret(state)
    app.extensions["lampyr.redis"] = connect(config["REDIS_URL"], check=False)
    app.extensions["lampyr.overview"] = api.SharedSnapshot(api.FARM_CACHE_SECONDS)
    app.extensions["lampyr.overview.all"] = api.SharedSnapshot(api.FARM_CACHE_SECONDS)
    app.extensions["lampyr.previews"] = files.PreviewCache()

    watch = {}  # the password files followed for changes (those not given in `config`)
    if not config.get("PASSWORD"):
        watch["PASSWORD"] = lambda: (auth.password_file(state), lambda: auth.farm_password(state))
    if "VIEWER_PASSWORD" not in config:
        watch["VIEWER_PASSWORD"] = lambda: (state / "web" / "viewer-password",
                                            lambda: auth.viewer_password(state))
    app.before_request(_refused_at_the_door)  # first: before the login check
    auth.install(app, watch)
    app.wsgi_app = PartCounter(app.wsgi_app, FORM_PARTS)
    for bp in (pages, api.bp, actions.bp, files.bp):
        app.register_blueprint(bp)
    _errors(app)

    @app.after_request
    def _headers(resp):
        resp.headers.setdefault(
            "Content-Security-Policy",
            "default-src 'self'; img-src 'self' data: blob:; style-src 'self'; script-src 'self'; "
            "connect-src 'self'; frame-ancestors 'none'; form-action 'self'; base-uri 'none'")
        resp.headers.setdefault("X-Content-Type-Options", "nosniff")
        resp.headers.setdefault("Referrer-Policy", "same-origin")
        resp.headers.setdefault("X-Frame-Options", "DENY")
        if request.path.startswith("/api/"):
            resp.headers.setdefault("Cache-Control", "no-store")
        return resp

    return app


def _refused_at_the_door():
    """A request the server refused on its headers (doorway.py): its one line, no body read."""
    from flask import make_response

    from .auth import answer
    from .doorway import REFUSED

    refusal = request.environ.get(REFUSED)
    if refusal is None:
        return None
    code, message, extra = refusal
    resp = make_response(answer(code, message, {413: "Too large", 503: "Busy"}.get(code,
                                                                                 "Refused")))
    resp.headers.update(extra)
    return resp


class TooManyParts(RequestEntityTooLarge):
    pass


class _CountingStream:
    """A multipart body, counting its boundary lines as the form parser reads it (RFC 7578: each
    part starts with "--" and the boundary)."""

    def __init__(self, stream, boundary: bytes, limit: int):
        self.stream, self.mark, self.limit = stream, b"--" + boundary, limit
        self.tail, self.seen = b"", 0

    def read(self, size: int = -1) -> bytes:
        data = self.stream.read(size)
        window = self.tail + data
        self.seen += window.count(self.mark)
        self.tail = window[-(len(self.mark) - 1):]  # too short to hold a whole boundary again
        if self.seen > self.limit + 1:  # the closing boundary line is one more
            raise TooManyParts(f"form: more than this page's limit of {self.limit} parts")
        return data


class PartCounter:
    """WSGI middleware: a multipart body with more parts than `limit` is refused with a 413 that
    says so (werkzeug's own part limit answers a bare 413 like every other limit)."""

    def __init__(self, app, limit: int):
        self.app, self.limit = app, limit

    def __call__(self, environ, start_response):
        from werkzeug.http import parse_options_header

        kind, opts = parse_options_header(environ.get("CONTENT_TYPE", ""))
        boundary = opts.get("boundary", "")
        if kind == "multipart/form-data" and boundary:
            try:
                mark = boundary.encode("latin-1")
            except UnicodeEncodeError:
                mark = b""
            if mark:
                environ["wsgi.input"] = _CountingStream(environ["wsgi.input"], mark, self.limit)
        return self.app(environ, start_response)


def _errors(app: Flask) -> None:
    from .auth import answer as _answer

    @app.errorhandler(LampyrError)
    def _lampyr(err):
        return _answer(400, str(err), "Refused")

    @app.errorhandler(413)
    def _too_big(err):
        """Names the limit that was hit: the parts of a form, the whole body, or one field."""
        from .doorway import too_big

        if isinstance(err, TooManyParts):
            message = err.description
        elif (request.content_length or 0) > app.config["MAX_CONTENT_LENGTH"]:
            message = too_big(app.config["MAX_CONTENT_LENGTH"])
        else:  # werkzeug's max_form_memory_size: a text field, or a whole urlencoded form
            message = (f"form: a field other than a file is larger than this page's limit of "
                       f"{app.config['MAX_FORM_MEMORY_SIZE'] / 1000:g} kB")
        return _answer(413, message, "Too large")

    @app.errorhandler(RecursionError)
    def _too_deep(err):
        return _answer(400, "request: nested too deeply to read", "Refused")

    @app.errorhandler(HTTPException)
    def _http(err):
        return _answer(err.code or 500, err.description or err.name, err.name)

    import redis

    @app.errorhandler(redis.exceptions.ConnectionError)
    @app.errorhandler(redis.exceptions.TimeoutError)
    def _farm_away(err):
        return _answer(503, "the farm's Redis does not answer; is the head running?", "Farm away")

    @app.errorhandler(Exception)
    def _crash(err):
        app.logger.exception("web request failed: %s %s", request.method, request.path)
        return _answer(500, "the page could not answer this request (see the head's log)",
                       "Error")
