"""A noise goal for the denoised frame: does spending samples where the denoised error is highest
beat spending them evenly, at equal samples? And what the odd half-frame costs. Prints tables;
never asserts.

    python bench/denoised_noise.py [--seeds K] [--size WxH] [--reference N] [--no-cost]
                                   [--only-cost]

Sections:
  1. per scene (the demo, examples/courtyard, frame 1; and "bounce", a mostly indirectly lit
     room of spheres): K independent renders (seeds 1..K) of the same budget spent two ways,
       uniform   every pixel at 20 spp;
       targeted  every pixel at 8 spp, each 16 px tile's denoised error estimated
                 (engine/dual_buffer.py) and the tiles raised
                   in proportion:  as `refine --denoised-noise E` raises them (`tile_targets`),
                                   with E as low as the budget allows (at most 20 spp on average)
                   top half to 32: all or nothing, the half with the highest errors to 32 spp
                                   (8 + 24 / 2 = 20 on average when the tiles are equal);
     both denoised as the frame files are; the error is the relative RMSE of the denoised frame
     against an independent N-spp render (another seed), the reference's own variance of the
     mean taken away (as tests/engine/test_denoise.py measures it); mean and standard error
     over the K renders, and their paired difference
  2. what the odd half costs: bytes per pixel on the wire and on the head's disk (from the
     film format), the frame file's size with and without its oddhalf channels (ZIP, written),
     and the time to denoise one 1920 x 1080 frame against its two halves (best of 2)
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "examples" / "courtyard" / "courtyard.toml"
sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(ROOT))
from tables import print_table  # noqa: E402  (bench/ is run as scripts, not a package)

from tests.engine.test_denoise import NOISY_SHOT, relative_rmse  # noqa: E402  (one scene, one measure)

BASE, UNIFORM, TILE = 8, 20, 16  # spp: the first pass, uniform; tile edge
POLICIES = ("in proportion", "top half to 32")

# the denoising tests' mostly indirectly lit room (tests/engine/test_denoise.py), 48 rows so the
# 16 px tiles cover it evenly
BOUNCE = NOISY_SHOT.replace("height = 54", "height = 48")


def all_ways(shot, seed: int):
    """{policy name or "uniform": film} of one seed, at equal total samples."""
    from lampyr.engine.dual_buffer import tile_errors, tile_targets
    from lampyr.engine.render import FrameRenderer, tiles_for

    shot = dataclasses.replace(shot, seed=seed)
    renderer = FrameRenderer(shot, 1)
    tiles = tiles_for(shot.width, shot.height, TILE)
    base = frame(renderer, tiles, 0, BASE)
    errors = tile_errors(base, tiles)
    pixels = np.array([t.w * t.h for t in tiles], float)
    out = {"uniform": frame(renderer, tiles, 0, UNIFORM)}
    half = np.zeros(len(tiles), np.int64) + BASE
    half[np.argsort(-errors)[:len(tiles) // 2]] = 32
    plans = {"in proportion": tile_targets(errors, BASE, goal_for_budget(errors, pixels), 10**6),
             "top half to 32": half}
    for name in POLICIES:
        film = base.copy()
        for t, n in zip(tiles, plans[name]):
            if n > BASE:
                film.add_into(renderer.render(t, BASE, int(n) - BASE), t.y0, t.x0)
        out[name] = film
    return out


def goal_for_budget(errors, pixels) -> float:
    """The lowest goal whose `tile_targets` spend at most UNIFORM spp on average (bisection on
    the goal's logarithm)."""
    from lampyr.engine.dual_buffer import tile_targets

    def spent(goal):
        return float(np.sum(tile_targets(errors, BASE, goal, 10**6) * pixels) / np.sum(pixels))

    lo, hi = np.log(np.min(errors)) - 10, np.log(np.max(errors)) + 1
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        lo, hi = (lo, mid) if spent(np.exp(mid)) <= UNIFORM else (mid, hi)
    return float(np.exp(hi))


def frame(renderer, tiles, first, count):
    from lampyr.engine.film import Film

    film = Film.zeros(renderer.shot.height, renderer.shot.width)
    for t in tiles:
        film.add_into(renderer.render(t, first, count), t.y0, t.x0)
    return film


def compare(seeds: int, w: int, h: int, reference: int) -> None:
    from lampyr.engine.denoise import denoise_film
    from lampyr.engine.render import render_frame
    from lampyr.engine.shot import load_shot, parse_shot_text

    scenes = [("courtyard (demo)", load_shot(DEMO)), ("bounce", parse_shot_text(BOUNCE))]
    rows = []
    head = ["scene", "size", "spp", "renders", "sampling", "denoised error", "uniform − this",
            "this better", "s"]
    for name, shot in scenes:
        shot = shot.with_overrides(width=w, height=h, samples=BASE)
        t0 = time.perf_counter()
        ref = render_frame(dataclasses.replace(shot, seed=99), 1, 0, reference)
        err: dict = {}
        spp: dict = {}
        for seed in range(1, seeds + 1):
            for label, film in all_ways(shot, seed).items():
                err.setdefault(label, []).append(relative_rmse(denoise_film(film), ref))
                spp[label] = float((film.n + film.dropped).mean())
        uni = np.array(err["uniform"])
        se = (lambda a: a.std(ddof=1) / np.sqrt(len(a))) if seeds > 1 else (lambda a: float("nan"))
        part = [[name, f"{w}x{h}", f"{spp['uniform']:.2f}", str(seeds), "uniform",
                 f"{uni.mean():.4f} ± {se(uni):.4f}", "", "", ""]]
        for label in POLICIES:
            e = np.array(err[label])
            d = uni - e
            part.append([name, f"{w}x{h}", f"{spp[label]:.2f}", str(seeds), f"targeted, {label}",
                         f"{e.mean():.4f} ± {se(e):.4f}", f"{d.mean():+.4f} ± {se(d):.4f}",
                         f"{(d > 0).sum()}/{seeds}", ""])
        part[0][-1] = f"{time.perf_counter() - t0:.0f}"
        print_table(f"{name}: denoised frame's relative RMSE against {reference} spp, equal samples",
                    head, part)
        rows += part
    print_table("all scenes", head, rows)


def cost() -> None:
    import OpenEXR

    from lampyr.engine.denoise import denoise_film
    from lampyr.engine.dual_buffer import denoise_halves
    from lampyr.engine.exr import ODD, ODD_COUNT, frame_channels
    from lampyr.engine.film import FIELDS, Film, to_bytes
    from lampyr.engine.render import render_frame
    from lampyr.engine.shot import load_shot

    one = Film.zeros(1, 1)
    old = Film(**{f: getattr(one, f) for f in FIELDS if f not in ("odd_n", "odd_sum")})
    wire = len(to_bytes(one, bits=32)) - 29
    disk = len(to_bytes(one)) - 29
    rows = [["wire (float32)", f"{wire - 16}", f"{wire}", "+16"],
            ["head's disk (float64)", f"{disk - 32}", f"{disk}", "+32"]]
    assert old.odd_n.sum() == 0
    # a 1920 x 1080 frame from a 240 x 135 render at 16 spp, repeated 8 x 8 (the content
    # matters to ZIP and hardly to the denoiser)
    shot = load_shot(DEMO).with_overrides(width=240, height=135, samples=16)
    small = render_frame(shot, 1)
    big = Film(**{f: np.ascontiguousarray(np.tile(a, (8, 8) + (1,) * (a.ndim - 2)))
                  for f, a in ((f, getattr(small, f)) for f in FIELDS)})
    with tempfile.TemporaryDirectory() as tmp:
        sizes = {}
        for label, drop in (("without", True), ("with", False)):
            ch = frame_channels(big)
            if drop:
                for c in ODD + (ODD_COUNT,):
                    ch.pop(c)
            header = {"compression": OpenEXR.ZIP_COMPRESSION, "type": OpenEXR.scanlineimage}
            path = Path(tmp) / f"{label}.exr"
            OpenEXR.File(header, ch).write(str(path))
            sizes[label] = path.stat().st_size
    px = 1920 * 1080
    rows.append(["frame file, 1920x1080 (ZIP)", f"{sizes['without'] / px:.1f}",
                 f"{sizes['with'] / px:.1f}",
                 f"+{(sizes['with'] - sizes['without']) / 2**20:.1f} MiB a frame"])
    print_table("what the odd half-frame costs", ["bytes per pixel", "without halves", "with halves",
                                                   "difference"], rows)
    denoise_film(big)  # OIDN loads its weights on the first call of a process
    best = {}
    for _ in range(2):
        for label, fn in (("denoise the frame", lambda: denoise_film(big)),
                          ("denoise its two halves", lambda: denoise_halves(big))):
            t0 = time.perf_counter()
            fn()
            best[label] = min(best.get(label, 1e9), time.perf_counter() - t0)
    print_table("denoising one 1920 x 1080 frame, best of 2", ["step", "seconds"],
                [[k, f"{v:.2f}"] for k, v in best.items()])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=12)
    ap.add_argument("--size", default="96x48")  # 6 x 3 whole tiles
    ap.add_argument("--reference", type=int, default=512)
    ap.add_argument("--no-cost", action="store_true")
    ap.add_argument("--only-cost", action="store_true")
    args = ap.parse_args()
    w, h = (int(x) for x in args.size.lower().split("x"))
    from lampyr.engine.render import warm_up

    warm_up()
    if not args.only_cost:
        compare(args.seeds, w, h, args.reference)
    if not args.no_cost:
        cost()


if __name__ == "__main__":
    main()
