"""Farm benchmarks: `lampyr render` against the engine alone, and the head's capacity against
Celery's own task rate. Prints tables; compares side by side in one run (ratios), never asserts.

    python bench/farm.py [--frames 1-4] [--cores 2] [--repeat 1] [--capacity-tiles 16]
    python bench/farm.py --frames 1-48            # the whole demo, as a user renders it
    python bench/farm.py --pools                  # also: 1 vs 2 pool processes vs solo

1. The demo shot (examples/courtyard) rendered twice on the same cores: by the engine alone, in
   one process with `--cores` numba threads, writing the same frame files (EXR with its denoised
   layer, PNG preview), and by `lampyr render --workers CORES` (embedded Redis, head, worker). The
   ratio engine wall / farm wall is the share of the engine's speed the farm keeps (goal 0.95).
   Both walls run from the process's start to its exit (imports, kernels, scene, every frame).
   Beside it, the CPU seconds of each process of the farm: what the head, Redis, the worker's
   supervisor, Celery's parent and the pool processes cost. With --repeat N the two alternate
   (engine, farm, farm, engine, ...), so a neighbour's load lands on both.
2. Head capacity: a real Head (in this process, its frames written by their own thread as
   `lampyr head` runs) driven by synthetic workers (processes answering every queued batch at
   once with a precomputed 64 × 64 film) — merged batches per second, until the last batch is
   merged and until the job is done (its one frame written and denoised) — and the head's CPU
   seconds, beside the rate of Celery's own no-op task (a solo worker, the farm's Celery
   settings) on the same Redis server, in the same run; and, until the last merge, the CPU
   seconds of the head's threads (loop, tile writers, frame writer) and of the other processes,
   and the wall seconds of the head loop's parts (taking and merging notices, the group commit
   within it, sending, sleeping in Redis, publishing), timed on that head's own objects. Then
   the same head at 32 spp (a tile written 9 times), its tile files written over a spare and
   exchanged (as it runs) against written new and renamed over, alternating.
"""

from __future__ import annotations

import argparse
import base64
import json
import os
import shutil
import signal
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import redis

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "examples" / "courtyard" / "courtyard.toml"
NOOP_TASK = "bench.noop"
NOOP_DONE = "bench:noop:done"


def lampyr(*args) -> list[str]:
    return [sys.executable, "-m", "lampyr.cli", *map(str, args)]


def load_line() -> str:
    one, five, fifteen = os.getloadavg()
    return f"{one:.2f} {five:.2f} {fifteen:.2f}"


def shot_overrides(args) -> dict:
    o = {}
    if args.frames:
        a, _, b = args.frames.partition("-")
        o["frames"] = (int(a), int(b or a))
    for key in ("width", "height", "samples"):
        if getattr(args, key):
            o[key] = getattr(args, key)
    return o


def render_options(args) -> list[str]:
    opts = []
    for key in ("frames", "width", "height", "samples"):
        if getattr(args, key):
            opts += [f"--{key}", str(getattr(args, key))]
    return opts


# -- 1. lampyr render against the engine alone ------------------------------------------------

def engine_alone_main(spec: str) -> None:
    """In a fresh process (NUMBA_NUM_THREADS set by the caller): render and write every frame
    as `lampyr render` does, with no farm; print one JSON line."""
    from lampyr.engine.compiler import compile_geometry
    from lampyr.engine.film import Film
    from lampyr.engine.render import FrameRenderer, tiles_for
    from lampyr.engine.shot import load_shot
    from lampyr.frames import write_frame_files

    d = json.loads(spec)
    o = d["overrides"]
    if "frames" in o:
        o["frames"] = tuple(o["frames"])
    shot = load_shot(Path(d["shot"]))
    shot = shot.with_overrides(**o) if o else shot
    out = Path(d["out"])
    geometry = compile_geometry(shot)
    rendering = writing = 0.0
    for f in shot.frames():
        t0 = time.perf_counter()
        renderer = FrameRenderer(shot, f, geometry)
        film = None
        for t in tiles_for(shot.width, shot.height, 64):
            part = renderer.render(t, 0, shot.samples)
            if film is None:  # the tile's own film says which layers the shot has
                names = getattr(part, "layer_names", ())
                film = (Film.zeros(shot.height, shot.width, names) if names
                        else Film.zeros(shot.height, shot.width))
            film.add_into(part, t.y0, t.x0)
        t1 = time.perf_counter()
        write_frame_files(out, shot, f, film, t1 - t0, final=True)
        rendering += t1 - t0
        writing += time.perf_counter() - t1
    print(json.dumps({"render": rendering, "write": writing}))


