"""Farm benchmarks: parallel efficiency, overhead per batch, head capacity. Prints tables.

    python bench/farm.py [--width 192 --height 108 --samples 96 --frames 1 --tile 48 --batch 48]

1. End to end on the demo shot (made small): one worker process vs two (prefork, one numba
   thread each) vs one solo worker with two numba threads — wall time, efficiency
   T1 / (n · Tn), and the overhead per batch: (wall · processes − Σ render seconds) / Σ render.
2. Head capacity: synthetic workers (threads answering from the queue with a precomputed
   64 × 64 film) — batches per second queued, delivered and merged; Redis memory per queued batch.
"""

from __future__ import annotations

import argparse
import base64
import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import redis

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "examples" / "courtyard" / "courtyard.toml"


def lampyr(*args) -> list[str]:
    return [sys.executable, "-m", "lampyr.cli", *map(str, args)]


def spawn(args, log: Path, env=None) -> subprocess.Popen:
    return subprocess.Popen(lampyr(*args), stdout=open(log, "wb"), stderr=subprocess.STDOUT,
                            env=dict(os.environ, PYTHONUNBUFFERED="1", **(env or {})),
                            start_new_session=True, cwd=log.parent)


def start_head(tmp: Path) -> tuple[subprocess.Popen, str]:
    head = spawn(["head", "--state", tmp / "state"], tmp / "head.log")
    give_up_at = time.monotonic() + 60
    while "Workers join with:" not in (text := (tmp / "head.log").read_text()):
        if head.poll() is not None or time.monotonic() > give_up_at:
            raise RuntimeError(text)
        time.sleep(0.05)
    # the head's own address (Redis user `head`): the bench reads keys no worker or command may
    return head, json.loads((tmp / "state" / "head.json").read_text())["address"]


def end_to_end(args, pool: str, cores: int, tmp: Path) -> dict:
    head, url = start_head(tmp)
    r = redis.Redis.from_url(url)
    worker = spawn(["worker", url, "--cores", cores, "--pool", pool, "--name", "bench"],
                   tmp / "worker.log")
    try:
        while not r.exists("lampyr:host:bench"):
            time.sleep(0.1)
        time.sleep(2 + 3 * cores)  # let every pool process load its kernels before timing
        seconds, prepare = [], []

        def watch(stop):  # the render seconds each result notice reports
            seen = set()
            while not stop.is_set():
                for raw in r.lrange("lampyr:results:processing", 0, -1) + r.lrange("lampyr:results", 0, -1):
                    note = json.loads(raw)
                    k = (note["batch"], note["ticket"])
                    if note["kind"] == "result" and k not in seen:
                        seen.add(k)
                        seconds.append(note["seconds"])
                        prepare.append(note.get("prepare", 0.0))
                time.sleep(0.002)

        stop = threading.Event()
        t = threading.Thread(target=watch, args=(stop,), daemon=True)
        t.start()
        res = subprocess.run(lampyr("submit", DEMO, "--head", url, "--out", tmp / "out",
                                    "--width", args.width, "--height", args.height,
                                    "--samples", args.samples, "--frames", args.frames,
                                    "--tile", args.tile, "--batch", args.batch),
                             capture_output=True, text=True, cwd=tmp, check=True)
        job = res.stdout.split()[-1]
        start = time.perf_counter()  # from the job's submission (not the client's start-up)
        while True:
            st = {k.decode(): json.loads(v) for k, v in r.hgetall(f"lampyr:job:{job}").items()}
            if st.get("state") in ("done", "failed"):
                break
            time.sleep(0.05)
        wall = time.perf_counter() - start
        stop.set()
        t.join()
        return {"wall": wall, "render": sum(seconds), "prepare": sum(prepare),
                "batches": len(seconds)}
    finally:
        for p in (worker, head):
            try:
                os.killpg(p.pid, signal.SIGTERM)
                p.wait(20)
            except (ProcessLookupError, subprocess.TimeoutExpired):
                os.killpg(p.pid, signal.SIGKILL)


def synthetic_worker(url: str, blob: bytes, stop) -> None:
    """Answer every queued batch at once with the same precomputed film (no rendering)."""
    from lampyr.scheduler import protocol as P

    w = redis.Redis.from_url(url)
    while not stop.is_set():
        item = w.brpop(P.QUEUE, timeout=0.2)
        if item is None:
            continue
        body = json.loads(base64.b64decode(json.loads(item[1])["body"]))
        task = json.loads(body[0][0])
        bid, ticket = P.Batch(**task["batch"]).id, task["ticket"]
        pipe = w.pipeline()
        pipe.set(P.k_result(bid, ticket), blob)
        pipe.rpush(P.K_RESULTS, P.result_notice(bid, ticket, "synthetic", 0.0))
        pipe.execute()


