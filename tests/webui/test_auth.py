"""Login, session and anti-forgery checks of every endpoint (Flask test client, real Redis)."""

from __future__ import annotations

import os
import stat

import pytest

from .conftest import PASSWORD, log_in, token_of

READS = ["/", "/jobs/some-job", "/api/farm", "/api/jobs/some-job",
         "/api/jobs/some-job/frames/1", "/api/jobs/some-job/frames/1/tiles/0", "/api/throughput", "/jobs/some-job/frames/1.exr",
         "/jobs/some-job/frames/1.png", "/jobs/some-job/frames/1/preview.png"]
ACTIONS = ["/api/jobs/some-job/pause", "/api/jobs/some-job/resume", "/api/jobs/some-job/cancel",
           "/api/jobs/some-job/priority", "/api/jobs/some-job/retry",
           "/api/jobs/some-job/refine", "/api/submit", "/api/workers/some-pc/forget", "/logout"]


@pytest.mark.parametrize("url", [u for u in READS if u.startswith("/api/")])
def test_the_json_needs_a_login(client, url):
    resp = client.get(url)
    assert resp.status_code == 401 and resp.get_json() == {"error": "log in first"}


@pytest.mark.parametrize("url", [u for u in READS if not u.startswith("/api/")])
def test_pages_and_files_send_a_stranger_to_the_login(client, url):
    resp = client.get(url)
    assert resp.status_code == 302 and resp.headers["Location"].startswith("/login?next=")


@pytest.mark.parametrize("url", ACTIONS)
def test_an_action_without_the_token_is_refused_even_when_logged_in(user, url):
    resp = user.post(url, json={})
    assert resp.status_code == 403
    assert "anti-forgery token" in resp.get_data(as_text=True)


@pytest.mark.parametrize("url", ACTIONS)
def test_an_action_with_a_wrong_token_is_refused(user, url):
    resp = user.post(url, json={}, headers={"X-Lampyr-Token": "x" + user.token})
    assert resp.status_code == 403


@pytest.mark.parametrize("url", ACTIONS)
def test_an_action_from_another_site_is_refused_even_with_the_token(user, url):
    resp = user.post(url, json={}, headers={"X-Lampyr-Token": user.token,
                                            "Origin": "http://elsewhere.example"})
    assert resp.status_code == 403


@pytest.mark.parametrize("url", ACTIONS)
def test_an_action_without_a_session_is_refused(client, url):
    resp = client.post(url, json={}, headers={"X-Lampyr-Token": "anything"})
    assert resp.status_code == (401 if url.startswith("/api/") else 403)


def test_a_stranger_s_upload_is_refused_before_its_body_is_read(client):
    import io

    class Body(io.BytesIO):
        touched = False

        def read(self, *a):
            Body.touched = True
            return super().read(*a)

    raw = (b"--B\r\nContent-Disposition: form-data; name=\"token\"\r\n\r\nanything\r\n"
           b"--B--\r\n")
    client.get("/login")  # a session with a token, but no login
    resp = client.post("/api/submit", input_stream=Body(raw), content_length=len(raw),
                       content_type="multipart/form-data; boundary=B")
    assert resp.status_code == 401 and not Body.touched


def test_the_login_form_itself_needs_its_token(client):
    client.get("/login")
    resp = client.post("/login", data={"password": PASSWORD})
    assert resp.status_code == 403
    assert client.get("/api/farm").status_code == 401


def test_a_wrong_password_is_refused_with_a_message(client):
    client.get("/login")
    resp = client.post("/login", data={"password": "guess", "token": token_of(client)})
    assert resp.status_code == 401 and b"not the farm&#39;s password" in resp.data
    assert client.get("/api/farm").status_code == 401


def test_the_right_password_opens_the_json(client):
    log_in(client)
    assert client.get("/api/farm").status_code == 200


def test_the_session_cookie_is_http_only_and_same_site(client):
    client.get("/login")
    resp = client.post("/login", data={"password": PASSWORD, "token": token_of(client)})
    cookie = resp.headers["Set-Cookie"]
    assert "HttpOnly" in cookie and "SameSite=Strict" in cookie


def test_after_the_login_the_browser_goes_where_it_wanted(client):
    client.get("/login")
    resp = client.post("/login", data={"password": PASSWORD, "token": token_of(client),
                                       "next": "/jobs/abc"})
    assert resp.headers["Location"] == "/jobs/abc"


@pytest.mark.parametrize("target", ["https://elsewhere.example/", "//elsewhere.example/x",
                                    "/\\elsewhere.example/x", "/\t/elsewhere.example/x",
                                    "/\n/elsewhere.example/x", "/\\/elsewhere.example/x"])
def test_the_login_never_sends_the_browser_to_another_site(client, target):
    client.get("/login")
    resp = client.post("/login", data={"password": PASSWORD, "token": token_of(client),
                                       "next": target})
    assert resp.headers["Location"] == "/"


