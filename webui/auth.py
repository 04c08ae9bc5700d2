"""Login with the farm's password, the session, and the anti-forgery token of every action.

The password is the artists' one: the embedded Redis's `artist` user's, made at its first start
into `<state>/redis/password` (scheduler/redis_server.py), or, for a head given `--redis` (no
such file), the page's own, generated at first start into `<state>/web/password` (mode 0600). The session is Flask's signed cookie (HttpOnly,
SameSite=Strict) keyed by `<state>/web/secret`, so logins survive a head restart.

A login opens a session on the server too (`SessionBook`, kept in `<state>/web/sessions.json`,
mode 0600): the cookie carries a random session id and a check value, HMAC-SHA256 keyed by the
server secret over the role, the session id and the password (RFC 2104). The cookie therefore
says nothing about the password without the secret. A session counts only while the book holds
it and its check value matches the current password: logging out strikes it from the book, and
a change of either password file (noticed by `Passwords` on the next request, by the file's
inode, size and time) ends every session and stops the old password at once.

A read-only viewer login is optional: when `<state>/web/viewer-password` exists (the farm's
keeper writes it), that password opens the page for looking only; every action answers 403.

Every POST / PUT / PATCH / DELETE must carry the session's token (header `X-Lampyr-Token` or
form field `token`) and, when the browser sends an Origin, come from this page's own origin. The
login form has a token too (given with the form), so another site cannot log a browser in.
`role_of_cookie` answers the same question from a raw Cookie header, outside any request: the
server asks it before it reads a request's body (`doorway.py`).
"""

from __future__ import annotations

import hashlib
import hmac
import os
import re
import secrets
import threading
import time
from pathlib import Path

from flask import (Blueprint, current_app, jsonify, redirect, render_template, request,
                   session, url_for)

MUTATING = {"POST", "PUT", "PATCH", "DELETE"}
OPEN_ENDPOINTS = {"auth.login", "static", "auth.health"}
TOKEN_HEADER = "X-Lampyr-Token"
LOGIN_TRIES = 8  # failed logins from one address per LOGIN_WINDOW before it must wait
LOGIN_WINDOW = 60.0
THROTTLE_ADDRESSES = 10_000  # failing addresses remembered at once (memory bound)
# a path of this page only: printable ASCII, one leading slash (browsers drop tabs and newlines
# and read a backslash as a slash, so "/\t/x" or "/\\x" would leave for host x)
LOCAL_PATH = re.compile(r"/(?![/\\])[!-~]*")

bp = Blueprint("auth", __name__)


def _private_file(path: Path, make) -> str:
    """The first line of `path`; made with `make()` (mode 0600) when it does not exist."""
    path.parent.mkdir(parents=True, exist_ok=True)
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        return path.read_text().strip()
    word = make()
    with os.fdopen(fd, "w") as f:
        f.write(word + "\n")
    return word


def password_file(state: Path) -> Path:
    """Where the page's password is: the farm's Redis password when it has one."""
    redis_pw = Path(state) / "redis" / "password"
    return redis_pw if redis_pw.exists() else Path(state) / "web" / "password"


def farm_password(state: Path) -> str:
    return _private_file(password_file(state), lambda: secrets.token_urlsafe(18))


def viewer_password(state: Path) -> str | None:
    path = Path(state) / "web" / "viewer-password"
    if not path.exists():
        return None
    return path.read_text().strip() or None


def session_secret(state: Path) -> str:
    return _private_file(Path(state) / "web" / "secret", lambda: secrets.token_hex(32))


def check_value(app, who: str, sid: str, password: str) -> str:
    """The cookie's check value: HMAC-SHA256 (RFC 2104) keyed by the server secret over the
    role, the session id and the password, as hex, cut to 128 bits."""
    key = hashlib.sha256(b"lampyr-session-check:" + str(app.config["SECRET_KEY"]).encode())
    msg = "\0".join((who, sid, password)).encode("utf-8", "surrogatepass")
    return hmac.new(key.digest(), msg, hashlib.sha256).hexdigest()[:32]


def csrf_token() -> str:
    """This session's anti-forgery token (made on first use)."""
    if "csrf" not in session:
        session["csrf"] = secrets.token_urlsafe(32)
    return session["csrf"]


def _passwords(app=None) -> dict:
    """Role → its password, for the roles this page has (files re-read when they changed)."""
    return (app or current_app).extensions["lampyr.passwords"].current()


def role_of(app, data) -> str | None:
    """"farm" (may act), "viewer" (may look) or None, for a session's contents: an open session
    of the book whose check value matches its role's current password."""
    who, sid, check = data.get("who"), data.get("sid"), data.get("check")
    if not (isinstance(who, str) and isinstance(sid, str) and isinstance(check, str)):
        return None
    pw = _passwords(app).get(who)
    if not pw or not hmac.compare_digest(check.encode("utf-8", "surrogatepass"),
                                         check_value(app, who, sid, pw).encode()):
        return None
    return who if app.extensions["lampyr.sessions"].alive(sid, who) else None


def role() -> str | None:
    """The role of this request's session (None: not logged in, logged out, or the password
    changed)."""
    return role_of(current_app, session)