def head_capacity(n_tiles_side: int, synthetic: int, tmp: Path) -> dict:
    """Drive a real Head (in this process) with synthetic workers answering from the queue."""
    import numpy as np

    from lampyr.engine.film import Film, to_bytes
    from lampyr.scheduler import protocol as P
    from lampyr.scheduler.head import Head, submit_request
    from lampyr.scheduler.redis_server import EmbeddedRedis

    server = EmbeddedRedis(tmp / "redis").start()
    r = redis.Redis.from_url(server.url)
    shot = tmp / "cap.toml"
    shot.write_text(DEMO.read_text())
    for a in (DEMO.parent / "assets").iterdir():
        (tmp / "assets").mkdir(exist_ok=True)
        shutil.copy(a, tmp / "assets" / a.name)
    film = Film.zeros(64, 64)
    film.n[:] = 4
    film.rgb_sum[:] = np.random.default_rng(1).random((64, 64, 3))
    blob = to_bytes(film)
    head = Head(tmp / "state", server.url, lease_seconds=120)
    head.start()
    r.set(P.k_host("synthetic"), json.dumps({"name": "synthetic", "cores": synthetic}))
    side = 64 * n_tiles_side
    submit_request(r, shot, {"width": side, "height": side, "samples": 8, "frames": (1, 1)},
                   str(tmp / "out"), tile_size=64, batch_samples=4)
    head.take_commands()
    run = next(iter(head.jobs.values()))
    total = len(run.pending)
    mem0 = r.info("memory")["used_memory"]
    head.dispatch()
    queued = r.llen(P.QUEUE)
    mem_per = (r.info("memory")["used_memory"] - mem0) / max(queued, 1)
    import multiprocessing as mp

    ctx = mp.get_context("spawn")
    stop = ctx.Event()
    procs = [ctx.Process(target=synthetic_worker, args=(server.url, blob, stop), daemon=True)
             for _ in range(2)]
    for p in procs:
        p.start()
    start = time.perf_counter()
    while head.job_state(run) != "done":
        head.step()
    seconds = time.perf_counter() - start
    stop.set()
    for p in procs:
        p.join()
    server.stop()
    return {"batches": total, "seconds": seconds, "rate": total / seconds,
            "mem_per_batch": mem_per, "queued": queued}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--width", type=int, default=192)
    ap.add_argument("--height", type=int, default=108)
    ap.add_argument("--samples", type=int, default=96)
    ap.add_argument("--frames", default="1")
    ap.add_argument("--tile", type=int, default=48)
    ap.add_argument("--batch", type=int, default=48)
    ap.add_argument("--capacity-tiles", type=int, default=16, help="tiles per image side")
    args = ap.parse_args()
    rows = []
    for label, pool, cores in [("1 process", "prefork", 1), ("2 processes", "prefork", 2),
                               ("solo, 2 threads", "solo", 2)]:
        tmp = Path(tempfile.mkdtemp(prefix="lampyr-bench-"))
        res = end_to_end(args, pool, cores, tmp)
        rows.append((label, cores, res))
        shutil.rmtree(tmp, ignore_errors=True)
    t1 = rows[0][2]["wall"]
    print(f"\nEnd to end: demo shot {args.width}×{args.height}, {args.samples} spp, frames "
          f"{args.frames}, tiles {args.tile} px, {args.batch} samples per batch")
    print(f"{'workers':<18}{'wall s':>9}{'batches':>9}{'render s':>10}{'scene s':>9}"
          f"{'efficiency':>12}{'overhead':>10}{'ms/batch':>10}")
    for label, cores, res in rows:
        eff = t1 / (cores * res["wall"])
        procs = cores if "process" in label else 1
        # overhead: what neither rendering nor the once-per-process scene set-up explains
        lost = res["wall"] * procs - res["render"] - res["prepare"]
        overhead = lost / max(res["render"], 1e-9)
        per = lost / max(res["batches"], 1) * 1e3
        print(f"{label:<18}{res['wall']:>9.2f}{res['batches']:>9d}{res['render']:>10.2f}"
              f"{res['prepare']:>9.2f}{eff:>12.2f}{overhead:>9.1%}{per:>10.1f}")
    tmp = Path(tempfile.mkdtemp(prefix="lampyr-bench-"))
    cap = head_capacity(args.capacity_tiles, 64, tmp)
    shutil.rmtree(tmp, ignore_errors=True)
    print("\nHead capacity: synthetic workers, 64×64 tiles, precomputed results")
    print(f"{'batches':>9}{'seconds':>9}{'batches/s':>11}{'queued':>8}{'Redis B/queued':>16}")
    print(f"{cap['batches']:>9d}{cap['seconds']:>9.2f}{cap['rate']:>11.0f}{cap['queued']:>8d}"
          f"{cap['mem_per_batch']:>16.0f}")


if __name__ == "__main__":
    main()
