"""The page's front door under real connections (waitress on a loopback port, raw sockets):
a stranger cannot make the server store a body, idle or slow connections cannot shut out the
people logged in, uploads are capped, and a refused request names the limit it hit."""

from __future__ import annotations

import http.cookiejar
import json
import os
import re
import socket
import stat
import time
import urllib.error
import urllib.request

import pytest

MIB = 1024 * 1024


class Browser:
    """A logged-in client of the real server: cookies and the anti-forgery token (stdlib only)."""

    def __init__(self, base: str, password: str):
        self.base = base
        self.jar = http.cookiejar.CookieJar()
        self.opener = urllib.request.build_opener(urllib.request.HTTPCookieProcessor(self.jar))
        page = self.opener.open(base + "login", timeout=10).read().decode()
        self.token = re.search(r'name="token" value="([^"]+)"', page).group(1)
        body = urllib.parse.urlencode({"password": password, "token": self.token}).encode()
        self.opener.open(base + "login", data=body, timeout=10).read()
        page = self.opener.open(base, timeout=10).read().decode()
        self.token = re.search(r'name="lampyr-token" content="([^"]+)"', page).group(1)

    @property
    def cookie(self) -> str:
        return "; ".join(f"{c.name}={c.value}" for c in self.jar)

    def get(self, path: str, timeout: float = 10):
        try:
            with self.opener.open(self.base + path.lstrip("/"), timeout=timeout) as resp:
                return resp.status, resp.read()
        except urllib.error.HTTPError as err:
            return err.code, err.read()


def spooled_bytes() -> int:
    """Bytes this process holds in unlinked regular files (waitress spools a body that outgrows
    its memory buffer to an anonymous temporary file: waitress/buffers.py, TempfileBasedBuffer)."""
    total = 0
    for fd in os.listdir("/proc/self/fd"):
        try:
            st = os.fstat(int(fd))
        except OSError:
            continue
        if stat.S_ISREG(st.st_mode) and st.st_nlink == 0:
            total += st.st_size
    return total


@pytest.fixture
def web(redis_url, tmp_path):
    from lampyr.webui.serve import WebServer

    server = WebServer(tmp_path / "state", redis_url, port=0).start()
    server.base = f"http://127.0.0.1:{server.port}/"
    yield server
    server.stop()


@pytest.fixture
def browser(web):
    from lampyr.webui.auth import farm_password

    return Browser(web.base, farm_password(web.app.config["STATE"]))


def post_head(port: int, length: int, path: str = "/api/submit", cookie: str = "",
              extra: bytes = b"") -> socket.socket:
    s = socket.create_connection(("127.0.0.1", port), timeout=10)
    s.sendall(f"POST {path} HTTP/1.1\r\nHost: 127.0.0.1\r\n"
              "Content-Type: multipart/form-data; boundary=B\r\n"
              f"Content-Length: {length}\r\n".encode()
              + (f"Cookie: {cookie}\r\n".encode() if cookie else b"") + extra + b"\r\n")
    return s


def answer_of(s: socket.socket, timeout: float = 5.0) -> bytes:
    s.settimeout(timeout)
    data = b""
    try:
        while b"\r\n\r\n" not in data:
            chunk = s.recv(65536)
            if not chunk:
                break
            data += chunk
        head, _, rest = data.partition(b"\r\n\r\n")
        m = re.search(rb"Content-Length: (\d+)", head, re.I)
        while m and len(rest) < int(m.group(1)):
            chunk = s.recv(65536)
            if not chunk:
                break
            rest += chunk
        return head + b"\r\n\r\n" + rest
    except (TimeoutError, ConnectionError):
        return data


def send_some(s: socket.socket, total: int) -> int:
    """Send up to `total` body bytes; how many the server took before it closed."""
    block, sent = b"x" * MIB, 0
    s.settimeout(2.0)
    try:
        while sent < total:
            sent += s.send(block[:min(MIB, total - sent)])
    except (OSError, TimeoutError):
        pass
    return sent


def test_a_stranger_s_big_post_is_refused_on_its_headers_and_nothing_is_stored(web):
    """Three strangers announce 500 MiB each and try to send 16 MiB of it (the finding: the
    server stored whole bodies before it answered 401)."""
    before = spooled_bytes()
    socks = [post_head(web.port, 500 * MIB) for _ in range(3)]
    t0 = time.monotonic()
    answers = [answer_of(s) for s in socks]
    took = time.monotonic() - t0
    sent = [send_some(s, 16 * MIB) for s in socks]
    time.sleep(0.5)
    grown = spooled_bytes() - before
    for s in socks:
        s.close()
    print(f"\nstranger posts: answered in {took:.3f} s, {grown} bytes spooled, sent {sent}")
    for a in answers:
        assert a.startswith(b"HTTP/1.1 401"), a[:200]
        assert json.loads(a.split(b"\r\n\r\n", 1)[1]) == {"error": "log in first"}
    assert took < 2.0
    assert grown < 1 * MIB  # nothing of the bodies (rule of thumb: well under one body chunk)


def test_a_logged_in_post_over_the_limit_is_refused_on_its_headers_naming_it(web, browser):
    s = post_head(web.port, 600 * MIB, cookie=browser.cookie,
                  extra=f"X-Lampyr-Token: {browser.token}\r\n".encode())
    a = answer_of(s)
    s.close()
    assert a.startswith(b"HTTP/1.1 413"), a[:200]
    assert json.loads(a.split(b"\r\n\r\n", 1)[1])["error"] == (
        "upload: larger than this farm's limit of 512 MiB (shot file and assets archive "
        "together)")


