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
