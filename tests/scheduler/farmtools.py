"""Helpers for the farm tests: reference renders and frame comparison."""

from __future__ import annotations

from pathlib import Path

import numpy as np


def reference_mean(shot_path: Path, frame: int, samples: int | None = None) -> np.ndarray:
    """The engine-only render of one frame in this process: mean beauty (h, w, 3) float64."""
    from lampyr.engine.render import render_frame
    from lampyr.engine.shot import load_shot

    shot = load_shot(shot_path)
    if samples is not None:
        shot = shot.with_overrides(samples=samples)
    return render_frame(shot, frame, 0, shot.samples, tile_size=8).mean()


def frame_mean(out: Path, name: str, frame: int) -> np.ndarray:
    from lampyr.engine.exr import read_frame

    film, _ = read_frame(out / f"{name}.{frame:04d}.exr")
    return film.mean()


def assert_same_image(a: np.ndarray, b: np.ndarray) -> None:
    # the EXR holds float32; sums of the same samples merged in another order differ only by
    # float32 rounding (IEEE 754 single precision: 2**-24 relative per operation)
    np.testing.assert_allclose(a, b, rtol=2e-5, atol=1e-6)
