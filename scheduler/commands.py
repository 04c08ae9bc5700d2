"""The head's commands (from `control`): submit, retry, pause, resume, cancel, refine, priority.

Each command is a plain function `op(ctx, **args)` registered in COMMANDS under its name; the
JSON a client queues (`store.send_command`) is `{"op": name, **args}`. Adding a command is adding
one function here.

Durability: `take()` moves a command from `control` to `control:processing` (LMOVE), carries it
out, and only then removes it; a head killed in between finds it again at start-up (`replay()`
puts it back in front of `control`). So every command is idempotent: carried out twice, it
leaves the farm as once (submit skips a job it knows, refine raises to an absolute sample count,
retry and the others set states).

Errors: a command that fails is logged and recorded under `command-errors` (job → op, error,
time); the head publishes it in the job's status (`command_error`) until a later command on that
job succeeds. A submit that fails leaves the job's status `failed` with the reason.
"""

from __future__ import annotations

import json
import logging
import time
from dataclasses import dataclass
from pathlib import Path

from ..errors import LampyrError
from . import protocol as P
from .accumulator import write_atomic
from .assembler import REWRITE_EVERY, JobRun
from .jobs import JobFolder, JobRecord, is_job_id

log = logging.getLogger("lampyr.head")

# seconds per sample per pixel assumed for a submit that came without a layout (an old client):
# the probe render belongs to the submitter (submit.py), never to the head's loop (rule of thumb:
# a simple scene on one core of a desktop PC)
FALLBACK_COST = 2e-6

TILE_SIZES = (8, 4096)  # the tile sizes a job may have, in pixels (smallest, largest)
# the most batches one job may plan (frames × tiles × sample ranges): its pending list, its
# progress and its status stay within the head's memory (rule of thumb: ~1 KiB each on the
# head, so ~2 GiB at the cap)
MAX_BATCHES = 2_000_000
MAX_REPLAYS = 3  # start-ups a command may be carried out again at before it is set aside
K_REPLAYS = P.key("control", "replays")  # sha256 of a command's text → start-ups replayed at
K_CONTROL_ASIDE = P.key("control", "aside")  # {"command", "reason", "at"}: commands set aside
ASIDE_KEEP = 1000  # entries kept in an aside list (the newest)


class CommandError(LampyrError):
    """A command the head cannot carry out (an unknown job, a bad argument, an --out it cannot
    make)."""


@dataclass
class Context:
    """What commands may touch: the state folder, Redis, the job table (job id → JobRun), the
    dispatcher (to drop or skip a job's work) and how frames are written."""

    state: Path
    r: object
    runs: dict
    dispatch: object
    partial_frames: bool = True
    durable: bool = True  # see JobRun
    rewrite_every: float = REWRITE_EVERY
    store: object = None  # the head's tiles in memory (tilestore.TileStore), shared by its jobs
    denoised_errors: bool = True  # see JobRun


COMMANDS: dict = {}


def command(fn):
    COMMANDS[fn.__name__.rstrip("_")] = fn
    return fn


def job_run(ctx: Context, rec) -> JobRun:
    return JobRun(ctx.state, rec, ctx.partial_frames, durable=ctx.durable,
                  rewrite_every=ctx.rewrite_every, store=ctx.store,
                  denoised_errors=ctx.denoised_errors)


def _run(ctx: Context, job: str) -> JobRun:
    run = ctx.runs.get(job)
    if run is None:
        raise CommandError(f"no job {job} on this head")
    return run


# -- the commands ------------------------------------------------------------------------------

