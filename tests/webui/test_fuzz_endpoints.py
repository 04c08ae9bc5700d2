"""A deterministic fuzz of the page's JSON actions and its upload, through the real server
(waitress on loopback, a real head and Redis): hundreds of malformed requests from one fixed
seed. Each must be answered — a 4xx with a one-line JSON error, or the 2xx of a request that
happened to be valid — never a 5xx, never a traceback, never a hang, and the page must still
answer afterwards."""

from __future__ import annotations

import collections
import http.client
import io
import json
import random
import tarfile
import time
import urllib.parse
import zipfile

import pytest

from tests.conftest import TINY_SHOT

from .test_doorway import Browser

SEED = 13  # the number; any fixed seed makes the same cases every run
JSON_CASES = 320
UPLOAD_CASES = 240
RAW_FORM_CASES = 60
LOGIN_CASES = 60

KEYS = ["priority", "frame", "tile", "samples", "frames", "noise", "until", "x"]
JUNK = [None, True, False, 0, -1, 1, 7, 2**63, -2**63, 10**30, 1e308, -0.0, 0.5, 3.0, "",
        "1", "-5", "1-2", "abc", "é" * 50, "\u0000", "\ud800x", "1e999", "NaN", "Infinity",
        [], [1], [1, 2, "x"], {}, {"a": 1}, " " * 1000, "9" * 5000]
VALUE_SPOTS = ["width = 16", "height = 12", "samples = 8", "bounces = 3", "seed = 7",
               "fov = 40.0", 'type = "diffuse"', "radius = 0.8", "frames = [1, 2]",
               'material = "white"', "color = [0.7, 0.7, 0.7]", 'name = "tiny"']
TOML_JUNK = ["-1", "0", "1e999", "nan", "inf", '"x"', "[]", "[[]]", "{}", "true", "2026-12-02",
             "[1, 2, 3, 4, 5]", '"' + "é" * 300 + '"', "99999999999999999999", "{ a = [ ] }",
             "[" * 50 + "]" * 50, '"""', "0x7fffffff", "-0.0", "1_000", "[1,", ""]


def rand_json(rng: random.Random, depth: int = 0):
    kind = rng.random()
    if depth > 3 or kind < 0.45:
        return rng.choice(JUNK)
    if kind < 0.7:
        return [rand_json(rng, depth + 1) for _ in range(rng.randint(0, 4))]
    return {rng.choice(KEYS + [str(rng.random())]): rand_json(rng, depth + 1)
            for _ in range(rng.randint(0, 4))}


def json_body(rng: random.Random) -> tuple[bytes, str]:
    """A body for an action: mostly JSON objects with wrong values, some broken bytes."""
    pick = rng.random()
    ctype = "application/json"
    if pick < 0.55:
        obj = {k: rng.choice(JUNK + [rand_json(rng)]) for k in rng.sample(KEYS, rng.randint(0, 4))}
        body = json.dumps(obj, allow_nan=True).encode()
    elif pick < 0.65:
        body = json.dumps(rand_json(rng)).encode()
    elif pick < 0.75:
        text = bytearray(json.dumps({"samples": 64, "frames": [1, 2], "priority": 3}).encode())
        for _ in range(rng.randint(1, 6)):
            text[rng.randrange(len(text))] = rng.randrange(256)
        body = bytes(text[:rng.randint(0, len(text))])
    elif pick < 0.82:
        n = rng.choice([100, 1000, 5000, 20000, 60000])
        body = rng.choice([b"[" * n + b"]" * n, b'{"a":' * n + b"1" + b"}" * n, b"[" * n])
    elif pick < 0.9:
        body = rng.choice([b'{"samples": 1e999}', b'{"priority": NaN}', b'{"samples": -Infinity}',
                           b'{"frame": ' + b"9" * 5000 + b"}", b"\xff\xfe{", b"", b"null",
                           b'{"samples": "\\ud800"}', b'{"samples": 1, "samples": 2}'])
    else:
        ctype = rng.choice(["text/plain", "application/x-www-form-urlencoded",
                            "application/json; charset=latin-1", "multipart/form-data",
                            "multipart/form-data; boundary=", "application/octet-stream"])
        body = urllib.parse.urlencode({k: str(rng.choice(JUNK)) for k in rng.sample(KEYS, 3)},
                                      errors="surrogatepass").encode()
    return body, ctype