def run_engine_alone(args, tmp: Path) -> dict:
    spec = json.dumps({"shot": str(DEMO), "overrides": shot_overrides(args),
                       "out": str(tmp / "engine-out")})
    import resource

    env = dict(os.environ, NUMBA_NUM_THREADS=str(args.cores))
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    res = subprocess.run([sys.executable, __file__, "--engine-alone", spec], env=env,
                         capture_output=True, text=True)
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if res.returncode:
        raise RuntimeError(res.stderr[-2000:])
    d = json.loads(res.stdout.strip().splitlines()[-1])
    d["wall"] = wall
    d["cpu"] = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return d


PARTS = ("head (lampyr render)", "Redis", "worker supervisor", "Celery parent", "pool processes")


def _part(p, root_pid: int) -> str:
    try:
        cmd = " ".join(p.cmdline())
    except Exception:  # noqa: BLE001 — gone
        return "?"
    if p.pid == root_pid:
        return PARTS[0]
    if "redis-server" in cmd:
        return PARTS[1]
    if "lampyr.cli worker" in cmd:
        return PARTS[2]
    if "lampyr.worker.app" in cmd:
        try:
            parent = " ".join(p.parent().cmdline())
        except Exception:  # noqa: BLE001
            parent = ""
        return PARTS[4] if "lampyr.worker.app" in parent else PARTS[3]
    return "other"


def run_farm_render(args, tmp: Path) -> dict:
    """`lampyr render` in a child process; CPU seconds of its process tree sampled meanwhile."""
    import psutil

    out = tmp / "farm-out"
    cmd = lampyr("render", DEMO, "--out", out, "--workers", args.cores, "--quiet",
                 *render_options(args), *(["--tile", args.tile] if args.tile else []))
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            cwd=tmp)
    root = psutil.Process(proc.pid)
    seen: dict[int, tuple[str, float]] = {}
    while proc.poll() is None:
        try:
            procs = [root] + root.children(recursive=True)
        except psutil.Error:
            procs = []
        for p in procs:
            try:
                c = p.cpu_times()
                part = seen[p.pid][0] if p.pid in seen else _part(p, proc.pid)
                seen[p.pid] = (part, c.user + c.system)
            except psutil.Error:
                pass
        time.sleep(0.2)
    wall = time.perf_counter() - start
    stdout, stderr = proc.communicate()
    if proc.returncode:
        raise RuntimeError(f"lampyr render failed ({proc.returncode}): {stderr[-2000:]}")
    cpu = dict.fromkeys(PARTS, 0.0)
    for part, seconds in seen.values():
        cpu[part] = cpu.get(part, 0.0) + seconds
    frames = len(list(out.glob("*.exr")))
    return {"wall": wall, "cpu": cpu, "frames": frames, "said": stdout.strip()}


