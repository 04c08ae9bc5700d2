"""The engine's front door: render a batch — (frame, tile, first sample, sample count) — to a Film.

A batch's result depends on nothing but its five numbers and the shot (docs/design.md, invariant 1), so a
`FrameRenderer` may be built anywhere: on the head, on a worker, in a test.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from .compiler import Geometry, compile_frame, compile_geometry
from .film import Film
from .integrator import render_tile
from .layers import layer_plan
from .mattes import instance_ids, material_ids, matte_plan, matte_sources
from .sampler import RANDOM, SOBOL

SAMPLER_MODES = {"sobol": SOBOL, "random": RANDOM}


@dataclass(frozen=True)
class Tile:
    """A rectangle of the image: columns [x0, x0 + w), rows [y0, y0 + h)."""

    x0: int
    y0: int
    w: int
    h: int


def tiles_for(width: int, height: int, size: int) -> list[Tile]:
    """Row-major tiles of at most size × size covering a width × height image."""
    return [
        Tile(x, y, min(size, width - x), min(size, height - y))
        for y in range(0, height, size)
        for x in range(0, width, size)
    ]


class FrameRenderer:
    """Renders batches of one frame of a shot; geometry may be shared between frames."""

    def __init__(self, shot, frame: int, geometry: Geometry | None = None):
        self.shot = shot
        self.frame = int(frame)
        self.geometry = geometry if geometry is not None else compile_geometry(shot)
        self.scene, self.camera = compile_frame(shot, self.geometry, self.frame)
        # the layers the shot keeps (docs/shot-file.md, [output]): none unless asked for
        self.layer_names, self._slots, self._split = layer_plan(shot)
        # the ID mattes it keeps (docs/shot-file.md, [output] id_mattes): none unless asked for
        self.matte_kinds = matte_plan(shot)
        self._matte_src = matte_sources(self.matte_kinds)
        self._inst_ids = instance_ids(self.geometry) if self.matte_kinds else np.zeros(1)
        self._mat_ids = material_ids(self.geometry) if self.matte_kinds else np.zeros(1)

    def render(self, tile: Tile, first: int, count: int, film: Film | None = None) -> Film:
        """Add samples [first, first + count) of every pixel in `tile` to `film` (new if None)."""
        shot = self.shot
        if film is None:
            film = Film.zeros(tile.h, tile.w, self.layer_names, self.matte_kinds)
        elif film.layer_names != self.layer_names or film.matte_kinds != self.matte_kinds:
            raise ValueError(f"film layers {list(film.layer_names)} and ID mattes "
                             f"{list(film.matte_kinds)}; this shot keeps {list(self.layer_names)} "
                             f"and {list(self.matte_kinds)}")
        if count <= 0:
            return film
        render_tile(
            self.scene, self.camera, float(shot.camera.aperture), float(shot.width), float(shot.height),
            self.frame, int(shot.seed), SAMPLER_MODES[shot.sampler], int(shot.bounces), int(shot.roulette),
            tile.x0, tile.y0, tile.w, tile.h, int(first), int(count),
            film.n, film.rgb_sum, film.rgb_sq, film.alpha_sum, film.albedo_sum, film.normal_sum,
            film.depth_sum, film.hits, film.dropped, film.odd_n, film.odd_sum, self._split, self._slots, film.layers,
            self._matte_src, self._inst_ids, self._mat_ids, film.matte_ids, film.matte_cov,
        )
        return film


def render_frame(shot, frame: int, first: int = 0, count: int | None = None,
                 tile_size: int = 64, geometry: Geometry | None = None, progress=None) -> Film:
    """Render a whole frame in this process (tests, `refine` without a farm, benchmarks).

    progress: optional callable(samples_done_in_pixels) called after each tile.
    """
    count = shot.samples - first if count is None else count
    renderer = FrameRenderer(shot, frame, geometry)
    film = Film.zeros(shot.height, shot.width, renderer.layer_names, renderer.matte_kinds)
    for tile in tiles_for(shot.width, shot.height, tile_size):
        part = renderer.render(tile, first, count)
        film.add_into(part, tile.y0, tile.x0)
        if progress is not None:
            progress(tile.w * tile.h * count)
    return film


def warm_up() -> float:
    """Compile (or load from cache) every kernel with a tiny scene; returns seconds taken."""
    from .shot import parse_shot

    start = time.perf_counter()
    shot = parse_shot(
        {
            "name": "warmup", "frames": 1, "image": {"width": 2, "height": 2},
            "sampling": {"samples": 1},
            "camera": {"position": [0, 0, 3], "target": [0, 0, 0]},
            "environment": {"color": [0.1, 0.1, 0.1]},
            "material": [{"name": "m", "type": "diffuse", "emission": [1, 1, 1]}],
            "object": [{"name": "s", "material": "m", "sphere": {"center": [0, 0, 0], "radius": 1}}],
        },
        root=None,
    )
    render_frame(shot, 1, 0, 1)
    return time.perf_counter() - start

