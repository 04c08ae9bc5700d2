"""Submitting a shot: validate it with the engine, measure its layout, send its files
(transfer.py), queue a `submit` command.

The probe render that sizes tiles and batches (planner.probe_cost) runs here, in the submitter's
process, never in the head's loop. An `--out` folder that cannot be made (a regular file on its
path, no permission) is refused here when this machine can tell (one line, exit status 2); the
head checks it again when it takes the job.
"""

from __future__ import annotations

import json
import os
import time
from pathlib import Path

from ..errors import UsageError
from . import protocol as P
from .jobs import new_job_id


def check_out(out: str) -> None:
    """Refuse an `--out` that cannot be a folder: a regular file on its path, or an existing
    folder above it that cannot be written. A path whose folders do not exist here may be the
    head's (another machine), so it passes."""
    path = Path(out).absolute()
    for p in (path, *path.parents):
        if p.exists():
            if not p.is_dir():
                what = "is" if p == path else f"lies under {p}, which is"
                raise UsageError(f"--out {out}: {what} a file, not a folder; expected a folder "
                                 "for the frames")
            if p != path and not os.access(p, os.W_OK | os.X_OK):
                raise UsageError(f"--out {out}: cannot make it inside {p} (no permission); "
                                 "expected a folder lampyr can write")
            return


def submit_request(r, shot_path: Path, overrides: dict, out: str | None, priority: int = 0,
                   tile_size: int | None = None, batch_samples: int | None = None,
                   ready_by: float | None = None, sent: list | None = None,
                   warnings: list | None = None, files_checked: bool = False) -> str:
    """Validate a shot, send the files Redis lacks and ask the head to run it; returns the job id.

    ready_by: epoch seconds the frames are wanted by (`ready_by.parse_until`), or None;
    sent: a list, when given, gets the upload's `transfer.Sent` appended; warnings: a list, when
    given, gets the warning lines about the shot's files (optional glTF extensions not read);
    files_checked: the caller has read the shot's files already (`check_shot_files`)."""
    from ..engine.compiler import check_shot_files
    from ..engine.shot import load_shot
    from .store import send_command
    from .transfer import upload_shot

    if out is not None:
        check_out(out)
    spec = load_shot(shot_path)
    if overrides:
        o = dict(overrides)
        spec = spec.with_overrides(**o)
    # a bad mesh, texture or scene file stops here, nothing sent
    notes = [] if files_checked else check_shot_files(spec)
    if warnings is not None:
        warnings.extend(notes)
    if tile_size is None or batch_samples is None:
        from .planner import choose_layout, probe_cost

        layout = choose_layout(spec.width, spec.height, spec.samples, probe_cost(spec))
        tile_size = tile_size or layout.tile_size
        batch_samples = batch_samples or layout.batch_samples
    sha, member, stats = upload_shot(r, spec)
    if sent is not None:
        sent.append(stats)
    job = new_job_id(spec.name)
    o = dict(overrides)
    if "frames" in o:
        o["frames"] = list(o["frames"])
    # a status at once, so `status JOB` right after `submit` answers; the head takes over from here
    first = {"job": job, "name": spec.name, "state": "queued", "frames": len(spec.frames()),
             "frames_done": 0, "samples": spec.samples, "pixel_samples_done": 0,
             "pixel_samples_total": len(spec.frames()) * spec.width * spec.height * spec.samples,
             "samples_per_second": 0.0, "eta_seconds": None, "priority": priority,
             "out": out, "failed": [], "submitted": time.time(), "ready_by": ready_by,
             "ready_by_reached": False, "forecast": None}
    r.hset(P.k_job(job), mapping={k: json.dumps(v) for k, v in first.items()})
    r.zadd(P.K_JOBS, {job: first["submitted"]})
    send_command(r, "submit", job=job, bundle=sha, shot=member, overrides=o,
                 out=None if out is None else str(Path(out).resolve()), priority=priority,
                 tile_size=tile_size, batch_samples=batch_samples, submitted=time.time(),
                 ready_by=ready_by)
    return job