def render_vs_engine(args) -> None:
    print(f"\nload average before: {load_line()} ({os.cpu_count()} cores)")
    runs = {"engine": [], "farm": []}
    order = []
    for i in range(args.repeat):
        order += ["engine", "farm"] if i % 2 == 0 else ["farm", "engine"]
    for kind in order:
        tmp = Path(tempfile.mkdtemp(prefix="lampyr-bench-"))
        try:
            res = run_engine_alone(args, tmp) if kind == "engine" else run_farm_render(args, tmp)
        finally:
            shutil.rmtree(tmp, ignore_errors=True)
        runs[kind].append(res)
        print(f"  {kind}: {res['wall']:.1f} s (load average now {load_line()})", flush=True)
    o = shot_overrides(args)
    what = (f"demo shot, frames {args.frames}, {o.get('width', 'its')} × {o.get('height', 'its')}"
            f" px, {o.get('samples', 'its')} spp, {args.cores} cores")
    print(f"\n1. lampyr render against the engine alone ({what})")
    rows = []
    for kind, label in (("engine", "engine alone (1 process)"), ("farm", "lampyr render")):
        walls = [r["wall"] for r in runs[kind]]
        rows.append([label, " ".join(f"{w:.1f}" for w in walls), f"{min(walls):.1f}"])
    _table(["run", "wall s (each run)", "best"], rows)
    e = [r["wall"] for r in runs["engine"]]
    f = [r["wall"] for r in runs["farm"]]
    pairs = " ".join(f"{a / b:.2f}" for a, b in zip(e, f))
    middle = statistics.median(a / b for a, b in zip(e, f))
    print(f"speed of lampyr render / engine alone: {min(e) / min(f):.2f} (best of each; "
          f"pair by pair {pairs}; median of the pairs {middle:.2f}); goal ≥ 0.95")
    eng = runs["engine"][0]
    print(f"engine alone: rendering {eng['render']:.1f} s, writing frames {eng['write']:.1f} s, "
          f"CPU {eng['cpu']:.1f} s")
    rows = []
    for r in runs["farm"]:
        total = sum(r["cpu"].values())
        rows.append([f"{r['wall']:.1f}"] + [f"{r['cpu'].get(p, 0.0):.1f}" for p in PARTS]
                    + [f"{total:.1f}"])
    print("\nCPU seconds of the farm's processes")
    _table(["wall s", *PARTS, "all"], rows)
    farm_cpu = min(sum(r["cpu"].values()) for r in runs["farm"])
    print(f"CPU seconds engine alone / lampyr render: {eng['cpu']:.1f} / {farm_cpu:.1f} = "
          f"{eng['cpu'] / farm_cpu:.2f} (the speed ratio a machine with no neighbours would "
          "see, as both keep every core busy)")
    print(f"load average after: {load_line()}")


def _table(header, rows) -> None:
    widths = [max(len(str(x)) for x in col) for col in zip(header, *rows)]
    print("  ".join(h.ljust(w) for h, w in zip(header, widths)))
    print("  ".join("-" * w for w in widths))
    for row in rows:
        print("  ".join(str(x).ljust(w) for x, w in zip(row, widths)))


# -- 2. head capacity against Celery's own task rate ------------------------------------------

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


def _film_blob() -> bytes:
    import numpy as np

    from lampyr.engine.film import Film, to_bytes

    film = Film.zeros(64, 64)
    film.n[:] = 4
    film.rgb_sum[:] = np.random.default_rng(1).random((64, 64, 3))
    film.rgb_sq[:] = film.rgb_sum ** 2
    try:
        return to_bytes(film, bits=32)  # what workers send, where the engine has it
    except TypeError:
        return to_bytes(film)


# the head loop's parts timed by `head_capacity` (wall seconds; owner attribute, method, label)
PHASES = (("results", "take", "take notices, merge, commit (all of it)"),
          ("tiles", "commit", "of which the group commit (tile files written, fsynced)"),
          ("dispatcher", "send_group", "send batches (tickets, Celery messages)"),
          ("results", "wait", "sleep in Redis for the next notice"),
          (None, "publish", "publish status"))


