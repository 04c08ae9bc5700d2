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
from werkzeug.exceptions import HTTPException

from ..errors import LampyrError

DEFAULT_UPLOAD_BYTES = 512 * 1024**2

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

    auth.install(app)
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


def _errors(app: Flask) -> None:
    from .auth import answer as _answer

    @app.errorhandler(LampyrError)
    def _lampyr(err):
        return _answer(400, str(err), "Refused")

    @app.errorhandler(413)
    def _too_big(err):
        limit = app.config["MAX_CONTENT_LENGTH"] / 1024**2
        return _answer(413, f"upload: larger than this farm's limit of {limit:g} MiB "
                            "(shot file and assets archive together)", "Too large")

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