def test_logging_out_ends_the_session(user):
    assert post_logout(user).status_code == 302
    assert user.get("/api/farm").status_code == 401


def post_logout(c):
    return c.post("/logout", headers={"X-Lampyr-Token": c.token})


def test_a_changed_password_ends_every_session(user, app):
    app.config["PASSWORD"] = "a new password"
    assert user.get("/api/farm").status_code == 401


def test_guessing_is_slowed_after_a_few_wrong_passwords(client):
    from lampyr.webui.auth import LOGIN_TRIES

    client.get("/login")
    for _ in range(LOGIN_TRIES):
        client.post("/login", data={"password": "guess", "token": token_of(client)})
    resp = client.post("/login", data={"password": PASSWORD, "token": token_of(client)})
    assert resp.status_code == 429


def test_the_throttle_remembers_a_bounded_number_of_addresses(monkeypatch):
    from lampyr.webui import auth

    monkeypatch.setattr(auth, "THROTTLE_ADDRESSES", 50)
    throttle = auth.LoginThrottle()
    for i in range(500):  # one wrong guess from each of many addresses
        throttle.failed(f"10.0.{i // 256}.{i % 256}")
    assert len(throttle.fails) <= 50
    assert "10.0.1.243" in throttle.fails  # the latest address is still counted


def test_a_loopback_farm_gets_a_password_file_only_its_user_can_read(tmp_path):
    from lampyr.webui.auth import farm_password, password_file

    word = farm_password(tmp_path)
    path = password_file(tmp_path)
    assert path == tmp_path / "web" / "password"
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o600
    assert len(word) >= 20 and farm_password(tmp_path) == word  # made once, then kept


def test_a_lan_farm_logs_in_with_its_redis_password(tmp_path):
    from lampyr.scheduler.redis_server import load_or_make_password
    from lampyr.webui.auth import farm_password

    redis_word = load_or_make_password(tmp_path / "redis")
    assert farm_password(tmp_path) == redis_word


def test_pages_forbid_framing_and_foreign_scripts(user):
    resp = user.get("/")
    csp = resp.headers["Content-Security-Policy"]
    assert "frame-ancestors 'none'" in csp and "script-src 'self'" in csp


@pytest.fixture
def viewer(app):
    """A test client logged in with the read-only viewer password."""
    app.config["VIEWER_PASSWORD"] = "just looking"
    c = app.test_client()
    c.get("/login")
    c.post("/login", data={"password": "just looking", "token": token_of(c)})
    c.token = token_of(c)
    return c


def test_a_viewer_login_reads_the_json(viewer):
    assert viewer.get("/api/farm").status_code == 200


@pytest.mark.parametrize("url", [u for u in ACTIONS if u != "/logout"])
def test_a_viewer_login_cannot_act(viewer, url):
    resp = viewer.post(url, json={}, headers={"X-Lampyr-Token": viewer.token})
    assert resp.status_code == 403 and "look but not change" in resp.get_json()["error"]


def test_a_viewer_can_log_out(viewer):
    assert viewer.post("/logout", headers={"X-Lampyr-Token": viewer.token}).status_code == 302
    assert viewer.get("/api/farm").status_code == 401


def test_without_a_viewer_password_file_there_is_no_viewer_login(tmp_path):
    from lampyr.webui.auth import viewer_password

    assert viewer_password(tmp_path) is None
    (tmp_path / "web").mkdir()
    (tmp_path / "web" / "viewer-password").write_text("just looking\n")
    assert viewer_password(tmp_path) == "just looking"


def test_a_viewer_s_page_says_it_only_looks(viewer):
    resp = viewer.get("/")
    assert resp.status_code == 200 and b"looking only" in resp.data and b'class=" viewer"' in resp.data


@pytest.mark.parametrize("url", ["/api/health", "/static/lampyr.css", "/static/common.js",
                                 "/login"])
def test_what_the_login_page_needs_is_open_to_everyone(client, url):
    assert client.get(url).status_code == 200


def test_a_token_that_is_not_ascii_is_refused_not_a_crash(user):
    resp = user.post("/api/jobs/x/pause", data={"token": "jeton-\u00e9t\u00e9"})
    assert resp.status_code == 403


# --- sessions the server ends (issue 13, item 2) ----------------------------------------------

def cookie_of(c) -> str:
    return c.get_cookie("lampyr_session").value


def replay(app, cookie: str):
    """A fresh client presenting a saved session cookie."""
    c = app.test_client()
    c.set_cookie("lampyr_session", cookie)
    return c


def test_a_cookie_saved_before_logging_out_no_longer_opens_the_page(app, user):
    saved = cookie_of(user)
    assert replay(app, saved).get("/api/farm").status_code == 200
    assert post_logout(user).status_code == 302
    assert replay(app, saved).get("/api/farm").status_code == 401