def _time_phases(head) -> dict:
    """Wrap the head's loop parts on these instances (not their classes) with wall timers."""
    spent = {label: 0.0 for _, _, label in PHASES}
    for owner, name, label in PHASES:
        obj = head if owner is None else getattr(head, owner)
        inner = getattr(obj, name)

        def timed(*a, _inner=inner, _label=label, **k):
            began = time.perf_counter()
            try:
                return _inner(*a, **k)
            finally:
                spent[_label] += time.perf_counter() - began
        setattr(obj, name, timed)
    return spent


def head_capacity(server, n_tiles_side: int, synthetic: int, tmp: Path, denoise: bool = True,
                  samples: int = 8, spares: bool = True) -> dict:
    """Drive a real Head (in this process) with synthetic workers answering from the queue;
    denoise: the shot's `[output] denoise` (the frame's denoised layer and half-frame errors);
    samples: per pixel, in batches of 4 after a first pass (8: 3 batches a tile, 32: 9);
    spares: False writes every tile file new and renames it over (tilestore.py's `spares`)."""
    import multiprocessing as mp

    from lampyr.scheduler import protocol as P
    from lampyr.scheduler.head import Head, submit_request

    r = redis.Redis.from_url(server.url)
    tmp = tmp / f"{'denoised' if denoise else 'raw'}-{samples}-{'spares' if spares else 'new'}"
    tmp.mkdir(parents=True, exist_ok=True)
    shot = tmp / "cap.toml"
    shot.write_text(DEMO.read_text() + ("" if denoise else "\n[output]\ndenoise = false\n"))
    (tmp / "assets").mkdir(exist_ok=True)
    for a in (DEMO.parent / "assets").iterdir():
        shutil.copy(a, tmp / "assets" / a.name)
    blob = _film_blob()
    try:  # frames written by their own thread, as `lampyr head` runs
        head = Head(tmp / "state", server.url, lease_seconds=120, frame_thread=True)
    except TypeError:  # a head from before the frame writer
        head = Head(tmp / "state", server.url, lease_seconds=120)
    if not spares:
        head.tiles.spares = False
    head.start()
    r.set(P.k_host("synthetic"), json.dumps({"name": "synthetic", "cores": synthetic}))
    side = 64 * n_tiles_side
    submit_request(r, shot, {"width": side, "height": side, "samples": samples, "frames": (1, 1)},
                   str(tmp / "out"), tile_size=64, batch_samples=4)
    head.take_commands()
    run = next(iter(head.jobs.values()))
    total = len(run.pending)
    ctx = mp.get_context("spawn")
    stop = ctx.Event()
    procs = [ctx.Process(target=synthetic_worker, args=(server.url, blob, stop), daemon=True)
             for _ in range(2)]
    for p in procs:
        p.start()
    time.sleep(1.0)  # the synthetic workers are up before the clock starts
    spent = _time_phases(head)
    start, cpu, ticks = time.perf_counter(), time.process_time(), machine_jiffies()
    threads, rest_before, rest = thread_cpu(), others_cpu(server, procs), None
    threads_merging = None  # the head's threads until the last merge
    phases = None
    merged, busy_share_merging = None, None  # when the last batch was merged (its notice removed); the job is done once
    turns = 0  # turns that had work (notices, commands or batches to send), until the last merge
    while head.job_state(run) != "done":  # its frames are written too
        # as Head.run: a turn with nothing to do, or that took every notice, sleeps in Redis
        busy = head.step()
        if not busy or head.results.drained:
            head.results.wait(0.05)
        if merged is None:
            turns += busy
            if not run.pending and not head.dispatcher.inflight(run.rec.id):
                merged = time.perf_counter() - start
                busy_share_merging = busy_share(ticks, machine_jiffies())
                rest = cpu_since(rest_before, others_cpu(server, procs))
                threads_merging = cpu_since(threads, thread_cpu())
                phases = dict(spent)  # until the last merge
    seconds = time.perf_counter() - start
    cpu = time.process_time() - cpu  # the head's process: its loop and its frame writer
    threads = cpu_since(threads, thread_cpu())
    rest = rest or cpu_since(rest_before, others_cpu(server, procs))
    stop.set()
    for p in procs:
        p.join()
    merged = merged or seconds
    return {"batches": total, "seconds": seconds, "rate": total / seconds, "merged": merged,
            "merge_rate": total / merged, "cpu": cpu, "turns": turns,
            "busy": busy_share_merging, "threads": threads, "others": rest,
            "threads_merging": threads_merging or threads,
            "phases": phases or dict(spent)}


