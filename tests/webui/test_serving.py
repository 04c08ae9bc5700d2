"""`lampyr head` serves the page on waitress in its own process, on the port it prints."""

from __future__ import annotations

import re
import socket
import subprocess
import time
import urllib.request

from tests.conftest import lampyr_cmd


def start_head(farm, *web_args):
    farm.head_proc = farm._spawn(["head", "--state", farm.state, "--redis", farm.url,
                                  *web_args], "head.log")
    give_up_at = time.monotonic() + 60
    while True:
        log = (farm.tmp / "head.log").read_text(errors="replace")
        if "Workers join with:" in log and ("Web page:" in log or "--no-web" in web_args):
            return log
        assert farm.head_proc.poll() is None and time.monotonic() < give_up_at, log
        time.sleep(0.1)


def test_the_head_prints_the_page_s_address_and_serves_it_there(farm):
    log = start_head(farm, "--web-port", 0)
    m = re.search(r"Web page: (http://127\.0\.0\.1:\d+/)  \(password in (\S+)\)", log)
    assert m, log
    assert m.group(2) == str(farm.state / "web" / "password")
    with urllib.request.urlopen(m.group(1) + "login", timeout=10) as resp:
        assert resp.status == 200 and resp.headers["Server"] == "lampyr"  # waitress, our ident
        assert b"Farm password" in resp.read()


def test_no_web_serves_no_page(farm):
    log = start_head(farm, "--no-web")
    time.sleep(1.0)
    assert "Web page:" not in (farm.tmp / "head.log").read_text() and "Web page:" not in log


def test_a_web_port_already_taken_is_refused_in_one_line(farm, tmp_path):
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen()
        port = s.getsockname()[1]
        res = subprocess.run(lampyr_cmd("head", "--state", tmp_path / "s", "--redis", farm.url,
                                        "--web-port", port), capture_output=True, text=True,
                             timeout=120)
    assert res.returncode == 2
    assert res.stderr.strip().splitlines()[-1] == (
        f"lampyr: --web-port: port {port} on 127.0.0.1 is in use; choose another or 0 for any "
        "free port")


def test_the_page_listens_where_the_head_is_told(farm):
    log = start_head(farm, "--web-port", 0, "--web-listen", "localhost")
    assert "Web page: http://localhost:" in log

# refusals on headers alone (before any body is stored): tests/webui/test_doorway.py