def test_logging_out_one_session_leaves_the_others_open(app, user):
    other = app.test_client()
    log_in(other)
    post_logout(user)
    assert other.get("/api/farm").status_code == 200


@pytest.fixture
def file_app(redis_url, tmp_path):
    """An app that reads its passwords from the state folder's files, as the head's does."""
    from lampyr.webui.app import create_app

    state = tmp_path / "state"
    (state / "web").mkdir(parents=True)
    (state / "web" / "password").write_text("first word\n")
    return create_app({"STATE": state, "REDIS_URL": redis_url, "SECRET_KEY": "test-secret",
                       "TESTING": True})


def log_in_with(app, word: str):
    c = app.test_client()
    c.get("/login")
    resp = c.post("/login", data={"password": word, "token": token_of(c)})
    return c, resp.status_code


def test_changing_the_password_file_ends_every_session_and_the_old_password_at_once(file_app):
    state = file_app.config["STATE"]
    a, code_a = log_in_with(file_app, "first word")
    b, code_b = log_in_with(file_app, "first word")
    assert code_a == code_b == 302 and a.get("/api/farm").status_code == 200
    (state / "web" / "password").write_text("second word\n")
    assert a.get("/api/farm").status_code == 401 and b.get("/api/farm").status_code == 401
    assert log_in_with(file_app, "first word")[1] == 401
    c, code = log_in_with(file_app, "second word")
    assert code == 302 and c.get("/api/farm").status_code == 200


def test_a_viewer_password_file_appearing_or_changing_ends_every_session(file_app):
    state = file_app.config["STATE"]
    farm, _ = log_in_with(file_app, "first word")
    (state / "web" / "viewer-password").write_text("just looking\n")
    assert farm.get("/api/farm").status_code == 401  # a new role: everyone logs in again
    viewer, code = log_in_with(file_app, "just looking")
    assert code == 302 and viewer.get("/api/farm").status_code == 200
    (state / "web" / "viewer-password").write_text("looking harder\n")
    assert viewer.get("/api/farm").status_code == 401
    assert log_in_with(file_app, "just looking")[1] == 401


def test_touching_a_password_file_without_changing_it_keeps_the_sessions(file_app):
    state = file_app.config["STATE"]
    a, _ = log_in_with(file_app, "first word")
    (state / "web" / "password").write_text("first word\n")
    assert a.get("/api/farm").status_code == 200


def test_an_empty_password_file_lets_nobody_in(file_app):
    (file_app.config["STATE"] / "web" / "password").write_text("\n")
    assert log_in_with(file_app, "")[1] in (401, 400)


def test_the_cookie_s_check_value_is_an_hmac_keyed_by_the_server_secret(app, user):
    """The check value is HMAC-SHA256 (RFC 2104; Python's hmac module as the reference) keyed
    by a hash of the server secret, over role, session id and password: no unsalted hash of the
    password is in the cookie (which is signed, not encrypted: anyone holding it can read it)."""
    import hashlib
    import hmac

    data = app.session_interface.get_signing_serializer(app).loads(cookie_of(user))
    key = hashlib.sha256(b"lampyr-session-check:" + b"test-secret").digest()
    want = hmac.new(key, f"farm\0{data['sid']}\0{PASSWORD}".encode(), hashlib.sha256)
    assert data["check"] == want.hexdigest()[:32]
    text = repr(data)
    for name in ("sha256", "sha1", "md5", "sha512"):
        for salt in (b"", b"lampyr-web:"):
            assert hashlib.new(name, salt + PASSWORD.encode()).hexdigest()[:16] not in text
    assert PASSWORD not in text


def test_a_cookie_signed_and_checked_with_another_secret_is_refused(app, user, redis_url, state):
    """The same password and session book, another secret: the cookie opens nothing."""
    from lampyr.webui.app import create_app

    other = create_app({"STATE": state, "REDIS_URL": redis_url, "PASSWORD": PASSWORD,
                        "SECRET_KEY": "another-secret", "TESTING": True})
    assert replay(other, cookie_of(user)).get("/api/farm").status_code == 401


def test_the_session_book_is_private_and_holds_no_session_id(app, user, state):
    data = app.session_interface.get_signing_serializer(app).loads(cookie_of(user))
    book = state / "web" / "sessions.json"
    assert stat.S_IMODE(os.stat(book).st_mode) == 0o600
    assert data["sid"] not in book.read_text()


def test_sessions_survive_a_restart_of_the_page(app, user, redis_url, state):
    from lampyr.webui.app import create_app

    again = create_app({"STATE": state, "REDIS_URL": redis_url, "PASSWORD": PASSWORD,
                        "SECRET_KEY": "test-secret", "TESTING": True})
    assert replay(again, cookie_of(user)).get("/api/farm").status_code == 200