def cpu_since(before: dict, now: dict) -> dict:
    """CPU seconds by name between two readings (a name first seen in `now` counts whole)."""
    return {k: v - before.get(k, 0.0) for k, v in now.items()}


def others_cpu(server, procs) -> dict:
    """CPU seconds so far of the capacity run's other processes: the synthetic workers, Redis."""
    import psutil

    def seconds(pid):
        try:
            c = psutil.Process(pid).cpu_times()
        except psutil.Error:
            return 0.0
        return c.user + c.system

    return {"synthetic workers": sum(seconds(p.pid) for p in procs),
            "Redis": seconds(server.proc.pid) if getattr(server, "proc", None) else 0.0}


def thread_cpu() -> dict:
    """CPU seconds of this process's live threads by role: the head's loop (the main thread),
    its tile writers (`tilestore.WRITE_THREADS`), its frame writer, the rest (psutil's
    per-thread times, matched to Python's threads by their native ids)."""
    import threading

    import psutil

    names = {t.native_id: t.name for t in threading.enumerate()}
    out: dict[str, float] = {}
    for t in psutil.Process().threads():
        name = names.get(t.id, "")
        role = ("loop" if name == "MainThread" else "tile writes" if name.startswith("tile-write")
                else "frame writer" if name == "frame-writer" else "other (the denoiser's own, ...)")
        out[role] = out.get(role, 0.0) + t.user_time + t.system_time
    return out


def machine_jiffies():
    """(busy, total) clock ticks of every core since boot (Linux's /proc/stat); None elsewhere."""
    try:
        with open("/proc/stat") as f:
            ticks = [int(x) for x in f.readline().split()[1:9]]
    except (OSError, ValueError):
        return None
    idle = ticks[3] + ticks[4]  # idle and iowait (proc(5))
    return sum(ticks) - idle, sum(ticks)


def busy_share(before, after):
    """The share of the machine's core time that was busy between two `machine_jiffies`."""
    if before is None or after is None or after[1] == before[1]:
        return None
    return (after[0] - before[0]) / (after[1] - before[1])


def disk_tile_ms(tmp: Path, count: int = 64) -> float:
    """Milliseconds a tile file of the head (64 × 64, as its group commit writes it: noise,
    encoding, write, fsync, rename, on its writer threads) takes when the disk does nothing else:
    the second of two commits of `count` tiles, per tile."""
    from lampyr.engine.film import from_bytes
    from lampyr.scheduler.tilestore import TileStore

    film = from_bytes(_film_blob())
    store = TileStore()
    seconds = 0.0
    for first in (0, 4):
        for i in range(count):
            acc = store.get(tmp / "disk" / f"{i:05d}.acc", 64, 64)
            acc.add(film, first, 4)
            store.stage(acc)
        began = time.perf_counter()
        store.commit()
        seconds = time.perf_counter() - began
    store.close()
    return 1e3 * seconds / count


def noop_worker_main(url: str) -> None:
    """A Celery worker (solo pool, the farm's settings) whose one task only counts itself."""
    from celery import Celery

    from lampyr.scheduler import protocol as P

    app = Celery("lampyr-bench", set_as_current=False)
    app.conf.update(P.celery_settings(url))
    counter = redis.Redis.from_url(url)

    @app.task(name=NOOP_TASK, acks_late=True, ignore_result=True)
    def noop(payload: str) -> None:
        counter.incr(NOOP_DONE)

    app.worker_main(["--quiet", "worker", "-P", "solo", "-Q", "bench-noop", "-l", "WARNING",
                     "--without-gossip", "--without-mingle", "--without-heartbeat"])


