"""The wire protocol between head and workers: task names, payloads, Redis key layout, version.

Both sides import this module and nothing else about each other. Every message is JSON (Celery is
configured to accept JSON only); batch results travel as raw bytes under a Redis key named here.

A batch is `(job, frame, tile, first, count)`; its id is the string `job/frame/tile/first/count`.
A dispatch of a batch carries a `ticket` (an integer the head increments each time it queues the
batch again); a worker runs a message only while its ticket is the batch's current one, so a
message the head has replaced is skipped instead of rendered twice.

Redis keys (prefix `lampyr:`):

| key | type | written by | meaning |
|---|---|---|---|
| `protocol` | string | head | PROTOCOL_VERSION the head speaks |
| `epoch` | string | head | random token; a missing epoch means Redis lost its data |
| `config` | hash | head | lease_seconds, max_attempts |
| `control` | list | CLI, web page | JSON commands for the head (submit, retry, pause, resume, cancel, refine, priority) |
| `control:processing` | list | head | commands being carried out (moved from `control`, removed once done; replayed after a crash) |
| `command-errors` | hash | head | job id → JSON `{"op", "error", "at"}`: the last command on it that failed, shown in its status |
| `scene:<sha256>` | string, TTL | CLI, web page, head | a scene's manifest (JSON, transfer.py): its files' shot-relative paths, sizes, sha256 and chunk hashes, and which one is the shot; named by the sha256 of its bytes |
| `blob:<sha256>` | string, TTL | CLI, web page, head | one chunk of a scene file (at most `chunk_bytes` of the manifest, 16 MiB), named by the sha256 of its bytes; shared by every scene that holds the same bytes |
| `job:<id>` | hash | head | live status of a job (JSON values), read by `status` |
| `jobs` | zset | head | job ids scored by submission time |
| `inflight` | hash | head | batch id → current ticket |
| `attempts` | hash | worker | batch id → starts so far (lampyr's own attempt counter) |
| `lease:<batch>` | string, TTL | worker | `<worker>:<ticket>` while a worker renders the batch |
| `result:<batch>:<ticket>` | string, TTL | worker | the batch's film as bytes (`engine.film.to_bytes`, 32 bits per value, with the shot's layers and ID matte slots) |
| `results` | list | worker | JSON notices: a result is ready, a batch was handed back part-way (`partial`, with `done`), or it raised |
| `results:processing` | list | head | notices being merged (kept until the merge is on disk) |
| `results:aside` | list | head | JSON `{"notice", "reason", "at"}`: notices the head could not read, set aside |
| `host:<name>` | string, TTL | worker | JSON heartbeat: host, cores, engine version, pid, `state`, `windows` (worker/supervisor.py) |
| `slot:<name>:<pid>` | string, TTL | worker | JSON: the batch a worker process renders and its speed |
| `warm:<name>` | set | worker | pids of a worker's pool processes whose kernels are loaded |
| `metrics` | string | head | JSON snapshot of the head's counters and queue (metrics.py) |
| `layout:<job>` | string | head | JSON: image size, frame numbers, tile rectangles (progress.py) |
| `progress:<job>` | hash | head | frame → JSON: state, samples held / target, noise (progress.py) |
| `tiles:<job>` | hash | head | frame → JSON rows per tile: samples held, target, noise, state (progress.py) |
| `throughput` | hash | head | minute (epoch s) → pixel-samples merged in it, last 24 h (history.py) |
| `seen` | hash | head | worker name → its last heartbeat JSON and `last_seen`, kept a week (history.py) |
"""

from __future__ import annotations

import json
from dataclasses import dataclass

from ..errors import LampyrError

PROTOCOL_VERSION = 7  # 2: `partial` result notices; 3: scenes as `scene:`/`blob:` keys, no bundles;
# 4: the environment map's `rotate` turns by the right-hand rule (a version-3 worker turns it the
# other way, so its samples must not be merged with a version-4 worker's); 5: results are film
# bytes of format 2 (float32 values, the shot's light-path layers and light groups); 6: film
# bytes of format 3 (with the shot's ID matte slots); 7: film bytes of format 4 (with the odd
# half-frame's count and sum) and `refine` may carry `denoised_noise`
TASK_RENDER = "lampyr.render_batch"
QUEUE = "lampyr"
PREFIX = "lampyr:"