def idle_crowd(port: int, n: int, opening: bytes) -> list[socket.socket]:
    crowd = []
    for _ in range(n):
        s = socket.socket()
        s.setblocking(False)
        try:
            s.connect(("127.0.0.1", int(port)))
        except BlockingIOError:
            pass
        crowd.append(s)
    time.sleep(0.3)
    for s in crowd:
        try:
            if opening:
                s.send(opening)
        except OSError:
            pass
    return crowd


@pytest.mark.parametrize("opening", [
    b"",  # connected, silent
    b"GET / HTTP/1.1\r\nHost: x\r\n",  # headers never finished
    b"POST /login HTTP/1.1\r\nHost: x\r\nContent-Length: 1000\r\n\r\nab",  # body never finished
], ids=["silent", "half-headers", "half-body"])
def test_a_hundred_idle_connections_do_not_shut_out_a_logged_in_page(web, browser, opening):
    crowd = idle_crowd(web.port, 110, opening)
    try:
        t0 = time.monotonic()
        code, body = browser.get("/api/farm", timeout=90)
        took = time.monotonic() - t0
        print(f"\n{len(crowd)} idle ({opening[:20]!r}): /api/farm {code} in {took:.2f} s")
        assert code == 200 and "jobs" in json.loads(body)
        assert took < 5.0  # "within a few seconds" (rule of thumb: a person waits that long)
    finally:
        for s in crowd:
            s.close()


def status_of(answer: bytes) -> int:
    return int(answer.split(b" ", 2)[1]) if answer.startswith(b"HTTP/") else 0


def test_uploads_are_capped_and_a_place_frees_when_one_ends(web, browser):
    from lampyr.webui.doorway import MAX_UPLOADS

    token = f"X-Lampyr-Token: {browser.token}\r\n".encode()
    arriving = [post_head(web.port, 50 * MIB, cookie=browser.cookie, extra=token)
                for _ in range(MAX_UPLOADS)]
    for s in arriving:
        s.sendall(b"x" * 65536)  # part of each body: they are arriving
    time.sleep(0.3)
    extra = post_head(web.port, 50 * MIB, cookie=browser.cookie, extra=token)
    a = answer_of(extra)
    extra.close()
    assert status_of(a) == 503 and b"Retry-After: 30" in a
    assert f"{MAX_UPLOADS} uploads are already arriving".encode() in a
    assert browser.get("/api/farm")[0] == 200  # the page still answers
    arriving.pop().close()  # one upload given up: its place is free again
    time.sleep(0.5)
    again = post_head(web.port, 50 * MIB, cookie=browser.cookie, extra=token)
    again.sendall(b"x" * 65536)
    assert answer_of(again, timeout=1.0) == b""  # taken: the server waits for its body
    for s in arriving + [again]:
        s.close()


@pytest.mark.parametrize("who", ["forged", "logged-out", "viewer"])
def test_a_big_body_with_a_cookie_that_is_no_farm_login_is_refused_on_its_headers(
        web, browser, who):
    cookie = browser.cookie
    if who == "forged":
        cookie = cookie[:-4] + ("AAAA" if not cookie.endswith("AAAA") else "BBBB")
    elif who == "logged-out":
        browser.opener.open(urllib.request.Request(
            browser.base + "logout", data=b"", headers={"X-Lampyr-Token": browser.token}),
            timeout=10).read()
    else:
        state = web.app.config["STATE"]
        (state / "web" / "viewer-password").write_text("just looking\n")
        cookie = Browser(web.base, "just looking").cookie
    before = spooled_bytes()
    s = post_head(web.port, 100 * MIB, cookie=cookie)
    a = answer_of(s)
    send_some(s, 8 * MIB)
    s.close()
    assert status_of(a) == (403 if who == "viewer" else 401), a[:300]
    assert spooled_bytes() - before < MIB


def test_a_small_post_without_a_login_still_reaches_the_page(web):
    """The login form is a body too: up to ANON_BODY_BYTES it is read, and the page decides."""
    s = post_head(web.port, 20, path="/api/jobs/x/pause")
    s.sendall(b"--B--\r\n" + b" " * 13)
    a = answer_of(s)
    s.close()
    assert status_of(a) == 401 and a.endswith(b'{"error":"log in first"}\n')


def test_a_body_that_stops_arriving_is_cut_off(web, browser, monkeypatch):
    from lampyr.webui import doorway

    monkeypatch.setattr(doorway, "BODY_IDLE_SECONDS", 1.0)
    token = f"X-Lampyr-Token: {browser.token}\r\n".encode()
    s = post_head(web.port, 10 * MIB, cookie=browser.cookie, extra=token)
    s.sendall(b"x" * 1000)
    t0 = time.monotonic()
    s.settimeout(10)
    assert s.recv(100) == b""  # closed by the server, nothing answered
    took = time.monotonic() - t0
    s.close()
    assert 1.0 <= took < 4.0  # BODY_IDLE_SECONDS plus at most two maintenance passes (1 s)
    assert web.server.door.uploads == 0  # its upload place is free


def test_a_slow_trickle_of_headers_is_cut_off(web, monkeypatch):
    from lampyr.webui import doorway

    monkeypatch.setattr(doorway, "HEADER_SECONDS", 2.0)
    s = socket.create_connection(("127.0.0.1", int(web.port)), timeout=10)
    t0 = time.monotonic()
    closed_after = None
    try:
        for _ in range(20):  # one header byte every 0.5 s keeps it "active" but never done
            s.sendall(b"X")
            time.sleep(0.5)
    except OSError:
        closed_after = time.monotonic() - t0
    if closed_after is None:
        s.settimeout(0.1)
        try:
            closed_after = time.monotonic() - t0 if s.recv(10) == b"" else None
        except OSError:
            closed_after = time.monotonic() - t0
    s.close()
    assert closed_after is not None and closed_after < 6.0