def mutated_shot(rng: random.Random) -> bytes:
    text = TINY_SHOT
    pick = rng.random()
    if pick < 0.35:  # a value made wrong
        spot = rng.choice(VALUE_SPOTS)
        key = spot.split(" = ")[0]
        text = text.replace(spot, f"{key} = {rng.choice(TOML_JUNK)}", 1)
    elif pick < 0.5:  # a line dropped
        lines = text.splitlines()
        del lines[rng.randrange(len(lines))]
        text = "\n".join(lines)
    elif pick < 0.6:  # a key nobody knows, or a table twice
        text += rng.choice(["\n[camera]\nfov = 30.0\n", "\nwobble = 3\n", "\n[[object]]\n",
                            '\n[[object]]\nname = "x"\nmaterial = "nope"\n'])
    elif pick < 0.75:  # bytes flipped
        raw = bytearray(text.encode())
        for _ in range(rng.randint(1, 8)):
            raw[rng.randrange(len(raw))] = rng.randrange(256)
        return bytes(raw)
    elif pick < 0.82:
        return text.encode()[:rng.randrange(len(text))]
    elif pick < 0.88:
        n = rng.choice([2000, 20000])
        return rng.choice([b"x = " + b"[" * n + b"]" * n, b"x = " + b"{a=" * n + b"1" + b"}" * n])
    elif pick < 0.94:
        return bytes(rng.randrange(256) for _ in range(rng.randint(0, 400)))
    else:  # a mesh that must come from an archive that is not there or broken
        text = text.replace('sphere = { center = [0.0, -100.0, 0.0], radius = 100.0 }',
                            rng.choice(['mesh = "assets/floor.obj"', 'mesh = "../x.obj"',
                                        'mesh = "/etc/passwd"', 'mesh = "assets/none.ply"']))
    return text.encode()


def archive_of(rng: random.Random) -> tuple[bytes, str] | None:
    pick = rng.random()
    if pick < 0.4:
        return None
    if pick < 0.5:
        return bytes(rng.randrange(256) for _ in range(rng.randint(0, 2000))), rng.choice(
            ["a.zip", "a.tar.gz", "a.tgz", "a.tar"])
    buf = io.BytesIO()
    name = rng.choice(["assets/floor.obj", "../evil.obj", "/abs.obj", "assets/../../x",
                       "a\\b.obj", "assets/floor.obj"])
    body = rng.choice([b"v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n", b"", b"\0" * 100,
                       b"v nan nan nan\nf 1 1 1\n"])
    if pick < 0.75:
        with zipfile.ZipFile(buf, "w") as z:
            z.writestr(name, body)
            if rng.random() < 0.3:
                z.writestr(name, body)  # twice
        data, fname = buf.getvalue(), "a.zip"
    else:
        with tarfile.open(fileobj=buf, mode="w:gz") as tar:
            info = tarfile.TarInfo(name)
            if rng.random() < 0.3:
                info.type = rng.choice([tarfile.SYMTYPE, tarfile.LNKTYPE, tarfile.FIFOTYPE])
                info.linkname = "/etc/passwd"
                tar.addfile(info)
            else:
                info.size = len(body)
                tar.addfile(info, io.BytesIO(body))
        data, fname = buf.getvalue(), "a.tgz"
    if rng.random() < 0.25:  # cut short
        data = data[:rng.randrange(max(1, len(data)))]
    if rng.random() < 0.1:
        fname = rng.choice(["a.rar", "a", "a.zip.exe", "é.zip"])
    return data, fname


def form_of(parts: list[tuple[str, bytes, str | None]], boundary: str) -> bytes:
    out = b""
    for name, body, filename in parts:
        disp = f'form-data; name="{name}"' + (f'; filename="{filename}"' if filename else "")
        out += f"--{boundary}\r\nContent-Disposition: {disp}\r\n\r\n".encode("utf-8",
                                                                            "surrogatepass")
        out += body + b"\r\n"
    return out + f"--{boundary}--\r\n".encode()


def upload_case(rng: random.Random, token: str) -> tuple[bytes, str]:
    boundary = "fuzz" + str(rng.randrange(10**9))
    parts = [("token", token.encode(), None)]
    if rng.random() < 0.95:
        shot_name = "tiny.toml" if rng.random() < 0.85 else rng.choice(
            ["", "x.txt", "../../etc/x.toml", "a/b/c.toml", "é.toml", ".toml", "x" * 300 + ".toml"])
        parts.append(("shot", mutated_shot(rng), shot_name or "f"))
    arc = archive_of(rng)
    if arc is not None:
        parts.append(("assets", arc[0], arc[1]))
    for key in rng.sample(["samples", "width", "height", "frames", "priority", "tile", "until"],
                          rng.randint(0, 4)):
        parts.append((key, str(rng.choice(JUNK + ["8", "1-2", "07:00", "2026-12-03T07:00",
                                                  "24:61", "2-1", "1-", "99999"])).encode(
            "utf-8", "surrogatepass"), None))
    return form_of(parts, boundary), f"multipart/form-data; boundary={boundary}"


