"""Engine benchmark: prints tables; compares side by side in one run (ratios), never asserts.

    python bench/engine.py [--small]

Sections:
  1. kernel start-up: compile cold (empty cache folder) vs load from the cache, in fresh processes
  2. courtyard: samples/s with one thread and with all cores; the same on a 1.3 M-triangle mesh
     seen from outside, and from inside it (a closed room: every bounce hits the mesh)
  3. sampler quality: mean squared error at equal samples, Owen-scrambled Sobol vs independent
  4. ray casting and BVH build against Embree (bench/rays.py)
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "examples" / "courtyard" / "courtyard.toml"
sys.path.insert(0, str(Path(__file__).resolve().parent))
from tables import print_table  # noqa: E402  (bench/ is run as scripts, not a package)


THREAD_HEADER = ["threads", "pixels x spp", "seconds", "k samples/s", "speed-up"]


def thread_rows(renderer, w: int, h: int, spp: int) -> list[list]:
    """Render the whole w × h image at spp with one thread and with all; a table row each."""
    import numba

    from lampyr.engine.render import Tile

    renderer.render(Tile(0, 0, 4, 4), 0, 1)  # load the kernels first
    all_threads = numba.config.NUMBA_NUM_THREADS
    rows, base = [], None
    for threads in sorted({1, all_threads}):
        numba.set_num_threads(threads)
        t0 = time.perf_counter()
        film = renderer.render(Tile(0, 0, w, h), 0, spp)
        dt = time.perf_counter() - t0
        rate = film.n.sum() / dt
        base = base or rate
        rows.append([threads, f"{w}x{h}x{spp}", f"{dt:.2f}", f"{rate / 1e3:,.0f}", f"{rate / base:.2f}"])
    numba.set_num_threads(all_threads)
    return rows


def startup() -> None:
    code = ("import time; t=time.perf_counter(); from lampyr.engine.render import warm_up; "
            "warm_up(); print(time.perf_counter()-t)")
    rows = []
    with tempfile.TemporaryDirectory() as cold:
        for label, env in (("cold (empty cache)", {"LAMPYR_CACHE": cold}), ("cached", {"LAMPYR_CACHE": cold})):
            e = dict(os.environ, **env)
            e.pop("NUMBA_CACHE_DIR", None)
            t0 = time.perf_counter()
            out = subprocess.run([sys.executable, "-c", code], env=e, capture_output=True, text=True, check=True)
            total = time.perf_counter() - t0
            rows.append([label, f"{float(out.stdout.strip()):.2f}", f"{total:.2f}"])
    print_table("1. kernel start-up (seconds)", ["case", "import→first sample", "whole process"], rows)


def courtyard(small: bool) -> None:
    from lampyr.engine.compiler import compile_geometry
    from lampyr.engine.render import FrameRenderer
    from lampyr.engine.shot import load_shot

    w, h = (80, 45) if small else (320, 180)
    spp = 4 if small else 16
    shot = load_shot(DEMO).with_overrides(width=w, height=h, samples=spp)
    geom = compile_geometry(shot)
    renderer = FrameRenderer(shot, 12, geom)
    print_table("2. courtyard frame 12 (triangles: %d)" % geom.triangle_count, THREAD_HEADER,
          thread_rows(renderer, w, h, spp))


def icosphere_rows(small: bool, radius: float, shot_text) -> tuple:
    """Render an icosphere of 1.31 M triangles (82 k with small), written as `mesh.ply` beside
    the shot shot_text(w, h, spp) makes, with one thread and with all: (triangles, scene set-up
    seconds, thread_rows)."""
    import trimesh

    from lampyr.engine.render import FrameRenderer
    from lampyr.engine.shot import load_shot

    subdiv = 6 if small else 8
    w, h, spp = (64, 36, 4) if small else (320, 180, 16)
    with tempfile.TemporaryDirectory() as tmp:
        trimesh.creation.icosphere(subdivisions=subdiv, radius=radius).export(Path(tmp) / "mesh.ply")
        (Path(tmp) / "shot.toml").write_text(shot_text(w, h, spp))
        shot = load_shot(Path(tmp) / "shot.toml")
        t0 = time.perf_counter()
        renderer = FrameRenderer(shot, 1)
        setup = time.perf_counter() - t0
        return renderer.geometry.triangle_count, setup, thread_rows(renderer, w, h, spp)


def big_mesh(small: bool) -> None:
    """Samples/s of the full integrator on a ~1.3 M-triangle mesh (an icosphere on a floor)."""
    tris, setup, rows = icosphere_rows(small, 1.0, lambda w, h, spp: f"""
