"""The denoised layer: its cost beside the EXR write, and the two guide modes' error. Prints tables.

    python bench/denoise.py [--width 1920 --height 1080 --spp 1 --repeat 3] [--skip-error]

1. Time. A frame of the test suite's small shot rendered at WIDTH × HEIGHT (default 1920 × 1080)
   with SPP samples; then, side by side in this one process: writing its EXR (no denoised layer),
   denoising it (`denoise_film`: guides as they are at each quality; guides prefiltered with
   fast or high guide filters), and writing the EXR with the layer.
   The first denoise of a process (OIDN loads its weights) is reported apart; the rest are the
   best of REPEAT. Threads: OIDN uses every core it sees (this machine: `os.cpu_count()`).
2. Error (skipped with --skip-error). The noisy mostly-indirect 96 × 54 shot of
   tests/engine/test_denoise.py at 8 spp against an independent 1024-spp render: relative RMSE of
   the raw frame and of each guide mode (the reference's own variance of the mean taken away),
   the ratio, and the image mean against the reference's.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "bench"))
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
from tables import print_table  # noqa: E402


def _best(fn, repeat):
    best = float("inf")
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def timing(width, height, spp, repeat):
    from lampyr.engine.denoise import GUIDES_AS_IS, GUIDES_PREFILTER, denoise_film
    from lampyr.engine.exr import write_frame
    from lampyr.engine.render import render_frame
    from lampyr.engine.shot import parse_shot_text
    from tests.conftest import TINY_SHOT

    shot = parse_shot_text(TINY_SHOT).with_overrides(width=width, height=height, samples=spp)
    t = time.perf_counter()
    film = render_frame(shot, 1)
    render_s = time.perf_counter() - t
    rows = [[f"render {spp} spp (for the input)", f"{render_s:.2f}"]]
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "f.exr"
        attrs = {"shot": "bench", "frame": 1}
        t = time.perf_counter()
        denoise_film(film)
        rows.append(["first denoise of the process (defaults)",
                     f"{time.perf_counter() - t:.2f}"])
        rows.append(["write EXR, no denoised layer",
                     f"{_best(lambda: write_frame(path, film, attrs), repeat):.2f}"])
        for quality in ("high", "balanced", "fast"):
            s = _best(lambda: denoise_film(film, guides=GUIDES_AS_IS, quality=quality), repeat)
            rows.append([f"denoise, guides {GUIDES_AS_IS}, quality {quality}", f"{s:.2f}"])
        for gq in ("fast", "high"):
            s = _best(lambda: denoise_film(film, guides=GUIDES_PREFILTER, guide_quality=gq), repeat)
            rows.append([f"denoise, guides {GUIDES_PREFILTER} ({gq}), quality high", f"{s:.2f}"])
        picture = denoise_film(film)
        rows.append(["write EXR with the denoised layer",
                     f"{_best(lambda: write_frame(path, film, attrs, picture), repeat):.2f}"])
    print_table(f"Denoising one {width} × {height} frame, {os.cpu_count()} core(s) "
                f"(best of {repeat})", ["step", "seconds"], rows)


def error():
    from lampyr.engine.denoise import GUIDE_MODES, denoise_film
    from lampyr.engine.render import render_frame
    from lampyr.engine.shot import parse_shot_text
    from tests.engine.test_denoise import NOISY_SHOT, REFERENCE_SPP, relative_rmse

    low = render_frame(parse_shot_text(NOISY_SHOT), 1)
    ref_text = NOISY_SHOT.replace("samples = 8", f"samples = {REFERENCE_SPP}")
    ref = render_frame(parse_shot_text(ref_text.replace("seed = 7", "seed = 99")), 1)
    ref_mean = float(np.mean(ref.mean()))
    raw = relative_rmse(low.mean(), ref)
    low_mean = float(np.mean(low.mean()))
    rows = [["raw 8 spp", f"{raw:.4f}", "1.00", f"{low_mean / ref_mean - 1:+.2%}"]]
    for guides in GUIDE_MODES:
        d = denoise_film(low, guides=guides)
        e = relative_rmse(d, ref)
        rows.append([f"denoised, guides {guides}", f"{e:.4f}", f"{raw / e:.2f}",
                     f"{float(np.mean(d)) / ref_mean - 1:+.2%}"])
    print_table(f"96 × 54 mostly-indirect shot at 8 spp against {REFERENCE_SPP} spp",
                ["frame", "relative RMSE", "raw / this", "mean vs reference"], rows)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--width", type=int, default=1920)
    ap.add_argument("--height", type=int, default=1080)
    ap.add_argument("--spp", type=int, default=1)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--skip-error", action="store_true")
    args = ap.parse_args()
    timing(args.width, args.height, args.spp, args.repeat)
    if not args.skip_error:
        error()


if __name__ == "__main__":
    main()