def celery_noop_rate(server, n: int, tmp: Path) -> dict:
    """Tasks per second of Celery's own no-op task, sent as the head sends batches."""
    from lampyr.scheduler.sending import make_sender

    r = redis.Redis.from_url(server.url)
    r.delete(NOOP_DONE)
    log = open(tmp / "noop.log", "wb")
    worker = subprocess.Popen([sys.executable, __file__, "--noop-worker"], stdout=log,
                              stderr=subprocess.STDOUT, start_new_session=True,
                              env=dict(os.environ, LAMPYR_BENCH_URL=server.url))
    sender = make_sender(server.url)
    try:
        sender.send_task(NOOP_TASK, args=["warm"], queue="bench-noop")
        give_up = time.monotonic() + 120
        while int(r.get(NOOP_DONE) or 0) < 1:
            if worker.poll() is not None or time.monotonic() > give_up:
                raise RuntimeError((tmp / "noop.log").read_text()[-2000:])
            time.sleep(0.05)
        payload = "x" * 300  # about a render task's JSON argument
        start = time.perf_counter()
        for _ in range(n):
            sender.send_task(NOOP_TASK, args=[payload], queue="bench-noop")
        sent = time.perf_counter() - start
        while int(r.get(NOOP_DONE) or 0) < n + 1:
            if worker.poll() is not None:
                raise RuntimeError((tmp / "noop.log").read_text()[-2000:])
            time.sleep(0.01)
        seconds = time.perf_counter() - start
    finally:
        os.killpg(worker.pid, signal.SIGTERM)
        try:
            worker.wait(20)
        except subprocess.TimeoutExpired:
            os.killpg(worker.pid, signal.SIGKILL)
        log.close()
    return {"tasks": n, "seconds": seconds, "rate": n / seconds, "send_rate": n / sent}