name = "big"
frames = 1
[image]
width = {w}
height = {h}
[sampling]
samples = {spp}
[camera]
position = [0, 1.2, 4]
target = [0, 0.8, 0]
[environment]
color = [0.4, 0.45, 0.55]
[[material]]
name = "clay"
type = "diffuse"
color = [0.7, 0.5, 0.4]
[[material]]
name = "brass"
type = "metal"
color = [0.9, 0.7, 0.4]
roughness = 0.3
[[object]]
name = "ball"
material = "brass"
mesh = "mesh.ply"
translate = [0, 1, 0]
[[object]]
name = "floor"
material = "clay"
sphere = {{ center = [0, -1000, 0], radius = 1000 }}
""")
    print_table(f"2b. icosphere of {tris:,} triangles (scene set-up {setup:.1f} s)", THREAD_HEADER, rows)


def inside_mesh(small: bool) -> None:
    """Samples/s inside a ~1.3 M-triangle mesh: the camera and a point light in a closed room
    (an icosphere of radius 3 seen from within), so every bounce hits the mesh again, in
    directions that scatter (diffuse walls): the rays of an interior, far from coherent."""
    tris, setup, rows = icosphere_rows(small, 3.0, lambda w, h, spp: f"""
name = "room"
frames = 1
[image]
width = {w}
height = {h}
[sampling]
samples = {spp}
[camera]
position = [0, 0, 1.5]
target = [0, -0.5, -2]
[[material]]
name = "plaster"
type = "diffuse"
color = [0.8, 0.78, 0.75]
[[material]]
name = "brass"
type = "metal"
color = [0.9, 0.7, 0.4]
roughness = 0.3
[[object]]
name = "room"
material = "plaster"
mesh = "mesh.ply"
[[object]]
name = "ball"
material = "brass"
sphere = {{ center = [0.3, -1.8, -1], radius = 0.8 }}
[[light]]
name = "lamp"
type = "point"
position = [0, 2, 0]
intensity = 1.5
""")
    print_table(f"2c. inside an icosphere of {tris:,} triangles (a closed room, diffuse walls, a point light; "
                f"scene set-up {setup:.1f} s)", THREAD_HEADER, rows)


def sampler_quality(small: bool) -> None:
    from lampyr.engine.compiler import compile_geometry
    from lampyr.engine.render import render_frame
    from lampyr.engine.shot import load_shot

    w, h = (48, 27) if small else (96, 54)
    base = load_shot(DEMO).with_overrides(width=w, height=h)
    geom = compile_geometry(base)
    import dataclasses

    ref_spp = 1024 if small else 4096
    ref_shot = dataclasses.replace(base, sampler="random")
    reference = render_frame(ref_shot, 12, 1 << 20, ref_spp, geometry=geom).mean()
    rows = []
    for spp in (16, 64):
        mse = {}
        for mode in ("sobol", "random"):
            s = dataclasses.replace(base, sampler=mode)
            errs = []
            for seed in range(4):  # average over seeds: one image's MSE is itself noisy
                s2 = dataclasses.replace(s, seed=100 + seed)
                errs.append(np.mean((render_frame(s2, 12, 0, spp, geometry=geom).mean() - reference) ** 2))
            mse[mode] = float(np.mean(errs))
        rows.append([spp, f"{mse['sobol']:.3e}", f"{mse['random']:.3e}", f"{mse['random'] / mse['sobol']:.2f}"])
    print_table(f"3. sampler: MSE against a {ref_spp}-spp reference ({w}x{h}, courtyard frame 12)",
          ["spp", "Owen-Sobol", "random", "random/Sobol"], rows)


def rays(small: bool) -> None:
    import rays as rays_bench  # beside this file: on the path since start-up

    rays_bench.main(["--small"] if small else [])


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description="lampyr engine benchmark")
    ap.add_argument("--small", action="store_true", help="quick, smaller sizes")
    ap.add_argument("--only", choices=["startup", "courtyard", "bigmesh", "inside", "sampler", "rays"], default=None)
    args = ap.parse_args(argv)
    sections = {"startup": lambda: startup(), "courtyard": lambda: courtyard(args.small),
                "bigmesh": lambda: big_mesh(args.small), "inside": lambda: inside_mesh(args.small),
                "sampler": lambda: sampler_quality(args.small), "rays": lambda: rays(args.small)}
    for name, fn in sections.items():
        if args.only in (None, name):
            fn()


if __name__ == "__main__":
    main()
