"""Latency of the web page's endpoints under 50 concurrent clients while a job renders.

A real `lampyr head` (embedded Redis, the page on waitress) and a real `lampyr worker` render a
small courtyard shot with many samples, so the head merges results throughout. Clients in
several processes (so the load generator's own GIL does not hold the numbers back) each log in
with their own session, then request one endpoint again and again:

- paced: every client every 2 s, as the open page polls (25 requests/s for 50 clients);
- flat out: back to back, to see the page's ceiling on this machine.

Endpoints, side by side in one run: `/api/health` (no farm reads: the server's floor), `/`
(the overview's HTML), `/api/farm` (the overview's live update), and `/api/jobs/<job>` and
`/api/jobs/<job>/frames/<f>` (the job page's live updates). Aim (issue 4): p99 ≤ 200 ms at 50 clients.

    python bench/web.py [--clients 50] [--seconds 15]
"""

from __future__ import annotations

import argparse
import http.client
import json
import multiprocessing as mp
import os
import re
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from urllib.parse import urlencode, urlsplit

ROOT = Path(__file__).resolve().parent.parent
SHOT = ROOT / "examples" / "courtyard" / "courtyard.toml"
PACE = 2.0  # seconds between a page's polls (webui/static: L.poll(refresh, 2000))


def lampyr(*args) -> list[str]:
    return [sys.executable, "-m", "lampyr.cli", *map(str, args)]


def wait_for(path: Path, pattern: str, proc, timeout: float = 300) -> re.Match:
    give_up_at = time.monotonic() + timeout
    while True:
        m = re.search(pattern, path.read_text(errors="replace"))
        if m:
            return m
        if proc.poll() is not None or time.monotonic() > give_up_at:
            raise RuntimeError(f"{pattern!r} never appeared in {path}:\n{path.read_text()[-2000:]}")
        time.sleep(0.1)


def login(host: str, port: int, password: str) -> str:
    """A logged-in session's Cookie header."""
    c = http.client.HTTPConnection(host, port, timeout=30)
    c.request("GET", "/login")
    resp = c.getresponse()
    page = resp.read().decode()
    cookie = resp.getheader("Set-Cookie").split(";", 1)[0]
    token = re.search(r'name="token" value="([^"]+)"', page).group(1)
    body = urlencode({"password": password, "token": token, "next": "/"})
    c.request("POST", "/login", body=body, headers={
        "Cookie": cookie, "Content-Type": "application/x-www-form-urlencoded",
        "Origin": f"http://{host}:{port}"})
    resp = c.getresponse()
    resp.read()
    if resp.status != 302:
        raise RuntimeError(f"login answered {resp.status}")
    return resp.getheader("Set-Cookie").split(";", 1)[0]


def client(args) -> list[float]:
    """One process's share of the clients: (threads, host, port, password, path, seconds,
    paced) → latencies in seconds (errors as negative numbers)."""
    threads, host, port, password, path, seconds, paced = args
    out: list[float] = []
    lock = threading.Lock()

    def one(k: int) -> None:
        cookie = login(host, port, password)
        conn = http.client.HTTPConnection(host, port, timeout=30)
        mine = []
        # spread the paced clients over the interval, as pages opened at different times are
        next_at = time.monotonic() + (PACE * k / threads if paced else 0.0)
        end = time.monotonic() + seconds
        while True:
            if paced:
                time.sleep(max(0.0, next_at - time.monotonic()))
                next_at += PACE
            if time.monotonic() > end:
                break
            t0 = time.perf_counter()
            try:
                conn.request("GET", path, headers={"Cookie": cookie})
                resp = conn.getresponse()
                resp.read()
                ok = resp.status == 200
            except (OSError, http.client.HTTPException):
                conn.close()
                conn = http.client.HTTPConnection(host, port, timeout=30)
                ok = False
            dt = time.perf_counter() - t0
            mine.append(dt if ok else -dt)
        with lock:
            out.extend(mine)

    ts = [threading.Thread(target=one, args=(k,)) for k in range(threads)]
    for t in ts:
        t.start()
    for t in ts:
        t.join()
    return out


