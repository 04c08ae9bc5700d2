"""Jobs on the head's disk: `<state>/jobs/<id>/` holds everything the head needs to resume one.

    job.json      the record below (rewritten atomically on every change)
    bundle/       the scene's files (shot file, meshes, textures, maps), fetched from Redis and
                  linked from the head's file cache; the head renders frames' metadata from them
    scene.json    the scene's manifest (transfer.py), to put its files back if Redis loses them
    tiles/<frame>/<tile>.acc   tile accumulators (see accumulator.py)

`ranges` lists the sample ranges every tile gets, in dispatch order; `refine` appends to it, or,
with a noise goal, adds ranges to the noisy tiles only (`extra`).
"""

from __future__ import annotations

import json
import re
import secrets
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path

from .accumulator import write_atomic

STATES = ("queued", "running", "paused", "done", "failed", "cancelled")


# a job id as new_job_id makes it: up to 24 ASCII letters, digits, "-" and "_", a "-" and 6 hex
# digits; the head takes no other (an id names a folder under the state folder)
JOB_ID = re.compile(r"[A-Za-z0-9_-]{1,24}-[0-9a-f]{6}")


def new_job_id(name: str) -> str:
    stem = "".join(c if c.isascii() and c.isalnum() or c in "-_" else "-" for c in name)[:24]
    return f"{stem or 'job'}-{secrets.token_hex(3)}"


def is_job_id(job) -> bool:
    return isinstance(job, str) and JOB_ID.fullmatch(job) is not None


@dataclass
class JobRecord:
    """A submitted job. overrides: `Shot.with_overrides` arguments (frames as [first, last]).

    samples: the samples per pixel the job reaches; failed: batch id → error text.
    A record written before a field existed loads with that field's default.
    """

    id: str
    name: str
    bundle: str
    shot: str
    overrides: dict
    out: str
    priority: int
    submitted: float
    tile_size: int
    batch_samples: int
    samples: int
    ranges: list
    paused: bool = False
    cancelled: bool = False
    failed: dict = field(default_factory=dict)
    extra: dict = field(default_factory=dict)  # "frame/tile" → more ranges for that tile only
    ready_by: float | None = None  # epoch seconds the frames are wanted by (ready_by.py)
    ready_by_reached: bool = False  # stopped at the ready-by time with the samples it had
    error: str | None = None  # why the whole job stopped (its frames cannot be written); retry clears
    ended: float | None = None  # epoch seconds it was first seen done, failed or cancelled

    def to_json(self) -> str:
        return json.dumps(asdict(self), indent=1, sort_keys=True)

    @classmethod
    def from_json(cls, text: str) -> "JobRecord":
        d = json.loads(text)
        for old, new in _RENAMED.items():  # records written by protocol-3 heads before the rename
            if old in d:
                d.setdefault(new, d.pop(old))
        d["ranges"] = [tuple(r) for r in d["ranges"]]
        d["extra"] = {k: [tuple(r) for r in v] for k, v in d.get("extra", {}).items()}
        return cls(**d)


_RENAMED = {"deadline": "ready_by", "deadline_reached": "ready_by_reached"}


class JobFolder:
    """Paths of one job's folder under `<state>/jobs/`."""

    def __init__(self, state: Path, job: str):
        self.root = Path(state) / "jobs" / job

    @property
    def record(self) -> Path:
        return self.root / "job.json"

    @property
    def archived(self) -> Path:
        return self.root / "archived.json"

    def taken(self) -> bool:
        """A job lives (or lived) here: its record, loadable or not, or its archived record."""
        return self.record.exists() or self.archived.exists()

    @property
    def bundle(self) -> Path:
        return self.root / "bundle"

    def tile(self, frame: int, tile: int) -> Path:
        return self.root / "tiles" / f"{frame:04d}" / f"{tile:05d}.acc"

    def save(self, rec: JobRecord) -> None:
        write_atomic(self.record, rec.to_json().encode())

    def load(self) -> JobRecord:
        return JobRecord.from_json(self.record.read_text())


def list_jobs(state: Path) -> list[str]:
    folder = Path(state) / "jobs"
    if not folder.exists():
        return []
    return sorted(p.name for p in folder.iterdir() if (p / "job.json").exists())


def now() -> float:
    return time.time()
