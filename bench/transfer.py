"""Big scenes through Redis: bytes moved, time and peak memory of every process. Prints a table.

    python bench/transfer.py [--files 12 --mib 256] [--dir DIR] [--keep]

A scene of FILES random textures of MIB MiB each (12 × 256 MiB ≈ 3 GiB; random bytes, so
nothing compresses or repeats) named by one OBJ's material file is:

1. submitted (`transfer.upload_shot`, as `lampyr submit` does);
2. fetched by the head into a job folder (`FileCache.materialise`, as the `submit` command does), then by
   two workers at once, each with its own cache folder (two machines' caches);
3. submitted again unchanged, then again with one texture rewritten, and fetched again by the
   head and both workers.

Each step runs in fresh processes, which report their own wall time, the payload bytes they sent
or fetched, their resident memory after imports and their peak (getrusage ru_maxrss). Redis's own
counters (INFO stats total_net_input_bytes / total_net_output_bytes, reset before each step) give
the bytes that crossed the wire; the embedded Redis runs as the head runs it (append-only file,
fsync every second), and its memory is reported at the end. Needs about 6 × the scene's size of
free disk under DIR (scene, Redis's append-only file, the head's and two workers' caches);
everything is removed at the end unless --keep.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "bench"))

from tables import print_table  # noqa: E402

MiB = 1024**2


def rss_kib(field: str = "VmRSS") -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1])
    return 0


def child(args) -> None:
    """One process of one step; prints one JSON line."""
    import redis

    from lampyr.engine.shot import load_shot
    from lampyr.scheduler.transfer import upload_shot
    from lampyr.worker.cache import FileCache

    r = redis.Redis.from_url(args.url)
    r.ping()
    base = rss_kib()
    t0 = time.perf_counter()
    if args.child == "submit":
        sha, _, sent = upload_shot(r, load_shot(Path(args.shot)))
        moved, out = sent.new_bytes, {"sha": sha, "chunks": sent.chunks,
                                      "new_chunks": sent.new_chunks}
    else:
        dest = Path(args.dest) if args.dest else None
        got = FileCache(Path(args.cache)).materialise(r, args.sha, dest=dest)
        moved, out = got.bytes, {"files": got.files}
    seconds = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    print(json.dumps(dict(out, seconds=seconds, moved=moved, base_kib=base, peak_kib=peak)))


def run_children(specs: list[list[str]]) -> list[dict]:
    """Start the given child argument lists at once; wait; their JSON reports."""
    procs = [subprocess.Popen([sys.executable, __file__, *spec], stdout=subprocess.PIPE,
                              cwd=ROOT) for spec in specs]
    outs = []
    for p in procs:
        text, _ = p.communicate()
        if p.returncode != 0:
            raise SystemExit(f"a child failed: {specs[procs.index(p)]}")
        outs.append(json.loads(text.decode().strip().splitlines()[-1]))
    return outs


def write_random(path: Path, size: int, seed: int) -> None:
    import numpy as np

    rng = np.random.default_rng(seed)
    with open(path, "wb") as fh:
        left = size
        while left:
            n = min(left, 16 * MiB)
            fh.write(rng.bytes(n))
            left -= n


def make_scene(folder: Path, files: int, size: int) -> Path:
    tex = folder / "tex"
    tex.mkdir(parents=True)
    mtl = []
    for i in range(files):
        write_random(tex / f"t{i:02d}.png", size, seed=i)
        mtl.append(f"newmtl m{i}\nmap_Kd tex/t{i:02d}.png\n")
    (folder / "set.mtl").write_text("".join(mtl))
    (folder / "set.obj").write_text("mtllib set.mtl\nv 0 0 0\nv 1 0 0\nv 0 1 0\nusemtl m0\n"
                                    "f 1 2 3\n")
    shot = folder / "big.toml"
    shot.write_text("""name = "big"