def raw_form_case(rng: random.Random, token: str) -> tuple[bytes, str]:
    """Multipart bodies broken at the byte level."""
    b = "rawB" + str(rng.randrange(10**6))
    good = form_of([("token", token.encode(), None), ("shot", TINY_SHOT.encode(), "tiny.toml")], b)
    pick = rng.randrange(9)
    if pick == 0:
        return good[:rng.randrange(len(good))], f"multipart/form-data; boundary={b}"
    if pick == 1:
        return good, "multipart/form-data; boundary=other"
    if pick == 2:
        return good, "multipart/form-data"
    if pick == 3:
        return good.replace(b"\r\n", b"\n"), f"multipart/form-data; boundary={b}"
    if pick == 4:  # many parts
        parts = [("token", token.encode(), None)] + [("f", b"1", None)] * rng.choice([999, 5000])
        return form_of(parts, b), f"multipart/form-data; boundary={b}"
    if pick == 5:  # one huge field
        return form_of([("token", token.encode(), None), ("frames", b"1" * 600_000, None)], b), \
            f"multipart/form-data; boundary={b}"
    if pick == 6:  # part headers of junk
        return (f"--{b}\r\n".encode() + bytes(rng.randrange(256) for _ in range(300))
                + f"\r\n\r\nx\r\n--{b}--\r\n".encode()), f"multipart/form-data; boundary={b}"
    if pick == 7:  # two shots, non-UTF-8 names
        return form_of([("token", token.encode(), None), ("shot", b"a = 1", "a.toml"),
                        ("shot", b"b = 2", "b.toml"), ("\udcff", b"x", "\udcfe.zip")], b), \
            f"multipart/form-data; boundary={b}"
    return good + bytes(rng.randrange(256) for _ in range(500)), f"multipart/form-data; boundary={b}"


def priority_is_valid(body: bytes, ctype: str) -> bool:
    """docs/farm.md: `…/priority {"priority"}`, a whole number from -1000 to 1000 (JSON's
    integral floats count, booleans do not); anything else is a 400."""
    if not ctype.startswith("application/json"):
        return False
    try:
        obj = json.loads(body)
    except (ValueError, RecursionError):
        return False
    p = obj.get("priority") if isinstance(obj, dict) else None
    if isinstance(p, str):  # a form's text: the page reads it as the form's fields are read
        try:
            p = int(p)
        except ValueError:
            return False
    if isinstance(p, bool) or not isinstance(p, (int, float)) or p != p or p in (
            float("inf"), float("-inf")):
        return False
    return p == int(p) and -1000 <= p <= 1000


class Client:
    """One request per connection to the real server, with the login's cookie and token."""

    def __init__(self, port: int, browser: Browser):
        self.port, self.cookie, self.token = port, browser.cookie, browser.token

    def send(self, method: str, path: str, body: bytes = b"", ctype: str | None = None):
        conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=60)
        headers = {"Cookie": self.cookie, "X-Lampyr-Token": self.token}
        if ctype:
            headers["Content-Type"] = ctype
        try:
            conn.request(method, path, body=body if method == "POST" else None, headers=headers)
            resp = conn.getresponse()
            return resp.status, resp.read()
        finally:
            conn.close()


def places_in_use(door, within: float = 10.0) -> int:
    """The door's count of upload places held, once it settles. waitress writes an answer before
    its channel closes the request (which gives the place back), so a client can read the last
    answer a moment before the count drops: wait for 0, for at most `within` seconds."""
    give_up = time.monotonic() + within
    while door.uploads and time.monotonic() < give_up:
        time.sleep(0.05)
    return door.uploads


def check(outcomes: collections.Counter, what: str, status: int, body: bytes) -> None:
    text = body.decode("utf-8", "replace")
    assert status < 500, f"{what}: {status} {text[:300]}"
    assert "Traceback" not in text and 'File "' not in text, f"{what}: {text[:300]}"
    if status >= 400:
        msg = json.loads(body)["error"]
        assert msg and "\n" not in msg, f"{what}: {msg!r}"
    outcomes[status] += 1


@pytest.fixture
def fuzz_site(head, redis_url, state, tmp_path, compiled_kernels):
    """The real server on the head's farm, one planned job and a login; the kernels compiled
    first (an upload that happens to be valid is measured by a probe render)."""
    from lampyr.scheduler.submit import submit_request
    from lampyr.webui.auth import farm_password
    from lampyr.webui.serve import WebServer

    shot = tmp_path / "shot" / "tiny.toml"
    shot.parent.mkdir(parents=True)
    shot.write_text(TINY_SHOT)
    job = submit_request(head.r, shot, {}, None, 0, tile_size=8, batch_samples=4)
    head.take_commands()
    head.publish(every=0)
    web = WebServer(state, redis_url, port=0).start()
    base = f"http://127.0.0.1:{web.port}/"
    browser = Browser(base, farm_password(web.app.config["STATE"]))
    yield web, Client(web.port, browser), job, browser
    web.stop()


