"""Ray casting benchmark: lampyr's BVH against Embree (embreex), side by side in one run.

    python bench/rays.py [--small]

Prints, for one icosphere (subdivisions 8: 1.31 M faces; 6 with --small: 82 k):
  1. BVH build time and peak memory per million triangles, lampyr vs Embree;
  2. Mrays/s for the same rays through both, coherent (a pinhole camera looking at the mesh)
     and incoherent (random origins inside the sphere, random directions), on one thread
     and on all cores, with the ratio lampyr / Embree. lampyr runs three ways: the binary tree
     (bvh.py, the readable reference), the same with SAH termination, and the eight-wide tree
     collapsed from it (wide_bvh.py), which is what the renderer traverses;
  3. Mrays/s of shadow rays (any hit in a segment) through the wide tree and Embree, the
     incoherent rays cut short of their closest hit and past it.

Single-thread rates are taken from process CPU time (best of several interleaved repeats) so a
busy shared machine skews them less; all-core rates from wall time. Embree runs on all cores by
splitting the rays over Python threads (embreex releases the GIL inside `run`). Beside the ratio
of the best rates, the wide tree against Embree is also given as the median and quartiles of the
rounds' own ratios (each round times both one after the other): `--repeats 9` or more for a
steady reading, and several runs apart in time, since the ratio moves with the machine.
"""

from __future__ import annotations

import argparse
import math
import os
import statistics
import sys
import time
from concurrent.futures import ThreadPoolExecutor

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from tables import print_table  # noqa: E402  (bench/ is run as scripts, not a package)


def _rss_kib(field: str) -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    return 0


def peak_traced(fn):
    """(result, seconds, peak bytes of the Python and numpy allocations of fn()): tracemalloc."""
    import tracemalloc

    tracemalloc.start()
    t0 = time.perf_counter()
    out = fn()
    dt = time.perf_counter() - t0
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return out, dt, peak


def peak_rss_delta(fn):
    """(result, seconds, peak resident bytes above the start) of fn(); Linux only.

    Writing 5 to /proc/self/clear_refs resets the high-water mark VmHWM (proc(5))."""
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
        base = _rss_kib("VmRSS")
    except OSError:
        base = None
    t0 = time.perf_counter()
    out = fn()
    dt = time.perf_counter() - t0
    peak = (_rss_kib("VmHWM") - base) * 1024 if base is not None else float("nan")
    return out, dt, peak


def spread(ratios) -> str:
    """'median (lower-upper quartile)' of per-round ratios: on a shared machine the ratio itself
    moves with the memory system's load (this bench has read 0.85 and 1.03 on one afternoon)."""
    if len(ratios) < 2:
        return f"{statistics.median(ratios):.2f}"
    q = statistics.quantiles(ratios, n=4, method="inclusive")
    return f"{q[1]:.2f} ({q[0]:.2f}-{q[2]:.2f})"


def camera_rays(w: int, h: int):
    """A pinhole at (0, 0, 3) looking down -z with a 45° vertical field of view."""
    ys, xs = np.mgrid[0:h, 0:w]
    tan = math.tan(math.radians(22.5))
    d = np.stack([(2 * (xs + 0.5) / w - 1) * tan * w / h, (1 - 2 * (ys + 0.5) / h) * tan,
                  -np.ones((h, w))], -1).reshape(-1, 3)
    o = np.tile([0.0, 0.0, 3.0], (len(d), 1))
    return o, d


def incoherent_rays(n: int, seed: int = 1):
    """Origins uniform in the ball of radius 0.9, directions uniform on the sphere."""
    rng = np.random.default_rng(seed)
    o = rng.normal(size=(n, 3))
    o *= (0.9 * rng.random((n, 1)) ** (1 / 3)) / np.linalg.norm(o, axis=1, keepdims=True)
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    return o, d


