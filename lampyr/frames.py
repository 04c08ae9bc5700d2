"""Frame files on disk: their names and writing one frame (EXR plus PNG preview)."""

from __future__ import annotations

from pathlib import Path

from . import __version__


def frame_path(out: Path, name: str, frame: int, ext: str = "exr") -> Path:
    """`out/<name>.<frame, 4 digits>.<ext>`."""
    return out / f"{name}.{frame:04d}.{ext}"


def write_frame_files(out: Path, shot, frame: int, film, seconds: float,
                      final: bool = False, manifest: dict | None = None) -> Path:
    """Write `<name>.<frame>.exr` and its PNG preview; returns the EXR path.

    final: the frame is complete (its pass is done, or it is as final as it gets): then, unless
    the shot says `[output] denoise = false`, the EXR gets the denoised layer and the PNG shows
    it. Intermediate rewrites (final False) are not denoised, so that the head's merging does
    not wait for the denoiser; their PNG shows the raw mean.
    manifest: the names of the film's ID mattes (`engine.mattes.manifest(shot)`), which the
    caller keeps from frame to frame; read from the shot's files here when None.
    """
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
    denoised = None
    if final and getattr(shot, "denoise", True):
        from .engine.denoise import denoise_film

        denoised = denoise_film(film)
    if film.matte_kinds and manifest is None:
        from .engine.mattes import manifest as matte_manifest

        manifest = matte_manifest(shot)
    write_frame(path, film, attrs, denoised, manifest)
    write_preview(frame_path(out, shot.name, frame, "png"),
                  film if denoised is None else denoised)
    return path