RESULT_TTL = 7 * 24 * 3600  # seconds a result waits for the head before Redis drops it
HEARTBEAT_TTL = 15  # seconds a worker's heartbeat outlives its last beat
HEARTBEAT_EVERY = 5
FILE_TTL = 6 * 3600  # seconds a `scene:`/`blob:` key lives after its last refresh (transfer.py)
FILE_REFRESH = 600  # the head refreshes the files of unfinished jobs this often
VISIBILITY_TIMEOUT = 3600  # Celery's redelivery backstop; lampyr's leases act long before it


def key(*parts) -> str:
    return PREFIX + ":".join(str(p) for p in parts)


K_PROTOCOL = key("protocol")
K_EPOCH = key("epoch")
K_CONFIG = key("config")
K_CONTROL = key("control")
K_JOBS = key("jobs")
K_INFLIGHT = key("inflight")
K_ATTEMPTS = key("attempts")
K_RESULTS = key("results")
K_PROCESSING = key("results", "processing")
K_ASIDE = key("results", "aside")
K_CONTROL_PROCESSING = key("control", "processing")
K_COMMAND_ERRORS = key("command-errors")
K_METRICS = key("metrics")
K_THROUGHPUT = key("throughput")
K_SEEN = key("seen")


def k_scene(sha: str) -> str:
    return key("scene", sha)


def k_blob(sha: str) -> str:
    return key("blob", sha)


def k_job(job: str) -> str:
    return key("job", job)


def k_lease(batch: str) -> str:
    return key("lease", batch)


def k_result(batch: str, ticket: int) -> str:
    return key("result", batch, ticket)


def k_host(name: str) -> str:
    return key("host", name)


def k_slot(name: str, pid: int) -> str:
    return key("slot", name, pid)


def k_layout(job: str) -> str:
    return key("layout", job)


def k_progress(job: str) -> str:
    return key("progress", job)


def k_tiles(job: str) -> str:
    return key("tiles", job)


@dataclass(frozen=True)
class Batch:
    """One unit of work: samples [first, first + count) of one tile of one frame of a job.

    tile: index into the job's tile list; x0, y0, w, h: that tile's rectangle in pixels.
    """

    job: str
    frame: int
    tile: int
    first: int
    count: int
    x0: int
    y0: int
    w: int
    h: int

    @property
    def id(self) -> str:
        return f"{self.job}/{self.frame}/{self.tile}/{self.first}/{self.count}"

    @property
    def range(self) -> tuple[int, int]:
        return (self.first, self.count)


def parse_batch_id(text: str) -> tuple[str, int, int, int, int]:
    """`job/frame/tile/first/count` → (job, frame, tile, first, count)."""
    job, frame, tile, first, count = text.rsplit("/", 4)
    return job, int(frame), int(tile), int(first), int(count)


@dataclass(frozen=True)
class RenderTask:
    """The JSON argument of TASK_RENDER.

    bundle: sha256 of the scene's manifest (`scene:<sha>`); shot: the shot file's path in the
    scene (also named by the manifest); overrides: the
    job's `Shot.with_overrides` arguments (frames as [first, last]).
    """

    protocol: int
    batch: Batch
    ticket: int
    bundle: str
    shot: str
    overrides: dict

    def to_json(self) -> str:
        """The same text as json.dumps(dataclasses.asdict(self), sort_keys=True), built without
        asdict's deep copy: the head makes one for every batch it sends (measured: 13 against
        54 µs a task)."""
        d = {"protocol": self.protocol, "batch": dict(vars(self.batch)), "ticket": self.ticket,
             "bundle": self.bundle, "shot": self.shot, "overrides": self.overrides}
        return json.dumps(d, sort_keys=True)

    @classmethod
    def from_json(cls, text: str) -> "RenderTask":
        d = json.loads(text)
        if d.get("protocol") != PROTOCOL_VERSION:
            raise ProtocolSkew(d.get("protocol"))
        return cls(protocol=d["protocol"], batch=Batch(**d["batch"]), ticket=int(d["ticket"]),
                   bundle=d["bundle"], shot=d["shot"], overrides=dict(d["overrides"]))