@command
def submit(ctx: Context, job: str, bundle: str, shot: str, overrides: dict, out: str | None,
           priority: int = 0, tile_size: int | None = None, batch_samples: int | None = None,
           submitted: float | None = None, ready_by: float | None = None) -> None:
    from ..engine.shot import load_shot
    from ..worker.cache import FileCache
    from .planner import choose_layout, first_pass_samples, sample_ranges
    from .transfer import read_manifest, safe_name

    if not is_job_id(job):
        raise CommandError(f"submit: job id {str(job)[:60]!r} is not one lampyr makes; expected "
                           "NAME-xxxxxx (up to 24 letters, digits, - or _, then 6 hex digits)")
    if job in ctx.runs:
        return
    folder = JobFolder(ctx.state, job)
    if folder.taken():
        raise CommandError(f"submit: job {job} already exists on this head (archived, or its "
                           "record cannot be loaded); expected a new job id")
    check_layout(tile_size, batch_samples)
    if out is not None:
        check_out(out)
    if not (folder.root / "scene.json").exists():
        # the scene's files, linked from the head's file cache; the manifest beside them
        # lets the head put back into Redis whatever it loses (Head.hold_files)
        folder.root.mkdir(parents=True, exist_ok=True)
        _, raw = read_manifest(ctx.r, bundle)
        FileCache().materialise(ctx.r, bundle, dest=folder.bundle)
        write_atomic(folder.root / "scene.json", raw)
    spec = load_shot(folder.bundle.joinpath(*safe_name(shot).parts))
    o = dict(overrides)
    if "frames" in o:
        o["frames"] = tuple(o["frames"])
    if o:
        spec = spec.with_overrides(**o)
    if tile_size is None or batch_samples is None:
        layout = choose_layout(spec.width, spec.height, spec.samples, FALLBACK_COST)
        tile_size = tile_size or layout.tile_size
        batch_samples = batch_samples or layout.batch_samples
    # the first pass is there to show whole frames early: none when frames appear only complete
    first = first_pass_samples(spec.samples, batch_samples) if ctx.partial_frames else 0
    check_batch_count(spec, tile_size, batch_samples, first)
    ranges = sample_ranges(0, spec.samples, batch_samples, first)
    rec = JobRecord(id=job, name=spec.name, bundle=bundle, shot=shot, overrides=overrides,
                    out=out or str(folder.root / "frames"), priority=int(priority),
                    submitted=submitted or time.time(), tile_size=int(tile_size),
                    batch_samples=int(batch_samples), samples=int(spec.samples), ranges=ranges,
                    ready_by=None if ready_by is None else float(ready_by))
    folder.save(rec)
    ctx.runs[job] = job_run(ctx, rec)
    ctx.r.zadd(P.K_JOBS, {job: rec.submitted})
    log.info("job %s: %d batches, tiles %d px, %d samples per batch", job,
             len(ctx.runs[job].pending), tile_size, batch_samples)


def check_layout(tile_size, batch_samples) -> None:
    """tile_size a whole number of TILE_SIZES pixels and batch_samples one of 1 or more (each
    may be None: chosen by the head); CommandError naming the field otherwise."""
    lo, hi = TILE_SIZES
    if tile_size is not None and not (_whole(tile_size) and lo <= tile_size <= hi):
        raise CommandError(f"submit: tile_size {tile_size!r} is out of range; expected a whole "
                           f"number of {lo} to {hi} pixels")
    if batch_samples is not None and not (_whole(batch_samples) and batch_samples >= 1):
        raise CommandError(f"submit: batch_samples {batch_samples!r} is out of range; expected a "
                           "whole number of 1 or more")


