"""Light-path layers and light groups: what they cost. Prints tables; never asserts.

    python bench/layers.py [--small]

Sections:
  1. render time of the courtyard with no layers against all seven light-path layers and three
     light groups (sky, the candle's wax, the flame), side by side in one run, best of 3 each,
     alternating (goal: at most 1.15×)
  2. a 1920 × 1080 frame with all layers and three groups: the frame file's size (1 spp, ZIP;
     measured by writing it) and the head's disk per frame (tile accumulators, from their format)
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "examples" / "courtyard" / "courtyard.toml"
sys.path.insert(0, str(Path(__file__).resolve().parent))
from tables import print_table  # noqa: E402  (bench/ is run as scripts, not a package)

ALL_LAYERS = ["diffuse_direct", "diffuse_indirect", "specular_direct", "specular_indirect",
              "transmission", "emission", "background"]


def shots(w: int, h: int, spp: int):
    """(plain courtyard, the same with every layer and three light groups)."""
    from lampyr.engine.shot import load_shot

    plain = load_shot(DEMO).with_overrides(width=w, height=h, samples=spp)
    raw = dict(plain.raw)
    raw["environment"] = dict(raw["environment"], group="sky")
    raw["output"] = {"layers": ALL_LAYERS, "light_groups": True,
                     "groups": {"candle": "wax", "flame": "flame"}}
    from lampyr.engine.shot import parse_shot

    layered = parse_shot(raw, root=plain.root, path=plain.path)
    return plain, layered


def render_times(small: bool) -> None:
    from lampyr.engine.compiler import compile_geometry
    from lampyr.engine.render import FrameRenderer, Tile

    w, h, spp = (80, 45, 4) if small else (320, 180, 16)
    plain, layered = shots(w, h, spp)
    rows, best = [], {}
    renderers = {}
    for label, shot in (("none", plain), ("7 layers + 3 groups", layered)):
        r = FrameRenderer(shot, 12, compile_geometry(shot))
        r.render(Tile(0, 0, 4, 4), 0, 1)  # kernels loaded before timing
        renderers[label] = r
    for _ in range(3):
        for label, r in renderers.items():
            t0 = time.perf_counter()
            film = r.render(Tile(0, 0, w, h), 0, spp)
            best[label] = min(best.get(label, 1e9), time.perf_counter() - t0)
            assert film.n.sum() > 0
    base = best["none"]
    for label, r in renderers.items():
        rows.append([label, len(r.layer_names), f"{w}x{h}x{spp}", f"{best[label]:.2f}",
                     f"{best[label] / base:.3f}"])
    load = os.getloadavg()[0]
    print_table(f"1. courtyard frame 12, render time (best of 3; load average {load:.1f} on "
                f"{os.cpu_count()} cores)", ["layers", "K", "pixels x spp", "seconds", "ratio"], rows)


def frame_size(small: bool) -> None:
    import json

    from lampyr.engine.exr import write_frame
    from lampyr.engine.film import Film, to_bytes
    from lampyr.engine.render import render_frame, tiles_for
    from lampyr.scheduler.accumulator import MAGIC

    w, h = (480, 270) if small else (1920, 1080)
    plain, layered = shots(w, h, 1)
    t0 = time.perf_counter()
    film = render_frame(layered, 12, 0, 1)
    seconds = time.perf_counter() - t0
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        bare = Film(**{f: getattr(film, f) for f in
                       ("n", "rgb_sum", "rgb_sq", "alpha_sum", "albedo_sum", "normal_sum",
                        "depth_sum", "hits", "dropped")})
        for label, f in (("none", bare), (f"{len(film.layer_names)} layers", film)):
            path = Path(tmp) / "f.exr"
            write_frame(path, f, {"shot": "courtyard", "frame": 12})
            exr = path.stat().st_size
            disk = 0
            for tile in tiles_for(w, h, 64):  # the head's tile accumulators (accumulator.py)
                head = json.dumps({"ranges": [[0, 1]], "w": tile.w, "h": tile.h, "noise": 0.123456}).encode()
                names = f.layer_names
                disk += len(MAGIC) + 4 + len(head) + len(to_bytes(Film.zeros(tile.h, tile.w, names)))
            wire = len(to_bytes(Film.zeros(h, w, f.layer_names), bits=32))
            rows.append([label, f"{w}x{h}", f"{exr / 1e6:.1f}", f"{disk / 1e6:.0f}", f"{wire / 1e6:.0f}"])
    print_table(f"2. one frame with all layers and three light groups (1 spp render: {seconds:.1f} s)",
                ["layers", "size", "EXR MB (ZIP, 1 spp)", "head disk MB (64 px tiles)",
                 "results on the wire MB (float32)"], rows)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--small", action="store_true", help="a quick look at small sizes")
    args = ap.parse_args()
    render_times(args.small)
    frame_size(args.small)


if __name__ == "__main__":
    main()
