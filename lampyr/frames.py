"""Frame files on disk: their names and writing one frame (EXR plus PNG preview)."""

from __future__ import annotations

from pathlib import Path

from . import __version__


def frame_path(out: Path, name: str, frame: int, ext: str = "exr") -> Path:
    """`out/<name>.<frame, 4 digits>.<ext>`."""
    return out / f"{name}.{frame:04d}.{ext}"


DENOISED_ERROR_ATTR = "denoised_error"  # header: JSON {"spp": lowest count, "errors": per tile}


def denoised_errors(film, tiles, denoised) -> list[float]:
    """Each tile's denoised error (engine/dual_buffer.py, `tile_errors`); inf where not known."""
    from .engine.dual_buffer import tile_errors

    return [float(e) for e in tile_errors(film, tiles, denoised)]


def format_errors(errors, n) -> str:
    """The header value: the errors (null where not known) and the spp they were measured at."""
    import json
    import math

    return json.dumps({"spp": int(n.min()) if n.size else 0,
                       "errors": [round(e, 6) if math.isfinite(e) else None for e in errors]},
                      separators=(",", ":"))


def read_errors(path: Path) -> tuple[list[float | None], int] | None:
    """(the tiles' denoised errors a frame file's header holds, None per tile not known; the spp
    they were measured at), or None when the file is missing or holds none (written before, or
    not denoised)."""
    import json

    import OpenEXR

    try:
        with OpenEXR.File(str(path), header_only=True) as exr:
            text = exr.header().get("lampyr." + DENOISED_ERROR_ATTR)
        if text is None:
            return None
        value = json.loads(str(text))
        errors, spp = value["errors"], int(value["spp"])
    except Exception:  # noqa: BLE001 — a missing, damaged or older file: the errors are unknown
        return None
    if not isinstance(errors, list):
        return None
    return [float(e) if isinstance(e, (int, float)) else None for e in errors], spp


def write_frame_files(out: Path, shot, frame: int, film, seconds: float,
                      final: bool = False, manifest: dict | None = None, tiles=None,
                      report: dict | None = None) -> Path:
    """Write `<name>.<frame>.exr` and its PNG preview; returns the EXR path.

    final: the frame is complete (its pass is done, or it is as final as it gets): then, unless
    the shot says `[output] denoise = false`, the EXR gets the denoised layer and the PNG shows
    it. Intermediate rewrites (final False) are not denoised, so that the head's merging does
    not wait for the denoiser; their PNG shows the raw mean.
    manifest: the names of the film's ID mattes (`engine.mattes.manifest(shot)`), which the
    caller keeps from frame to frame; read from the shot's files here when None.
    tiles: the job's tiles (engine.render.Tile); with them a denoised frame also gets its tiles'
    denoised errors (engine/dual_buffer.py: its two half-frames denoised too), stored in the
    header as `lampyr.denoised_error` (DENOISED_ERROR_ATTR) and put in `report` (a dict) under
    "denoised_errors" when one is given.
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
        if tiles is not None:
            errors = denoised_errors(film, tiles, denoised)
            attrs[DENOISED_ERROR_ATTR] = format_errors(errors, film.n)
            if report is not None:
                report["denoised_errors"] = errors
    if film.matte_kinds and manifest is None:
        from .engine.mattes import manifest as matte_manifest

        manifest = matte_manifest(shot)
    write_frame(path, film, attrs, denoised, manifest)
    write_preview(frame_path(out, shot.name, frame, "png"),
                  film if denoised is None else denoised)
    return path
