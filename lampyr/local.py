"""Render a shot on this machine with a pool of processes (one per core, one numba thread each).

Work items are (frame, tile) pairs over the full sample range; the parent merges tiles into
frame films and writes each frame — EXR plus PNG preview — as soon as its last tile is in.
Frames already written stay on disk when the render is interrupted.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import time
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from dataclasses import dataclass, field
from pathlib import Path

from . import __version__

_WORKER_STATE: dict = {}


def frame_path(out: Path, name: str, frame: int, ext: str = "exr") -> Path:
    return out / f"{name}.{frame:04d}.{ext}"


def _init_worker(shot_path: str, overrides: dict) -> None:
    import signal

    from .engine.shot import load_shot

    # Ctrl-C reaches the whole process group; the parent alone decides how to stop
    signal.signal(signal.SIGINT, signal.SIG_IGN)

    shot = load_shot(shot_path)
    if overrides:
        shot = shot.with_overrides(**overrides)
    _WORKER_STATE.clear()
    _WORKER_STATE["shot"] = shot


def _render_item(frame: int, tile, first: int, count: int) -> tuple[int, object, bytes, float]:
    from .engine.compiler import compile_geometry
    from .engine.film import to_bytes
    from .engine.render import FrameRenderer

    shot = _WORKER_STATE["shot"]
    if "geometry" not in _WORKER_STATE:
        _WORKER_STATE["geometry"] = compile_geometry(shot)
    renderer = _WORKER_STATE.get("renderer")
    if renderer is None or renderer.frame != frame:
        renderer = FrameRenderer(shot, frame, _WORKER_STATE["geometry"])
        _WORKER_STATE["renderer"] = renderer
    start = time.perf_counter()
    film = renderer.render(tile, first, count)
    return frame, tile, to_bytes(film), time.perf_counter() - start


@dataclass
class FrameProgress:
    film: object
    tiles_left: int
    seconds: float = 0.0
    started: float = field(default_factory=time.time)


def write_frame_files(out: Path, shot, frame: int, film, seconds: float) -> Path:
    """Write `<name>.<frame>.exr` and its PNG preview; returns the EXR path."""
    from .engine.exr import write_frame
    from .engine.preview import write_preview

    out.mkdir(parents=True, exist_ok=True)
    path = frame_path(out, shot.name, frame)
    attrs = {
        "shot": shot.name,
        "frame": frame,
        "samples": int(shot.samples),
        "seed": int(shot.seed),
        "render_seconds": f"{seconds:.3f}",
        "version": __version__,
    }
    write_frame(path, film, attrs)
    write_preview(frame_path(out, shot.name, frame, "png"), film)
    return path


def render_local(shot_path: Path, shot, out: Path, workers: int, tile_size: int,
                 overrides: dict, on_progress=None, on_frame=None) -> list[Path]:
    """Render every frame of `shot` into `out` with `workers` processes; returns EXR paths.

    on_progress(samples_done, samples_total) and on_frame(path) are called from this process.
    """
    from .engine.film import Film, from_bytes
    from .engine.render import tiles_for

    tiles = tiles_for(shot.width, shot.height, tile_size)
    frames = list(shot.frames())
    total = len(frames) * shot.width * shot.height * shot.samples
    done = 0
    written: list[Path] = []
    state = {f: FrameProgress(Film.zeros(shot.height, shot.width), len(tiles)) for f in frames}

    # each process renders with one thread; processes are spawned, so numba's OpenMP layer is
    # never forked (LIBRARY-NOTES: fork after a parallel kernel kills the child)
    os.environ["NUMBA_NUM_THREADS"] = "1"
    ctx = mp.get_context("spawn")
    pool = ProcessPoolExecutor(workers, mp_context=ctx, initializer=_init_worker,
                               initargs=(str(shot_path), overrides))
    try:
        queue = [(f, t) for f in frames for t in tiles]
        pending = set()
        while queue or pending:
            while queue and len(pending) < workers * 2:
                f, t = queue.pop(0)
                pending.add(pool.submit(_render_item, f, t, 0, shot.samples))
            finished, pending = wait(pending, return_when=FIRST_COMPLETED)
            for fut in finished:
                frame, tile, payload, seconds = fut.result()
                st = state[frame]
                st.film.add_into(from_bytes(payload), tile.y0, tile.x0)
                st.tiles_left -= 1
                st.seconds += seconds
                done += tile.w * tile.h * shot.samples
                if on_progress:
                    on_progress(done, total)
                if st.tiles_left == 0:
                    path = write_frame_files(out, shot, frame, st.film, st.seconds)
                    written.append(path)
                    del state[frame]
                    if on_frame:
                        on_frame(path)
    except BaseException:
        processes = list((getattr(pool, "_processes", None) or {}).values())
        pool.shutdown(wait=False, cancel_futures=True)
        for proc in processes:
            proc.terminate()
        raise
    pool.shutdown(wait=True)
    return written