frames = [1, 1]
[image]
width = 16
height = 16
[sampling]
samples = 1
[camera]
position = [0.0, 0.0, 3.0]
target = [0.0, 0.0, 0.0]
fov = 40.0
[environment]
color = [0.5, 0.5, 0.5]
[[material]]
name = "white"
type = "diffuse"
color = [0.7, 0.7, 0.7]
[[object]]
name = "set"
material = "white"
mesh = "set.obj"
""")
    return shot


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--files", type=int, default=12)
    ap.add_argument("--mib", type=int, default=256)
    ap.add_argument("--dir", type=Path, default=None, help="work folder (default: a temp folder)")
    ap.add_argument("--keep", action="store_true")
    ap.add_argument("--child", choices=["submit", "fetch"], help=argparse.SUPPRESS)
    ap.add_argument("--url", help=argparse.SUPPRESS)
    ap.add_argument("--shot", help=argparse.SUPPRESS)
    ap.add_argument("--sha", help=argparse.SUPPRESS)
    ap.add_argument("--cache", help=argparse.SUPPRESS)
    ap.add_argument("--dest", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        return child(args)

    import redis

    from lampyr.scheduler.redis_server import EmbeddedRedis

    size = args.mib * MiB
    scene_bytes = args.files * size
    base = Path(args.dir) if args.dir else Path(tempfile.gettempdir())
    base.mkdir(parents=True, exist_ok=True)
    free = shutil.disk_usage(base).free
    need = 6 * scene_bytes + 2 * size + 1024 * MiB
    if free < need:
        raise SystemExit(f"{base}: {free / 1e9:.1f} GB free, this run needs {need / 1e9:.1f} GB")
    work = Path(tempfile.mkdtemp(prefix="lampyr-transfer-", dir=base))
    server = None
    rows = []
    try:
        t0 = time.perf_counter()
        shot = make_scene(work / "scene", args.files, size)
        made = time.perf_counter() - t0
        server = EmbeddedRedis(work / "redis").start()
        r = redis.Redis.from_url(server.url)
        common = ["--url", server.url]

        def step(name: str, specs: list[tuple[str, list[str]]]) -> list[dict]:
            r.config_resetstat()
            t = time.perf_counter()
            outs = run_children([common + s for _, s in specs])
            wall = time.perf_counter() - t
            stats = r.info("stats")
            wire_in, wire_out = stats["total_net_input_bytes"], stats["total_net_output_bytes"]
            for (who, _), o in zip(specs, outs):
                rows.append([name, who, f"{o['seconds']:.1f}", f"{o['moved'] / MiB:.1f}",
                             f"{wire_in / MiB:.1f}", f"{wire_out / MiB:.1f}",
                             f"{o['base_kib'] / 1024:.0f}", f"{o['peak_kib'] / 1024:.0f}"])
            rows[-len(specs)][0] = f"{name} ({wall:.1f} s)"
            for row in rows[len(rows) - len(specs) + 1:]:
                row[0] = ""
            return outs

        def fetchers(sha: str, job: str) -> None:
            step("head fetches", [("head", ["--child", "fetch", "--sha", sha,
                                            "--cache", str(work / "head" / "cache"),
                                            "--dest", str(work / "head" / job)])])
            step("2 workers fetch", [(f"worker {w}", ["--child", "fetch", "--sha", sha,
                                                      "--cache", str(work / f"worker-{w}")])
                                     for w in ("A", "B")])

        sub = ["--child", "submit", "--shot", str(shot)]
        first = step("submit", [("submitter", sub)])[0]["sha"]
        fetchers(first, "job1")
        assert step("submit unchanged", [("submitter", sub)])[0]["sha"] == first
        write_random(shot.parent / "tex" / f"t{args.files // 2:02d}.png", size, seed=1000)
        second = step("submit, 1 changed", [("submitter", sub)])[0]["sha"]
        fetchers(second, "job2")
        mem = r.info("memory")
        print(f"scene: {args.files} files × {args.mib} MiB = {scene_bytes / MiB:.0f} MiB "
              f"(written in {made:.1f} s); chunks of 16 MiB")
        print_table("Transfers (moved: payload the process sent or fetched, its own count; wire: "
                    "bytes Redis received / sent during the step, INFO stats)",
                    ["step", "process", "seconds", "moved MiB", "wire in MiB", "wire out MiB",
                     "RSS after imports MiB", "peak RSS MiB"], rows)
        hwm = 0
        for line in Path(f"/proc/{server.proc.pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                hwm = int(line.split()[1])
        print(f"\nRedis: used_memory {int(mem['used_memory']) / MiB:.0f} MiB, peak "
              f"{int(mem['used_memory_peak']) / MiB:.0f} MiB; redis-server peak RSS "
              f"{hwm / 1024:.0f} MiB; {r.dbsize()} keys")
    finally:
        if server is not None:
            server.stop()
        if args.keep:
            print(f"kept {work}")
        else:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
