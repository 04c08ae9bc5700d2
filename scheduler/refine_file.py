"""More samples for a frame file alone (plus its shot file), with no job and no farm.

A frame EXR holds per pixel the mean, the sample count and the variance (docs/design.md, invariant 10), so
samples [held, target) can be rendered here and merged in without re-rendering what is there.
The sample range already held must be [0, held) for every pixel of a tile — true of every frame
lampyr writes, whose tiles each hold whole batches from sample 0.
"""

from __future__ import annotations

import re
import time
from pathlib import Path

import numpy as np

from ..errors import FrameFileError


def frame_number(path: Path, attrs: dict) -> int:
    if "frame" in attrs:
        return int(attrs["frame"])
    m = re.search(r"\.(\d+)\.exr$", path.name)
    if not m:
        raise FrameFileError(f"{path}: no frame number in its attributes or name")
    return int(m.group(1))


def refine_frame_file(path: Path, shot_path: Path, samples: int, noise: float | None = None,
                      tile_size: int = 32, progress=None, denoised_noise: float | None = None) -> dict:
    """Add samples to the frame file `path` up to `samples` per pixel, tile by tile; with a
    `noise` goal only to tiles whose mean relative standard error is above it; with a
    `denoised_noise` goal only to tiles whose denoised error (engine/dual_buffer.py, measured
    from the frame's two denoised half-frames before any sample is added) is above it, each in
    proportion to its error (`dual_buffer.tile_targets`: held · error / goal, at most `samples`).
    Rewrites the file (atomically) and returns {"tiles": refined, "of": total, "errors": the
    tiles' denoised errors or None}."""
    from ..engine.exr import read_frame, write_frame
    from ..engine.film import Film, merge
    from ..engine.render import FrameRenderer, tiles_for
    from ..engine.shot import load_shot

    path = Path(path)
    film, attrs = read_frame(path)
    shot = load_shot(shot_path)
    h, w = film.n.shape
    if (shot.width, shot.height) != (w, h):
        shot = shot.with_overrides(width=w, height=h)
    frame = frame_number(path, attrs)
    held_all = film.n + film.dropped
    renderer = FrameRenderer(shot, frame)
    if renderer.layer_names != film.layer_names:
        raise FrameFileError(f"{path}: the frame holds the layers [{', '.join(film.layer_names)}] "
                             f"and {shot_path} asks for [{', '.join(renderer.layer_names)}]; refine "
                             "with the shot file the frame was rendered from ([output] layers, "
                             "light_groups)")
    if renderer.matte_kinds != film.matte_kinds:
        raise FrameFileError(f"{path}: the frame holds the ID mattes [{', '.join(film.matte_kinds)}] "
                             f"and {shot_path} asks for [{', '.join(renderer.matte_kinds)}]; refine "
                             "with the shot file the frame was rendered from ([output] id_mattes)")
    extra = Film.zeros(h, w, renderer.layer_names, renderer.matte_kinds)
    refined = 0
    tiles = tiles_for(w, h, tile_size)
    start = time.perf_counter()
    errors = targets = None
    if denoised_noise is not None:
        from ..engine.dual_buffer import tile_errors, tile_targets

        errors = tile_errors(film, tiles)
        lows = [int(held_all[t.y0:t.y0 + t.h, t.x0:t.x0 + t.w].min()) for t in tiles]
        targets = tile_targets(errors, lows, denoised_noise, samples)
    for k, t in enumerate(tiles):
        held = held_all[t.y0:t.y0 + t.h, t.x0:t.x0 + t.w]
        lo, hi = int(held.min()), int(held.max())
        if lo != hi:
            raise FrameFileError(f"{path}: pixels of tile at ({t.x0}, {t.y0}) hold {lo} to {hi} "
                                 f"samples; refine with --tile matching the tiles it was rendered in")
        goal_spp = samples if targets is None else int(targets[k])
        if lo >= goal_spp:
            continue
        if noise is not None:
            part = film.rel_noise()[t.y0:t.y0 + t.h, t.x0:t.x0 + t.w]
            if float(np.mean(part)) <= noise:
                continue
        extra.add_into(renderer.render(t, lo, goal_spp - lo), t.y0, t.x0)
        refined += 1
        if progress:
            progress(refined, len(tiles))
    if refined:
        attrs = dict(attrs)
        attrs.pop("format", None)
        attrs["samples"] = str(max(samples, int(attrs.get("samples", 0) or 0)))
        old = float(attrs.get("render_seconds", 0) or 0)
        attrs["render_seconds"] = f"{old + time.perf_counter() - start:.3f}"
        merged = merge(film, extra)
        denoised = None
        if shot.denoise:  # a refined frame is final: denoised from the merged mean
            from ..engine.denoise import denoise_film

            denoised = denoise_film(merged)
        from ..engine.mattes import manifest

        write_frame(path, merged, attrs, denoised, manifest(shot))
        from ..engine.preview import write_preview

        write_preview(path.with_suffix(".png"), merged if denoised is None else denoised)
    return {"tiles": refined, "of": len(tiles),
            "errors": None if errors is None else [float(e) for e in errors]}