def pct(sorted_values: list[float], q: float) -> float:
    if not sorted_values:
        return float("nan")
    i = min(len(sorted_values) - 1, max(0, int(round(q * (len(sorted_values) - 1)))))
    return sorted_values[i]


def run(host, port, password, path, clients, seconds, paced, procs) -> dict:
    shares = [clients // procs + (1 if i < clients % procs else 0) for i in range(procs)]
    with mp.get_context("spawn").Pool(procs) as pool:
        parts = pool.map(client, [(n, host, port, password, path, seconds, paced)
                                  for n in shares if n])
    lat = [x for p in parts for x in p]
    good = sorted(x for x in lat if x >= 0)
    return {"requests": len(lat), "errors": sum(1 for x in lat if x < 0),
            "rate": len(lat) / seconds, "p50": pct(good, 0.50) * 1e3,
            "p99": pct(good, 0.99) * 1e3, "max": (good[-1] if good else float("nan")) * 1e3}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--clients", type=int, default=50)
    ap.add_argument("--seconds", type=float, default=15.0)
    ap.add_argument("--procs", type=int, default=4, help="client processes")
    a = ap.parse_args()

    tmp = Path(tempfile.mkdtemp(prefix="lampyr-bench-web-"))
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    procs = []
    try:
        head_log = tmp / "head.log"
        head = subprocess.Popen(lampyr("head", "--state", tmp / "state", "--web-port", 0),
                                stdout=open(head_log, "wb"), stderr=subprocess.STDOUT, env=env)
        procs.append(head)
        wait_for(head_log, r"lampyr worker (\S+)", head)
        # the head's own address (Redis user `head`), good for the worker and the commands alike
        url = json.loads((tmp / "state" / "head.json").read_text())["address"]
        m = wait_for(head_log, r"Web page: (\S+)\s+\(password in ([^)]+)\)", head)
        web, password = urlsplit(m.group(1)), Path(m.group(2)).read_text().strip()
        host, port = web.hostname, web.port
        worker_log = tmp / "worker.log"
        procs.append(subprocess.Popen(lampyr("worker", url, "--cores", 1, "--name", "bench"),
                                      stdout=open(worker_log, "wb"), stderr=subprocess.STDOUT,
                                      env=env))
        # enough work to keep the head merging for the whole run
        out = subprocess.run(lampyr("submit", SHOT, "--head", url, "--frames", "1-8",
                                    "--width", 128, "--height", 72, "--samples", 4096,
                                    "--tile", 32, "--batch", 2),
                             capture_output=True, text=True, check=True, env=env)
        job = out.stdout.strip().splitlines()[-1]
        give_up_at = time.monotonic() + 300
        while True:  # wait until batches are being merged
            st = subprocess.run(lampyr("status", job, "--json", "--head", url),
                                capture_output=True, text=True, env=env)
            if st.returncode == 0 and json.loads(st.stdout).get("pixel_samples_done", 0) > 0:
                break
            if time.monotonic() > give_up_at:
                raise RuntimeError("the job never started:\n" + worker_log.read_text()[-2000:])
            time.sleep(0.5)

        paths = ["/api/health", "/", "/api/farm", f"/api/jobs/{job}", f"/api/jobs/{job}/frames/1"]
        print(f"{a.clients} clients in {a.procs} processes, {a.seconds:.0f} s per row, while "
              f"job {job} renders (1 worker process); 2 cores shared by server, worker and "
              "clients\n")
        print(f"{'endpoint':<28} {'mode':<9} {'req':>6} {'req/s':>7} {'err':>4} "
              f"{'p50 ms':>8} {'p99 ms':>8} {'max ms':>8}")
        for paced in (True, False):
            for path in paths:
                res = run(host, port, password, path, a.clients, a.seconds, paced, a.procs)
                shown = path if len(path) < 28 else path[:25] + "…"
                print(f"{shown:<28} {'paced' if paced else 'flat out':<9} {res['requests']:>6} "
                      f"{res['rate']:>7.1f} {res['errors']:>4} {res['p50']:>8.1f} "
                      f"{res['p99']:>8.1f} {res['max']:>8.1f}", flush=True)
    finally:
        for p in procs:
            p.terminate()
        for p in procs:
            try:
                p.wait(20)
            except subprocess.TimeoutExpired:
                p.kill()
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