def run(report=print_table, small: bool = False, repeats: int = 3) -> dict:
    """Run the benchmark, handing each table to report(title, header, rows); returns the numbers."""
    import numba
    import trimesh
    from embreex import rtcore_scene as rtcs
    from embreex.mesh_construction import TriangleMesh

    from lampyr.engine.bvh import build_bvh, cast, corner_bounds, pack_triangles
    from lampyr.engine.wide_bvh import collapse_bvh
    from lampyr.engine.wide_traversal import cast_wide

    mesh = trimesh.creation.icosphere(subdivisions=6 if small else 8)
    v = np.asarray(mesh.vertices, np.float64)
    f = np.asarray(mesh.faces, np.int64)
    n_tri = len(f)
    warm = build_bvh(*corner_bounds(v[f[:64]]))  # compile / load kernels first
    build_bvh(*corner_bounds(v[f[:64]]), subtree_size=16)  # and the subtrees built side by side
    cast(warm, pack_triangles(v, f[:64], warm.order), np.zeros((1, 3)), np.ones((1, 3)),
         np.empty(1), np.empty(1, np.int64))
    cast_wide(collapse_bvh(warm), pack_triangles(v, f[:64], warm.order), np.zeros((1, 3)), np.ones((1, 3)),
              np.empty(1), np.empty(1, np.int64))

    tri32 = v[f].astype(np.float32)

    def embree_build():
        scene = rtcs.EmbreeScene()
        TriangleMesh(scene, tri32)
        scene.run(np.zeros((1, 3), np.float32), np.ones((1, 3), np.float32), query="DISTANCE")
        return scene  # the first query commits (builds) the scene

    # Embree allocates in C++, out of tracemalloc's sight: its peak is the rise of the resident
    # set, taken first, before lampyr's builds leave freed pages behind for reuse
    scene, e_build, e_mem = peak_rss_delta(embree_build)

    # the default build, and one with SAH termination (bvh.build_bvh: max_leaf, trav_cost)
    configs = {"lampyr": {}, "lampyr+term": {"max_leaf": 16, "trav_cost": 4.0}}
    trees, build_rows = {}, []
    per_m = 1e6 / n_tri
    for name, kw in configs.items():
        def lampyr_build(kw=kw):
            b = build_bvh(*corner_bounds(v[f]), **kw)  # as engine/mesh_table.py builds a mesh's tree
            return b, pack_triangles(v, f, b.order)

        t0 = time.perf_counter()
        bvh, tris = lampyr_build()
        t_build = time.perf_counter() - t0
        _, _, mem = peak_traced(lampyr_build)  # again: tracing slows allocation down
        trees[name] = (bvh, tris)
        kept = sum(x.nbytes for x in bvh) + tris.nbytes
        build_rows.append([name, f"{t_build:.2f}", f"{mem * per_m / 2**20:.0f}",
                           f"{kept * per_m / 2**20:.0f}", f"{len(bvh.lo):,}"])
        if name == "lampyr":
            numbers = {"build_s": t_build, "build_peak_bytes_per_tri": mem / n_tri}
    # the renderer's tree: the terminated binary one collapsed eight-wide (its order and
    # triangles are the binary tree's; the renderer keeps only the wide nodes and triangles)
    bvh, tris = trees["lampyr+term"]
    t0 = time.perf_counter()
    wide = collapse_bvh(bvh)
    t_collapse = time.perf_counter() - t0
    kept = wide.box.nbytes + wide.span.nbytes + tris.nbytes + bvh.order.nbytes
    build_rows.append(["lampyr wide", f"{build_rows[1][1]} + {t_collapse:.2f}", "-",
                       f"{kept * per_m / 2**20:.0f}", f"{len(wide.box):,}"])
    numbers["wide_build_s"] = float(build_rows[1][1]) + t_collapse
    numbers["wide_kept_bytes_per_tri"] = kept / n_tri
    build_rows.append(["Embree", f"{e_build:.2f}", f"{e_mem * per_m / 2**20:.0f}", "-", "-"])
    report(f"1. build over {n_tri:,} triangles (icosphere, from float64 vertices and faces); "
           "lampyr+term: max_leaf=16, trav_cost=4; lampyr wide: lampyr+term collapsed (build + collapse s); "
           "peak: tracemalloc (lampyr), resident set (Embree)",
           ["library", "build s", "peak MB / M tris", "kept MB / M tris", "nodes"], build_rows)

    side = 256 if small else 640
    sets = {"coherent (camera)": camera_rays(side, side),
            "incoherent (inside)": incoherent_rays(50_000 if small else 400_000)}
    threads = numba.config.NUMBA_NUM_THREADS
    rows = []
    for label, (o, d) in sets.items():
        n = len(o)
        o32, d32 = o.astype(np.float32), d.astype(np.float32)
        t_out, k_out = np.empty(n), np.empty(n, np.int64)
        for nt in sorted({1, threads}):
            numba.set_num_threads(nt)
            clock = time.process_time if nt == 1 else time.perf_counter
            parts = np.array_split(np.arange(n), nt)
            best = dict.fromkeys([*trees, "wide", "Embree"], math.inf)
            pairs = []  # Embree's time / the wide tree's, round by round
            with ThreadPoolExecutor(nt) as pool:
                for _ in range(repeats):  # interleaved, so a busy spell hits all alike
                    for name, (bvh, tris) in trees.items():
                        c0 = clock()
                        cast(bvh, tris, o, d, t_out, k_out)
                        best[name] = min(best[name], clock() - c0)
                    c0 = clock()
                    cast_wide(wide, trees["lampyr+term"][1], o, d, t_out, k_out)
                    t_wide = clock() - c0
                    best["wide"] = min(best["wide"], t_wide)
                    c0 = clock()
                    te = np.concatenate(list(pool.map(
                        lambda p: scene.run(o32[p], d32[p], query="DISTANCE"), parts)))
                    t_embree = clock() - c0
                    best["Embree"] = min(best["Embree"], t_embree)
                    pairs.append(t_embree / t_wide)
            rate = {k: n / x / 1e6 for k, x in best.items()}
            numbers[f"{label} wide {nt}t median ratio"] = statistics.median(pairs)
            agree = float(((k_out >= 0) == (te < 1e36)).mean())
            for name in [*trees, "wide"]:
                numbers[f"{label} {name} {nt}t ratio"] = rate[name] / rate["Embree"]
            rows.append([label, nt, f"{n:,}", f"{rate['lampyr']:.2f}", f"{rate['lampyr+term']:.2f}",
                         f"{rate['wide']:.2f}", f"{rate['Embree']:.2f}", f"{rate['lampyr'] / rate['Embree']:.2f}",
                         f"{rate['lampyr+term'] / rate['Embree']:.2f}", f"{rate['wide'] / rate['Embree']:.2f}",
                         spread(pairs), f"{rate['wide'] / rate['lampyr+term']:.2f}",
                         f"{(k_out >= 0).mean():.2f}", f"{agree:.5f}"])
        numba.set_num_threads(threads)
    report("2. closest-hit Mrays/s (single thread: CPU time; all cores: wall time)",
           ["rays", "threads", "count", "lampyr", "lampyr+term", "wide", "Embree", "lampyr/Embree",
            "+term/Embree", "wide/Embree", "same, median (quartiles) of rounds", "wide/+term", "hit fraction",
            "same hit/miss"], rows)
    report("3. shadow rays (any hit), Mrays/s: the incoherent rays above cut just short of their closest "
           "hit (a light in sight: the whole way is searched) and just past it (blocked)",
           ["rays", "threads", "count", "wide", "Embree", "wide/Embree", "same, median (quartiles) of rounds", "blocked fraction",
            "same answer"],
           shadow_rows(wide, trees["lampyr+term"][1], scene, *sets["incoherent (inside)"], threads, repeats,
                       numbers))
    return numbers


