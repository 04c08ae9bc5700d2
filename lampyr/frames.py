"""Frame files on disk: their names and writing one frame (EXR plus PNG preview)."""

from __future__ import annotations

from pathlib import Path

from . import __version__


def frame_path(out: Path, name: str, frame: int, ext: str = "exr") -> Path:
    """`out/<name>.<frame, 4 digits>.<ext>`."""
    return out / f"{name}.{frame:04d}.{ext}"


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