def capacity(args) -> None:
    from lampyr.scheduler.redis_server import EmbeddedRedis

    tmp = Path(tempfile.mkdtemp(prefix="lampyr-bench-"))
    # a process's first head run is slower whatever its shot (kernels loaded, pools and buffers
    # made; measured: 152 merged/s first, 213-237 after): a small one first, not counted, on a
    # farm of its own
    server = EmbeddedRedis(tmp / "redis-warm-up").start()
    try:
        head_capacity(server, 4, 64, tmp / "warm-up", denoise=False)
    finally:
        server.stop()
    server = EmbeddedRedis(tmp / "redis").start()
    try:
        noop = celery_noop_rate(server, args.noop_tasks, tmp)
        cap = head_capacity(server, args.capacity_tiles, 64, tmp)
        disk = disk_tile_ms(tmp)
    finally:
        server.stop()
    server = EmbeddedRedis(tmp / "redis-raw").start()  # a farm of its own for the second head
    try:
        raw = head_capacity(server, args.capacity_tiles, 64, tmp, denoise=False)
    finally:
        server.stop()
    # a tile written many times: over its spare file and exchanged, against written new and
    # renamed over (tilestore.py); alternating, each on a farm of its own
    steady = {True: [], False: []}
    try:
        for i in range(args.repeat_steady):
            for spares in (True, False) if i % 2 == 0 else (False, True):
                server = EmbeddedRedis(tmp / f"redis-steady-{i}-{spares}").start()
                try:
                    steady[spares].append(head_capacity(server, args.capacity_tiles, 64, tmp / str(i),
                                                        denoise=False, samples=32, spares=spares))
                finally:
                    server.stop()
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    print(f"\n2. Head capacity against Celery's own task rate (one embedded Redis; load average "
          f"{load_line()})")
    _table(["what", "count", "seconds", "per second"], [
        ["Celery no-op tasks, sent and run (solo worker)", noop["tasks"], f"{noop['seconds']:.2f}",
         f"{noop['rate']:.0f}"],
        ["Celery sends alone (the head's sender)", noop["tasks"], "",
         f"{noop['send_rate']:.0f}"],
        [f"head: 64×64 batches queued, answered, merged ({args.capacity_tiles}² tiles)",
         cap["batches"], f"{cap['merged']:.2f}", f"{cap['merge_rate']:.0f}"],
        ["head: the same until the job is done (its frame written and denoised)",
         cap["batches"], f"{cap['seconds']:.2f}", f"{cap['rate']:.0f}"],
        ["head, shot without denoising ([output] denoise = false): merged",
         raw["batches"], f"{raw['merged']:.2f}", f"{raw['merge_rate']:.0f}"],
        ["head, shot without denoising: until the job is done",
         raw["batches"], f"{raw['seconds']:.2f}", f"{raw['rate']:.0f}"],
    ])
    print("\nA tile written many times (32 spp: 9 batches a tile, no denoising), its file written over a "
          "spare and exchanged, or written new and renamed over")
    _table(["tile files", "count", "merged/s (each run)", "group commits s (each run)"], [
        [label, steady[spares][0]["batches"] if steady[spares] else 0,
         " ".join(f"{c['merge_rate']:.0f}" for c in steady[spares]),
         " ".join(f"{c['phases'][PHASES[1][2]]:.2f}" for c in steady[spares])]
        for spares, label in ((True, "over a spare, exchanged"), (False, "new, renamed over"))])
    print(f"merge rate with denoising on / off: {cap['merge_rate'] / raw['merge_rate']:.2f} (goal >= 0.9); "
          f"to the job's end: {cap['rate'] / raw['rate']:.2f}")
    print(f"head CPU seconds (its process, every thread): {cap['cpu']:.2f}, "
          f"{1e3 * cap['cpu'] / cap['batches']:.1f} ms a batch")
    roles = ", ".join(f"{k} {v:.2f} s ({1e3 * v / cap['batches']:.1f} ms a batch)"
                      for k, v in sorted(cap["threads"].items(), key=lambda kv: -kv[1]) if v >= 0.005)
    print(f"  of which, by thread: {roles}")
    print("until the last merge, the other processes on these cores: " + ", ".join(
        f"{k} {v:.2f} s" for k, v in cap["others"].items()) + f" (the merge took {cap['merged']:.2f} s)")
    print("until the last merge, the head's threads: " + ", ".join(
        f"{k} {v:.2f} s" for k, v in sorted(cap["threads_merging"].items(), key=lambda kv: -kv[1])
        if v >= 0.005))
    busy = "n/a" if cap["busy"] is None else f"{100 * cap['busy']:.0f} %"
    print(f"until the last merge: {cap['turns']} busy turns of the head's loop, "
          f"{cap['batches'] / max(cap['turns'], 1):.1f} batches a turn; the machine busy {busy} "
          f"of its {os.cpu_count()} cores' time")
    print(f"until the last merge ({cap['merged']:.2f} s), the head's loop by part (wall seconds): " + ", ".join(
        f"{label} {v:.2f}" for label, v in cap["phases"].items()))
    print(f"the disk alone: a tile file of the group commit {disk:.2f} ms "
          f"({1e3 / disk:.0f} tiles/s, the merge rate's bound with a tile written per batch)")
    print(f"head merged / Celery no-op: {cap['merge_rate'] / noop['rate']:.2f}; goal ≥ 400 "
          "merged batches/s")


# -- optional: pool layouts (one process, two, solo with two threads) --------------------------

def spawn(args, log: Path, env=None) -> subprocess.Popen:
    return subprocess.Popen(lampyr(*args), stdout=open(log, "wb"), stderr=subprocess.STDOUT,
                            env=dict(os.environ, PYTHONUNBUFFERED="1", **(env or {})),
                            start_new_session=True, cwd=log.parent)


