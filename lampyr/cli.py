"""The `lampyr` command. Errors meant for people are caught here, once, and printed as one line."""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import click

from . import __version__
from .errors import LampyrError, UsageError


def _parse_frames(text: str | None):
    if text is None:
        return None
    try:
        if "-" in text.strip("-") and not text.startswith("-"):
            a, b = text.split("-", 1)
            return (int(a), int(b))
        return (int(text), int(text))
    except ValueError:
        raise UsageError(f"--frames: expected a frame or a range like 1-48, got {text!r}") from None


def _overrides(samples, frames, width, height) -> dict:
    out = {}
    if samples is not None:
        out["samples"] = samples
    if frames is not None:
        out["frames"] = frames
    if width is not None:
        out["width"] = width
    if height is not None:
        out["height"] = height
    return out


def _kernels_cached() -> bool:
    from .engine import NUMBA_CACHE_DIR

    folder = Path(os.environ.get("NUMBA_CACHE_DIR", NUMBA_CACHE_DIR))
    return folder.exists() and any(folder.rglob("*.nbi"))


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="lampyr")
def cli():
    """lampyr: turn the office's idle PCs into one render farm.

    Render a shot file (TOML) into OpenEXR frames that are their own checkpoints.
    """


@cli.command()
@click.argument("shot", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--out", "out", type=click.Path(file_okay=False, path_type=Path), required=True,
              help="Folder for the frames: <name>.<frame>.exr plus a PNG preview of each.")
@click.option("--workers", type=click.IntRange(1, 256), default=None,
              help="Processes to render with (default: every core of this machine).")
@click.option("--samples", type=click.IntRange(1, 1_048_576), default=None,
              help="Samples per pixel, overriding the shot's sampling.samples.")
@click.option("--frames", "frames", default=None, metavar="A-B",
              help="Render only these frames (one number or a range).")
@click.option("--width", type=click.IntRange(1, 16384), default=None, help="Override image.width.")
@click.option("--height", type=click.IntRange(1, 16384), default=None, help="Override image.height.")
@click.option("--tile", "tile_size", type=click.IntRange(8, 1024), default=32, show_default=True,
              help="Tile edge in pixels.")
@click.option("--quiet", is_flag=True, help="No progress bar.")
def render(shot, out, workers, samples, frames, width, height, tile_size, quiet):
    """Render every frame of SHOT on this machine into --out."""
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn, TimeRemainingColumn

    from .engine.shot import load_shot
    from .local import render_local

    console = Console(stderr=True, quiet=quiet)
    overrides = _overrides(samples, _parse_frames(frames), width, height)
    spec = load_shot(shot)
    if overrides:
        spec = spec.with_overrides(**overrides)
    workers = workers or os.cpu_count() or 1
    if not _kernels_cached():
        console.print("Compiling the render kernels for this machine — once, about a minute; "
                      "later starts are quick.")
    n_frames = len(spec.frames())
    console.print(f"Rendering {spec.name}: {n_frames} frame(s), {spec.width}×{spec.height}, "
                  f"{spec.samples} spp, {workers} process(es) → {out}")
    start = time.perf_counter()
    with Progress(
        TextColumn("[progress.description]{task.description}"), BarColumn(),
        TextColumn("{task.percentage:>5.1f}%"), TextColumn("{task.fields[rate]}"),
        TimeElapsedColumn(), TextColumn("ETA"), TimeRemainingColumn(),
        console=console, disable=quiet,
    ) as bar:
        task = bar.add_task(f"frames 0/{n_frames}", total=1.0, rate="")
        frames_done = [0]

        def on_progress(done, total):
            rate = done / max(time.perf_counter() - start, 1e-9)
            bar.update(task, completed=done / total, rate=f"{rate / 1e3:,.0f} k samples/s")

        def on_frame(path):
            frames_done[0] += 1
            bar.update(task, description=f"frames {frames_done[0]}/{n_frames}")

        try:
            written = render_local(shot, spec, out, workers, tile_size, overrides, on_progress, on_frame)
        except KeyboardInterrupt:
            bar.stop()
            console.print(f"Stopped. {frames_done[0]} finished frame(s) are kept in {out}.")
            sys.exit(130)
    click.echo(f"Wrote {len(written)} frame(s) to {out} in {time.perf_counter() - start:.1f} s")


def main(argv=None) -> None:
    try:
        cli.main(args=argv, prog_name="lampyr", standalone_mode=False)
    except click.exceptions.Abort:
        click.echo("lampyr: interrupted", err=True)
        sys.exit(130)
    except click.ClickException as err:
        err.show()
        sys.exit(err.exit_code)
    except LampyrError as err:
        click.echo(f"lampyr: {err}", err=True)
        sys.exit(err.exit_code)
    except KeyboardInterrupt:
        click.echo("lampyr: interrupted", err=True)
        sys.exit(130)


if __name__ == "__main__":
    main()