def test_the_json_actions_answer_every_malformed_request_in_one_line(fuzz_site, monkeypatch):
    from lampyr.webui import auth

    monkeypatch.setattr(auth, "LOGIN_TRIES", 10**6)  # the login cases below get past the throttle
    web, client, job, browser = fuzz_site
    rng = random.Random(SEED)
    outcomes = collections.Counter()
    actions = ["priority"] * 3 + ["retry"] * 3 + ["refine"] * 3 + ["pause", "resume"]
    wrong_priority = 0
    t0 = time.monotonic()
    for i in range(JSON_CASES):
        pick = rng.random()
        if pick < 0.8:
            body, ctype = json_body(rng)
            action = rng.choice(actions)
            path = f"/api/jobs/{job}/{action}"
            status, answer = client.send("POST", path, body, ctype)
            if action == "priority":  # the one action whose whole contract fits in a line
                valid = priority_is_valid(body, ctype)
                assert status == (202 if valid else 400), (path, body[:200], status, answer)
                wrong_priority += not valid
        elif pick < 0.9:
            name = urllib.parse.quote("".join(chr(rng.randrange(1, 0x3000)) for _ in range(8)))
            path = rng.choice([f"/api/workers/{name}/forget", f"/api/jobs/{name}/pause"])
            status, answer = client.send("POST", path, b"{}", "application/json")
        else:
            seg = urllib.parse.quote(str(rng.choice(JUNK)), safe="", errors="surrogatepass")
            path = rng.choice([f"/api/jobs/{seg}", f"/api/jobs/{job}/frames/{seg}",
                               f"/api/jobs/{job}/frames/1/tiles/{seg}",
                               f"/api/throughput?hours={seg}", f"/api/farm?all={seg}"])
            status, answer = client.send("GET", path)
        check(outcomes, f"case {i}: {path}", status, answer)
    print(f"\nJSON fuzz: {JSON_CASES} cases in {time.monotonic() - t0:.1f} s: "
          f"{dict(sorted(outcomes.items()))}")
    assert wrong_priority > 30  # the oracle above was exercised
    logins = collections.Counter()
    for i in range(LOGIN_CASES):  # the login form: a page, not JSON; never a 5xx or traceback
        fields = {k: rng.choice(JUNK + ["%ED%A0%80", "%FF", "x" * 70000]) for k in
                  rng.sample(["password", "token", "next"], rng.randint(0, 3))}
        if rng.random() < 0.5 and "token" in fields:
            fields["token"] = client.token
        body = "&".join(f"{k}={v}" for k, v in fields.items()).encode("utf-8", "surrogatepass")
        status, answer = client.send("POST", "/login", body, "application/x-www-form-urlencoded")
        text = answer.decode("utf-8", "replace")
        assert status < 500 and "Traceback" not in text, (i, fields, status, text[:300])
        logins[status] += 1
    print(f"login fuzz: {LOGIN_CASES} cases: {dict(sorted(logins.items()))}")
    assert browser.get("/api/farm")[0] == 200  # the page is still up


def test_the_upload_answers_every_malformed_shot_archive_and_form_in_one_line(fuzz_site):
    web, client, job, browser = fuzz_site
    rng = random.Random(SEED + 1)
    outcomes = collections.Counter()
    t0 = time.monotonic()
    for i in range(UPLOAD_CASES + RAW_FORM_CASES):
        if i < UPLOAD_CASES:
            body, ctype = upload_case(rng, client.token)
        else:
            body, ctype = raw_form_case(rng, client.token)
        try:
            status, answer = client.send("POST", "/api/submit", body, ctype)
        except TimeoutError:
            raise AssertionError(f"case {i}: no answer in 60 s: {ctype} {body[:300]!r}") from None
        check(outcomes, f"case {i}", status, answer)
    print(f"\nupload fuzz: {UPLOAD_CASES + RAW_FORM_CASES} cases in "
          f"{time.monotonic() - t0:.1f} s: {dict(sorted(outcomes.items()))}")
    assert outcomes[400] + outcomes[413] >= UPLOAD_CASES // 2  # mostly refusals, as built
    assert places_in_use(web.server.door) == 0  # every upload place given back
    assert browser.get("/api/farm")[0] == 200