def check_batch_count(spec, tile_size: int, batch_samples: int, first_pass: int) -> None:
    """frames × tiles × sample ranges at most MAX_BATCHES; CommandError with the count
    otherwise."""
    tiles = -(-spec.width // tile_size) * -(-spec.height // tile_size)
    s0 = first_pass if 0 < first_pass < spec.samples else 0
    ranges = (1 if s0 else 0) + -(-(spec.samples - s0) // batch_samples)
    n = len(spec.frames()) * tiles * ranges
    if n > MAX_BATCHES:
        raise CommandError(f"submit: {n} batches ({len(spec.frames())} frame(s) × {tiles} tiles "
                           f"× {ranges} sample ranges) is more than the {MAX_BATCHES} a job may "
                           "have; expected a larger tile_size or batch_samples")


def _whole(x) -> bool:
    return isinstance(x, int) and not isinstance(x, bool)


def check_out(out: str) -> None:
    """The frames folder exists or can be made, here; CommandError naming it otherwise."""
    try:
        Path(out).mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise CommandError(f"--out {out}: the head cannot make this folder "
                           f"({err.strerror or err}); expected a folder it can write") from None


@command
def retry(ctx: Context, job: str, frames: list | None = None, tile: int | None = None) -> None:
    """Queue failed batches again: all of the job, of frames [lo, hi], or (with `tile`) of that
    tile of those frames only; a job stopped by an error tries again."""
    run = _run(ctx, job)
    lo, hi = (int(frames[0]), int(frames[1])) if frames else (-1, 1 << 30)
    again = [bid for bid in run.rec.failed if lo <= P.parse_batch_id(bid)[1] <= hi
             and (tile is None or P.parse_batch_id(bid)[2] == int(tile))]
    for bid in again:
        del run.rec.failed[bid]
    if again:
        ctx.r.hdel(P.K_ATTEMPTS, *again)
    stopped = run.rec.error is not None
    run.rec.error = None
    run.rec.ended = None
    run.save()
    if stopped:
        run.write_frames(run.frames)  # the frames that could not be written before
    run.replan()
    ctx.dispatch.skip_in_flight(run)


@command
def pause(ctx: Context, job: str) -> None:
    run = _run(ctx, job)
    run.rec.paused = True
    run.save()


@command
def resume(ctx: Context, job: str) -> None:
    run = _run(ctx, job)
    run.rec.paused = False
    run.save()


@command
def priority(ctx: Context, job: str, priority: int) -> None:
    run = _run(ctx, job)
    try:
        run.rec.priority = int(priority)
    except (TypeError, ValueError):
        raise CommandError(f"priority: {priority!r} is not a whole number") from None
    run.save()


@command
def cancel(ctx: Context, job: str) -> None:
    run = _run(ctx, job)
    run.rec.cancelled = True
    run.save()
    ctx.dispatch.drop_job(run)


@command
def refine(ctx: Context, job: str, samples: int, noise: float | None = None,
           frames: list | None = None, denoised_noise: float | None = None) -> None:
    """Add samples up to `samples` per pixel, in the job's batch size: to every tile, or with a
    `noise` goal only to tiles whose relative standard error is above it, or with a
    `denoised_noise` goal only to tiles whose denoised error (docs/denoising.md) is above it, in
    proportion to it (at most `samples`), or not known yet (up to `samples`); with `frames` (a
    list of frame numbers) only to the tiles of those frames."""
    from .planner import sample_ranges

    run = _run(ctx, job)
    samples = int(samples)
    if noise is None and denoised_noise is None and frames is None:
        if samples <= run.rec.samples:
            return
        run.rec.ranges = list(run.rec.ranges) + sample_ranges(run.rec.samples, samples,
                                                              run.rec.batch_samples)
        run.rec.samples = samples
    else:
        if noise is not None:
            tiles = [(key, samples) for key in run.noisy_tiles(float(noise))]
        elif denoised_noise is not None:  # each in proportion to its denoised error
            tiles = run.denoised_targets(float(denoised_noise), samples)
        else:
            tiles = [((f, i), samples) for f in run.frames for i in range(len(run.tiles))]
        if frames is not None:
            chosen = {int(f) for f in frames}
            tiles = [((f, i), n) for (f, i), n in tiles if f in chosen]
        for (f, i), target in tiles:
            key = f"{f}/{i}"
            have = run.tile_target(f, i)
            if target > have:
                run.rec.extra[key] = list(run.rec.extra.get(key, [])) + sample_ranges(
                    have, target, run.rec.batch_samples)
    run.rec.ended = None
    run.save()
    again = job_run(ctx, run.rec)
    again.written = dict(run.written)
    again.written_sum = dict(run.written_sum)
    again.denoised = dict(run.denoised)
    ctx.runs[job] = again
    ctx.dispatch.skip_in_flight(again)


# -- taking commands ---------------------------------------------------------------------------

def replay(r, count: bool = True) -> int:
    """Start-up: commands a killed head was carrying out go back in front of `control`, in
    their order. count: this is a start-up of the head (not Redis coming back), so each command
    replayed has its replays counted (`control:replays`, by the sha256 of its text); one replayed
    MAX_REPLAYS times already — it may be what stops the head — is set aside in `control:aside`
    with the reason instead, and logged."""
    n = 0
    while (raw := r.lindex(P.K_CONTROL_PROCESSING, -1)) is not None:
        sha = _sha256(raw)
        if count and r.hincrby(K_REPLAYS, sha, 1) > MAX_REPLAYS:
            reason = (f"carried out again at {MAX_REPLAYS} start-ups of the head and not "
                      "finished: set aside")
            pipe = r.pipeline(transaction=True)
            pipe.rpush(K_CONTROL_ASIDE, json.dumps({
                "command": raw.decode("utf-8", "replace")[:2000], "reason": reason,
                "at": round(time.time(), 1)}))
            pipe.ltrim(K_CONTROL_ASIDE, -ASIDE_KEEP, -1)
            pipe.rpop(P.K_CONTROL_PROCESSING)
            pipe.hdel(K_REPLAYS, sha)
            pipe.execute()
            log.error("command %r %s", raw[:200], reason)
            continue
        r.lmove(P.K_CONTROL_PROCESSING, P.K_CONTROL, "RIGHT", "LEFT")
        n += 1
    if n:
        log.info("carrying out again %d command(s) a stopped head had taken", n)
    return n


def take(ctx: Context, limit: int = 100) -> bool:
    """Carry out up to `limit` queued commands, each taken durably (see the module docstring)."""
    r = ctx.r
    n = 0
    while n < limit:
        raw = r.lmove(P.K_CONTROL, P.K_CONTROL_PROCESSING, "LEFT", "RIGHT")
        if raw is None:
            break
        n += 1
        handle(ctx, raw)
        pipe = r.pipeline(transaction=False)
        pipe.lrem(P.K_CONTROL_PROCESSING, 1, raw)
        pipe.hdel(K_REPLAYS, _sha256(raw))  # done: its replays are no longer counted
        pipe.execute()
    return n > 0


def _sha256(raw: bytes) -> str:
    import hashlib

    return hashlib.sha256(raw).hexdigest()


def handle(ctx: Context, raw: bytes) -> None:
    """Carry out one command; its error is recorded, never raised."""
    try:
        cmd = json.loads(raw)
        op = cmd.pop("op")
        job = cmd.get("job")
    except (ValueError, KeyError, AttributeError, TypeError):
        log.error("command not understood, dropped: %r", raw[:200])
        return
    from .store import transient_errors

    try:
        fn = COMMANDS.get(op) if isinstance(op, str) else None
        if fn is None:
            raise CommandError(f"unknown command {str(op)[:60]!r}")
        fn(ctx, **cmd)
    except transient_errors():
        raise  # Redis went away: the command stays in control:processing, replayed (reconcile)
    except Exception as err:  # noqa: BLE001 — no command may stop the head
        text = _one_line(err)
        log.error("command %s failed: %s", raw[:200], text)
        if isinstance(job, str):
            record_error(ctx, job, str(op), text)
        return
    if isinstance(job, str):
        ctx.r.hdel(P.K_COMMAND_ERRORS, job)


def record_error(ctx: Context, job: str, op: str, text: str) -> None:
    entry = {"op": op, "error": text, "at": round(time.time(), 1)}
    ctx.r.hset(P.K_COMMAND_ERRORS, job, json.dumps(entry))
    if job not in ctx.runs and ctx.r.exists(P.k_job(job)):
        # a submit that failed: the status its client wrote says so (the head publishes no
        # status for a job it does not run, so this one stays)
        ctx.r.hset(P.k_job(job), mapping={"state": json.dumps("failed"),
                                           "error": json.dumps(f"{op}: {text}"),
                                           "command_error": json.dumps(entry)})


def errors(r) -> dict[str, dict]:
    """job → its recorded command error."""
    out = {}
    for k, v in r.hgetall(P.K_COMMAND_ERRORS).items():
        try:
            out[k.decode()] = json.loads(v)
        except ValueError:
            continue
    return out


def _one_line(err: BaseException) -> str:
    if isinstance(err, LampyrError):
        return str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
    text = str(err).strip().splitlines()
    return f"{type(err).__name__}: {text[0]}" if text else type(err).__name__