class ProtocolSkew(LampyrError):
    """A message or a head speaking another PROTOCOL_VERSION than this side."""

    def __init__(self, theirs):
        self.theirs = theirs
        super().__init__(
            f"the head speaks lampyr wire protocol {theirs}, this program speaks {PROTOCOL_VERSION}: "
            "install the same lampyr version on the head and every worker")


def result_notice(batch: str, ticket: int, worker: str, seconds: float,
                  prepare: float = 0.0) -> str:
    """seconds: rendering; prepare: fetching, unpacking and compiling the scene first."""
    return json.dumps({"kind": "result", "batch": batch, "ticket": ticket, "worker": worker,
                       "seconds": round(seconds, 4), "prepare": round(prepare, 4)})


def partial_notice(batch: str, ticket: int, worker: str, seconds: float, prepare: float,
                   done: int) -> str:
    """A batch handed back part-way (working hours over, the worker stopping, its user busy):
    the film under `result:<batch>:<ticket>` holds samples [first, first + done) — none when
    done is 0 — and the head queues the rest again. Samples are deterministic, so the part is a
    valid result on its own."""
    return json.dumps({"kind": "partial", "batch": batch, "ticket": ticket, "worker": worker,
                       "seconds": round(seconds, 4), "prepare": round(prepare, 4),
                       "done": int(done)})


def error_notice(batch: str, ticket: int, worker: str, error: str) -> str:
    return json.dumps({"kind": "error", "batch": batch, "ticket": ticket, "worker": worker,
                       "error": error})


# ---------------------------------------------------------------------------------------------
# leases: compare-and-set on `lease:<batch>`, so a worker only renews or frees its own lease

_RENEW = """
if redis.call('get', KEYS[1]) == ARGV[1] then
  return redis.call('pexpire', KEYS[1], ARGV[2])
end
return 0
"""
_RELEASE = """
if redis.call('get', KEYS[1]) == ARGV[1] then
  return redis.call('del', KEYS[1])
end
return 0
"""


def lease_acquire(r, batch: str, holder: str, seconds: float) -> bool:
    """Take the batch's lease for `seconds`; False when another holder has it."""
    return bool(r.set(k_lease(batch), holder, nx=True, px=max(1, int(seconds * 1000))))


def lease_renew(r, batch: str, holder: str, seconds: float) -> bool:
    """Extend our lease; False when it expired (the head may have queued the batch again)."""
    return bool(r.eval(_RENEW, 1, k_lease(batch), holder, max(1, int(seconds * 1000))))


def lease_release(r, batch: str, holder: str) -> None:
    r.eval(_RELEASE, 1, k_lease(batch), holder)


def celery_settings(broker_url: str) -> dict:
    """Celery settings both sides use, so that they agree (the visibility timeout above all:
    Celery reads it from broker and result-backend transport options separately)."""
    transport = {"visibility_timeout": VISIBILITY_TIMEOUT}
    return {
        "broker_url": broker_url,
        "broker_transport_options": dict(transport),
        "result_backend_transport_options": dict(transport),
        "task_serializer": "json",
        "result_serializer": "json",
        "accept_content": ["json"],
        "result_accept_content": ["json"],
        "task_ignore_result": True,
        "task_acks_late": True,
        "task_reject_on_worker_lost": True,
        "worker_prefetch_multiplier": 1,
        "worker_cancel_long_running_tasks_on_connection_loss": True,
        "broker_connection_retry": True,
        "broker_connection_retry_on_startup": True,
        "broker_connection_max_retries": None,
        "task_default_queue": QUEUE,
        "task_create_missing_queues": True,
        "worker_hijack_root_logger": False,
        "worker_send_task_events": False,
        "task_send_sent_event": False,
        "broker_heartbeat": 0,
    }
