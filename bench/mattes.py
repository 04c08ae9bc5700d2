"""ID mattes: what they cost. Prints tables; never asserts.

    python bench/mattes.py [--small] [--spp N]

Sections:
  1. render time of the courtyard without ID mattes against both kinds (object, material), side
     by side in one run, best of 3 each, alternating
  2. the head's work per 64 px tile result (decode the float32 bytes, merge into the tile's
     float64 film, encode it for the disk) and per frame (assemble the tiles, write the EXR),
     with and without ID mattes
  3. a 1920 × 1080 frame: the frame file's size (ZIP; measured by writing it, at --spp samples),
     the head's disk per frame (tile accumulators) and the results on the wire (from the format)
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "examples" / "courtyard" / "courtyard.toml"
sys.path.insert(0, str(Path(__file__).resolve().parent))
from tables import print_table  # noqa: E402  (bench/ is run as scripts, not a package)


def shots(w: int, h: int, spp: int):
    """(plain courtyard, the same with both ID matte kinds)."""
    from lampyr.engine.shot import load_shot, parse_shot

    plain = load_shot(DEMO).with_overrides(width=w, height=h, samples=spp)
    raw = dict(plain.raw)
    raw["output"] = dict(raw.get("output", {}), id_mattes=["object", "material"])
    return plain, parse_shot(raw, root=plain.root, path=plain.path)


def render_times(small: bool) -> None:
    from lampyr.engine.compiler import compile_geometry
    from lampyr.engine.render import FrameRenderer, Tile

    w, h, spp = (80, 45, 4) if small else (160, 90, 16)
    plain, matted = shots(w, h, spp)
    best, renderers = {}, {}
    for label, shot in (("none", plain), ("object + material", matted)):
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
    rows = [[label, f"{w}x{h}x{spp}", f"{best[label]:.2f}", f"{best[label] / base:.3f}"]
            for label in renderers]
    print_table(f"1. courtyard frame 12, render time (best of 3; load average "
                f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} cores)",
                ["ID mattes", "pixels x spp", "seconds", "ratio"], rows)


def head_work(films: dict, w: int, h: int) -> None:
    """films: label -> a whole frame's film. Times the head's steps on its 64 px tiles."""
    from lampyr.engine.exr import write_frame
    from lampyr.engine.film import Film, from_bytes, merge, to_bytes
    from lampyr.engine.render import tiles_for

    rows = []
    tiles = tiles_for(w, h, 64)
    for label, film in films.items():
        parts = []
        for t in tiles:
            part = Film.zeros(t.h, t.w, film.layer_names, film.matte_kinds)
            part.add_into(_crop(film, t), 0, 0)
            parts.append(part)
        wire = [to_bytes(p, bits=32) for p in parts]
        t0 = time.perf_counter()
        for acc, data in zip(parts, wire):  # a result merged into a tile holding as much
            to_bytes(merge(acc, from_bytes(data)))
        per_tile = (time.perf_counter() - t0) / len(parts)
        t0 = time.perf_counter()
        frame = Film.zeros(h, w, film.layer_names, film.matte_kinds)
        for t, p in zip(tiles, parts):
            frame.add_into(p, t.y0, t.x0)
        assemble = time.perf_counter() - t0
        with tempfile.TemporaryDirectory() as tmp:
            t0 = time.perf_counter()
            write_frame(Path(tmp) / "f.exr", frame, {"frame": 12})
            write = time.perf_counter() - t0
        rows.append([label, f"{per_tile * 1e3:.1f}", f"{assemble:.2f}", f"{write:.2f}"])
    print_table(f"2. the head's work, {w}x{h} frame in 64 px tiles (one thread)",
                ["ID mattes", "ms per tile result (decode, merge, encode)", "s to assemble a frame",
                 "s to write its EXR"], rows)


def _crop(film, t):
    from lampyr.engine.film import FIELDS, Film

    sl = (slice(t.y0, t.y0 + t.h), slice(t.x0, t.x0 + t.w))
    return Film(**{f: getattr(film, f)[sl].copy() for f in FIELDS}, layers=film.layers[sl].copy(),
                layer_names=film.layer_names, matte_ids=film.matte_ids[sl].copy(),
                matte_cov=film.matte_cov[sl].copy(), matte_kinds=film.matte_kinds)


def frame_size(small: bool, spp: int) -> dict:
    from lampyr.engine.exr import write_frame
    from lampyr.engine.film import FIELDS, Film, to_bytes
    from lampyr.engine.mattes import manifest
    from lampyr.engine.render import render_frame, tiles_for
    from lampyr.scheduler.accumulator import MAGIC

    w, h = (480, 270) if small else (1920, 1080)
    plain, matted = shots(w, h, spp)
    t0 = time.perf_counter()
    film = render_frame(matted, 12, 0, spp)
    seconds = time.perf_counter() - t0
    bare = Film(**{f: getattr(film, f) for f in FIELDS})
    films = {"none": bare, "object + material": film}
    rows = []
    names = manifest(matted)
    with tempfile.TemporaryDirectory() as tmp:
        for label, f in films.items():
            path = Path(tmp) / "f.exr"
            write_frame(path, f, {"shot": "courtyard", "frame": 12}, manifest=names)
            exr = path.stat().st_size
            disk = 0
            for tile in tiles_for(w, h, 64):  # the head's tile accumulators (accumulator.py)
                head = json.dumps({"ranges": [[0, 1]], "w": tile.w, "h": tile.h, "noise": 0.123456}).encode()
                disk += len(MAGIC) + 4 + len(head) + len(
                    to_bytes(Film.zeros(tile.h, tile.w, (), f.matte_kinds)))
            wire = len(to_bytes(Film.zeros(h, w, (), f.matte_kinds), bits=32))
            rows.append([label, f"{w}x{h}", f"{exr / 1e6:.1f}", f"{disk / 1e6:.0f}", f"{wire / 1e6:.0f}"])
    seen = (film.matte_cov[:, :, 0] > 0).sum(-1)
    print_table(f"3. one frame ({spp} spp render: {seconds:.1f} s; pixels seeing 2+ objects: "
                f"{(seen >= 2).mean() * 100:.1f} %, more than 6: {(seen > 6).sum()})",
                ["ID mattes", "size", "EXR MB (ZIP)", "head disk MB (64 px tiles)",
                 "results on the wire MB (float32)"], rows)
    return films


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--small", action="store_true", help="a quick look at small sizes")
    ap.add_argument("--spp", type=int, default=2, help="samples of the frame of section 3")
    args = ap.parse_args()
    render_times(args.small)
    films = frame_size(args.small, args.spp)
    w = 480 if args.small else 1920
    h = 270 if args.small else 1080
    head_work(films, w, h)


if __name__ == "__main__":
    main()
