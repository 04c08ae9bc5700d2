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
