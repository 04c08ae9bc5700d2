"""The demo shot made small for the page's browser tests, with its assets zipped for upload."""

from __future__ import annotations

import re
import zipfile
from pathlib import Path


def courtyard_upload(tmp_path: Path, repo_root: Path, width: int, height: int, frames: int,
                     fps: int | None = None) -> tuple[Path, Path]:
    """(shot file, assets zip) of the demo at width × height, frames 1..`frames`, 4 spp and, when
    given, `fps` frames a second; each key is asserted to be replaced once."""
    src = repo_root / "examples" / "courtyard"
    text = (src / "courtyard.toml").read_text()
    edits = [(r"(?m)^frames = \[1, 48\]", f"frames = [1, {frames}]"),
             (r"(?m)^width = \d+", f"width = {width}"),
             (r"(?m)^height = \d+", f"height = {height}"),
             (r"(?m)^samples = \d+", "samples = 4")]
    if fps is not None:
        edits.append((r"(?m)^fps = \d+", f"fps = {fps}"))
    for pattern, value in edits:
        text, n = re.subn(pattern, value, text, count=1)
        assert n == 1, pattern
    folder = tmp_path / "upload"
    folder.mkdir()
    shot = folder / "courtyard.toml"
    shot.write_text(text)
    archive = folder / "assets.zip"
    with zipfile.ZipFile(archive, "w") as z:
        for f in sorted((src / "assets").iterdir()):
            z.write(f, f"assets/{f.name}")
    return shot, archive