def shadow_rows(wide, tris, scene, o, d, threads: int, repeats: int, numbers: dict) -> list[list]:
    """Table rows of shadow rays through the wide tree and Embree; fills numbers."""
    import numba

    from lampyr.engine.wide_traversal import cast_wide, cast_wide_occluded

    n = len(o)
    t, k = np.empty(n), np.empty(n, np.int64)
    cast_wide(wide, tris, o, d, t, k)
    o32, d32 = o.astype(np.float32), d.astype(np.float32)
    rows = []
    for label, scale in (("incoherent, in sight", 0.999), ("incoherent, blocked", 1.001)):
        tmax = np.where(k >= 0, t * scale, 1e30)
        tmax32 = tmax.astype(np.float32)
        out = np.empty(n, np.bool_)
        for nt in sorted({1, threads}):
            numba.set_num_threads(nt)
            clock = time.process_time if nt == 1 else time.perf_counter
            parts = np.array_split(np.arange(n), nt)
            best = {"wide": math.inf, "Embree": math.inf}
            pairs = []
            with ThreadPoolExecutor(nt) as pool:
                for _ in range(repeats):
                    c0 = clock()
                    cast_wide_occluded(wide, tris, o, d, tmax, out)
                    t_wide = clock() - c0
                    best["wide"] = min(best["wide"], t_wide)
                    c0 = clock()
                    ge = np.concatenate(list(pool.map(
                        lambda p: scene.run(o32[p], d32[p], dists=tmax32[p], query="OCCLUDED"), parts)))
                    t_embree = clock() - c0
                    best["Embree"] = min(best["Embree"], t_embree)
                    pairs.append(t_embree / t_wide)
            rate = {key: n / x / 1e6 for key, x in best.items()}
            numbers[f"shadow {label} wide {nt}t ratio"] = rate["wide"] / rate["Embree"]
            numbers[f"shadow {label} wide {nt}t median ratio"] = statistics.median(pairs)
            rows.append([label, nt, f"{n:,}", f"{rate['wide']:.2f}", f"{rate['Embree']:.2f}",
                         f"{rate['wide'] / rate['Embree']:.2f}", spread(pairs), f"{out.mean():.2f}",
                         f"{(out == (ge >= 0)).mean():.5f}"])
        numba.set_num_threads(threads)
    return rows


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description="lampyr ray casting benchmark against Embree")
    ap.add_argument("--small", action="store_true", help="82 k triangles and fewer rays")
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args(argv)
    print(f"cores: {os.cpu_count()}")
    run(small=args.small, repeats=args.repeats)


if __name__ == "__main__":
    main()