def role_of_cookie(app, cookie_header: str | None) -> str | None:
    """The same answer from a raw Cookie header, with no request context (the server's check
    before it reads a body)."""
    from itsdangerous import BadSignature
    from werkzeug.http import parse_cookie

    value = parse_cookie(cookie_header or "").get(app.config["SESSION_COOKIE_NAME"])
    serializer = app.session_interface.get_signing_serializer(app)
    if not value or serializer is None:
        return None
    try:
        data = serializer.loads(value, max_age=int(app.permanent_session_lifetime.total_seconds()))
    except (BadSignature, ValueError, TypeError):
        return None
    return role_of(app, data) if isinstance(data, dict) else None


def logged_in() -> bool:
    return role() is not None


def _wants_json() -> bool:
    return request.path.startswith("/api/") or request.accept_mimetypes.best == "application/json"


def _same_origin() -> bool:
    origin = request.headers.get("Origin")
    if origin is None:  # not every browser sends one on same-origin requests; the token decides
        return True
    return origin == request.host_url.rstrip("/")


def check_request():
    """before_request: login required outside OPEN_ENDPOINTS; token and origin on every
    mutating request (the login form's POST included). The login is checked before the token
    so that a stranger's request body (an upload) is never parsed."""
    open_endpoint = request.endpoint in OPEN_ENDPOINTS or request.endpoint is None
    if not open_endpoint and not logged_in():
        if _wants_json() or request.method in MUTATING:
            return answer(401 if _wants_json() else 403, "log in first")
        return redirect(url_for("auth.login", next=request.full_path.rstrip("?")))
    if request.method in MUTATING:
        sent = request.headers.get(TOKEN_HEADER) or request.form.get("token", "")
        known = session.get("csrf", "")
        if (not known or not hmac.compare_digest(sent.encode("utf-8", "surrogatepass"), known.encode())
                or not _same_origin()):
            return answer(403, "this request lacks the page's anti-forgery token or comes from "
                               "another site; reload the page and try again")
    if open_endpoint:
        return None
    csrf_token()  # made on the first page, which hands it to the script
    if request.method in MUTATING and role() != "farm" and request.endpoint != "auth.logout":
        return answer(403, "this login can look but not change anything (a viewer login)")
    return None


def answer(code: int, message: str, title: str = "Refused"):
    """A one-line answer: JSON {"error"} for the API and JSON clients, else a small page."""
    if _wants_json():
        return jsonify(error=message), code
    return render_template("message.html", title=title, message=message), code


class LoginThrottle:
    """Failed logins per client address within a sliding window; one per app, shared by
    waitress's request threads (hence the lock)."""

    def __init__(self):
        self.fails: dict[str, list[float]] = {}
        self.lock = threading.Lock()

    def blocked(self, who: str) -> bool:
        with self.lock:
            now = time.monotonic()
            recent = [t for t in self.fails.get(who, []) if now - t < LOGIN_WINDOW]
            if recent:
                self.fails[who] = recent
            else:
                self.fails.pop(who, None)  # the table holds only addresses failing now
            return len(recent) >= LOGIN_TRIES

    def failed(self, who: str) -> None:
        with self.lock:
            now = time.monotonic()
            if who not in self.fails and len(self.fails) >= THROTTLE_ADDRESSES:
                # forget addresses that stopped failing; if all fail now, the oldest
                for k in [k for k, ts in self.fails.items() if now - ts[-1] >= LOGIN_WINDOW]:
                    del self.fails[k]
                while len(self.fails) >= THROTTLE_ADDRESSES:
                    del self.fails[next(iter(self.fails))]
            self.fails.setdefault(who, []).append(now)


@bp.route("/login", methods=["GET", "POST"])
def login():
    nxt = request.values.get("next", "")
    if not LOCAL_PATH.fullmatch(nxt):
        nxt = url_for("pages.overview")  # no open redirect
    error = None
    if request.method == "POST":
        throttle = current_app.extensions["lampyr.throttle"]
        who = request.remote_addr or "?"
        if throttle.blocked(who):
            return render_template("login.html", token=csrf_token(), next=nxt,
                                   error="Too many wrong passwords; wait a minute."), 429
        given = request.form.get("password", "")
        for who_is, pw in _passwords().items():
            if hmac.compare_digest(given.encode("utf-8", "surrogatepass"), pw.encode()):
                session.clear()
                session.permanent = True
                sid = current_app.extensions["lampyr.sessions"].open(who_is)
                session.update(who=who_is, sid=sid, check=check_value(current_app, who_is, sid, pw))
                csrf_token()
                return redirect(nxt)
        throttle.failed(who)
        error = "That is not the farm's password."
    code = 401 if error else 200
    return render_template("login.html", token=csrf_token(), next=nxt, error=error), code


@bp.route("/logout", methods=["POST"])
def logout():
    if isinstance(session.get("sid"), str):
        current_app.extensions["lampyr.sessions"].end(session["sid"])
    session.clear()
    return redirect(url_for("auth.login"))


@bp.route("/api/health")
def health():
    return jsonify(ok=True)


def install(app, watch: dict) -> None:
    """Login, sessions and checks on `app`; `watch`: the password files to follow (see
    sessions.Passwords)."""
    from .sessions import Passwords, SessionBook

    lifetime = app.permanent_session_lifetime.total_seconds()
    book = SessionBook(Path(app.config["STATE"]) / "web" / "sessions.json", lifetime)
    app.extensions["lampyr.sessions"] = book
    app.extensions["lampyr.passwords"] = Passwords(app.config, watch, book)
    app.extensions["lampyr.throttle"] = LoginThrottle()
    app.before_request(check_request)
    app.register_blueprint(bp)

    @app.context_processor
    def _token():
        return {"token": session.get("csrf", ""), "role": role()}