def start_head(tmp: Path) -> tuple[subprocess.Popen, str]:
    head = spawn(["head", "--state", tmp / "state", "--no-web"], tmp / "head.log")
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
    worker = spawn(["worker", "--cores", cores, "--pool", pool, "--name", "bench"],
                   tmp / "worker.log", env={"LAMPYR_HEAD": url})
    try:
        while not r.exists("lampyr:host:bench"):
            time.sleep(0.1)
        time.sleep(2 + 3 * cores)  # let every pool process load its kernels before timing
        res = subprocess.run(lampyr("submit", DEMO, "--head", url, "--out", tmp / "out",
                                    *render_options(args), "--tile", args.tile or 32,
                                    "--batch", args.samples or 8),
                             capture_output=True, text=True, cwd=tmp, check=True)
        job = res.stdout.split()[-1]
        start = time.perf_counter()
        while True:
            st = {k.decode(): json.loads(v) for k, v in r.hgetall(f"lampyr:job:{job}").items()}
            if st.get("state") in ("done", "failed"):
                break
            time.sleep(0.05)
        return {"wall": time.perf_counter() - start}
    finally:
        for p in (worker, head):
            try:
                os.killpg(p.pid, signal.SIGTERM)
                p.wait(20)
            except (ProcessLookupError, subprocess.TimeoutExpired):
                os.killpg(p.pid, signal.SIGKILL)


def pools(args) -> None:
    rows = []
    for label, pool, cores in [("1 process", "prefork", 1), ("2 processes", "prefork", 2),
                               ("solo, 2 threads", "solo", 2)]:
        tmp = Path(tempfile.mkdtemp(prefix="lampyr-bench-"))
        try:
            rows.append((label, cores, end_to_end(args, pool, cores, tmp)))
        finally:
            shutil.rmtree(tmp, ignore_errors=True)
    t1 = rows[0][2]["wall"]
    print("\n3. Pool layouts (a head and one worker; wall from the submit to the job's end)")
    _table(["workers", "wall s", "efficiency T1 / (n · Tn)"],
           [[label, f"{res['wall']:.2f}", f"{t1 / (cores * res['wall']):.2f}"]
            for label, cores, res in rows])


def main() -> None:
    from lampyr.allocator import keep_large_blocks

    keep_large_blocks()  # as every `lampyr` command does: for the head here and the engine alone
    if len(sys.argv) == 3 and sys.argv[1] == "--engine-alone":
        return engine_alone_main(sys.argv[2])
    if len(sys.argv) == 2 and sys.argv[1] == "--noop-worker":
        return noop_worker_main(os.environ["LAMPYR_BENCH_URL"])
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--frames", default="1-4", help="A-B of the demo's 48 frames (default 1-4)")
    ap.add_argument("--width", type=int, default=None, help="default: the shot's (256)")
    ap.add_argument("--height", type=int, default=None, help="default: the shot's (144)")
    ap.add_argument("--samples", type=int, default=None, help="default: the shot's (8)")
    ap.add_argument("--tile", type=int, default=None, help="lampyr render --tile (default: its own)")
    ap.add_argument("--cores", type=int, default=os.cpu_count() or 1)
    ap.add_argument("--repeat", type=int, default=1, help="runs of each, alternating")
    ap.add_argument("--capacity-tiles", type=int, default=16, help="tiles per image side")
    ap.add_argument("--noop-tasks", type=int, default=2000)
    ap.add_argument("--repeat-steady", type=int, default=2,
                    help="runs of each tile-file way at 32 spp, alternating")
    ap.add_argument("--skip-render", action="store_true")
    ap.add_argument("--skip-capacity", action="store_true")
    ap.add_argument("--pools", action="store_true", help="also compare pool layouts")
    args = ap.parse_args()
    if not args.skip_render:
        render_vs_engine(args)
    if not args.skip_capacity:
        capacity(args)
    if args.pools:
        pools(args)


if __name__ == "__main__":
    main()
