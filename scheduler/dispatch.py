"""Dispatch: queueing batches, their tickets and leases, reaping the silent, dropping a job's work.

The head keeps the order itself (Redis has no real priorities): `fill()` queues pending batches,
by job priority then age, keeping only a few more queued than there are worker cores that take
work now. Every dispatch of a batch gets a new ticket (`inflight` in Redis holds the current one),
so a message the head has replaced is skipped by its worker. A send that fails (Redis at its
memory cap, Redis gone) leaves the batch where it was — pending, or under its old lease — and
raises: no batch is ever in neither.

A batch that raised or whose worker went silent is queued again until it has been started
`max_attempts` times (the workers count starts in `attempts`), then failed for good with the
reason (`JobRun.fail_batch`); `retry` queues it again. Dropping a job's work (cancel, a ready-by
time reached, a job stopped by an error) is `drop_job`, and nothing else edits the lease table.
"""

from __future__ import annotations

import logging
import time

from . import heartbeats
from . import protocol as P
from .leases import Inflight, LeaseKeeper
from .sending import publish

log = logging.getLogger("lampyr.head")


class Dispatcher:
    """runs: the head's job table (job id → JobRun), shared, read only here; metrics: the head's
    counters; hold_files(run): keeps a job's scene in Redis before its batch is queued."""

    def __init__(self, r, sender, runs: dict, max_attempts: int, metrics, hold_files):
        self.r = r
        self.sender = sender
        self.runs = runs
        self.max_attempts = int(max_attempts)
        self.metrics = metrics
        self.hold_files = hold_files
        self.leases = LeaseKeeper()
        self.tickets: dict[str, int] = {}
        self._reap_at = 0.0
        self._cores = (-1e18, 0)

    # -- after a start or a Redis restart -----------------------------------------------------

    def restore(self) -> None:
        """Take over what Redis lists as queued: a batch under a live lease stays in flight (and
        leaves its job's pending list); the others are pending again, under a new ticket."""
        r = self.r
        queued, bad = {}, []
        for k, v in r.hgetall(P.K_INFLIGHT).items():
            ticket = _count(v)
            if ticket is None:  # not a ticket the head wrote: its batch is pending again
                log.warning("inflight %r: ticket %r is not a whole number; dropped", k[:200],
                            v[:40])
                bad.append(k)
            else:
                queued[k.decode("utf-8", "replace")] = ticket
        if bad:
            r.hdel(P.K_INFLIGHT, *bad)
        for bid, ticket in queued.items():
            self.tickets[bid] = max(self.tickets.get(bid, 0), ticket)
        self.leases = LeaseKeeper(self.leases.backstop)
        pipe = r.pipeline(transaction=False)
        for bid in queued:
            pipe.exists(P.k_lease(bid))
        live = {bid for bid, alive in zip(queued, pipe.execute()) if alive}
        for run in self.runs.values():
            keep = []
            for b in run.pending:
                if b.id in live and not run.rec.cancelled:
                    self.leases.add(b, queued[b.id])
                    self.leases.get(b.id).leased = True
                else:
                    keep.append(b)
            run.pending.clear()
            run.pending.extend(keep)
        stale = [bid for bid in queued if bid not in self.leases]
        if stale:
            r.hdel(P.K_INFLIGHT, *stale)

    # -- sending ------------------------------------------------------------------------------

    def send(self, b: P.Batch) -> None:
        self.send_group([b])

    def send_group(self, batches: list) -> None:
        """Queue `batches` under new tickets: their tickets in one round trip, then their
        messages in one group (sending.py). Raises when Redis refuses, with none of them taken
        for sent (the caller keeps them where they were)."""
        tickets = {}
        for b in batches:
            tickets[b.id] = self.tickets.get(b.id, 0) + 1
        self.tickets.update(tickets)
        payloads = []
        held = set()
        for b in batches:
            run = self.runs[b.job]
            if b.job not in held:
                self.hold_files(run)
                held.add(b.job)
            payloads.append(P.RenderTask(P.PROTOCOL_VERSION, b, tickets[b.id], run.rec.bundle,
                                         run.rec.shot, run.rec.overrides).to_json())
        self.r.hset(P.K_INFLIGHT, mapping=tickets)  # current before any worker can see a message
        publish(self.sender, payloads)
        for b in batches:
            self.leases.add(b, tickets[b.id])

    def requeue(self, b: P.Batch) -> None:
        """Send `b` again under a new ticket. When the send fails (Redis full, gone) the batch
        keeps its old lease entry (the next reap tries again), or, without one, goes back in
        front of its job's pending list; the error is raised on."""
        old = self.leases.pop(b.id)
        try:
            self.send(b)
        except BaseException:
            if b.id not in self.leases:
                if old is not None:
                    self.leases.table[b.id] = old
                elif b.job in self.runs:
                    self.runs[b.job].pending.appendleft(b)
            raise

    def fill(self, admit=lambda run, b: True) -> int:
        """Queue pending batches while fewer than `cores + 2` wait unclaimed in the queue, in one
        group. admit(run, b): False keeps the batch aside (the ready-by keeper's plan)."""
        room = max(2, self.free_cores() + 2) - self.leases.waiting()
        order = sorted((run for run in self.runs.values() if run.pending and not run.rec.paused
                        and not run.rec.cancelled and not run.rec.error),
                       key=lambda run: (-run.rec.priority, run.rec.submitted))
        chosen, ids = [], set()
        for run in order:
            while run.pending and len(chosen) < room:
                b = run.pending.popleft()
                if run.is_done(b) or b.id in self.leases or b.id in ids:
                    continue
                if not admit(run, b):
                    continue
                chosen.append(b)
                ids.add(b.id)
        if not chosen:
            return 0
        try:
            self.send_group(chosen)
        except BaseException:  # e.g. Redis at its memory cap: the batches stay pending, in order
            for b in reversed(chosen):
                self.runs[b.job].pending.appendleft(b)
            raise
        return len(chosen)

    def free_cores(self) -> int:
        """Cores of the live workers that can take work now (re-read once a second): a worker
        outside its working hours or paused for its user takes none, and batches queued for it
        would only wait, in an order frozen at queueing."""
        at, cores = self._cores
        if time.monotonic() - at < 1.0:
            return cores
        cores = heartbeats.free_cores(heartbeats.hosts(self.r))
        self._cores = (time.monotonic(), cores)
        return cores

    # -- ending a batch -----------------------------------------------------------------------

    def finish(self, bid: str) -> None:
        self.leases.pop(bid)
        self.r.hdel(P.K_INFLIGHT, bid)

    def fail(self, run, bid: str, text: str) -> None:
        """The batch fails for good with `text` (its frame is written without it)."""
        self.finish(bid)
        self.metrics.batches_failed += 1
        run.fail_batch(bid, text)

    def give_up_or_requeue(self, run, b: P.Batch, reason: str) -> None:
        """Queue `b` again, unless its starts reached the attempt limit: then it fails."""
        raw = self.r.hget(P.K_ATTEMPTS, b.id)
        attempts = _count(raw or 0)
        if attempts is None:  # not a count a worker wrote: counting starts again
            log.warning("attempts of %s: %r is not a whole number; counted from 0", b.id, raw[:40])
            self.r.hdel(P.K_ATTEMPTS, b.id)
            attempts = 0
        if attempts >= self.max_attempts:
            self.fail(run, b.id, f"{reason} (after {attempts} attempt(s))")
        else:
            self.requeue(b)

    def reap(self, every: float = 0.2) -> None:
        """Queue again (or fail) the batches whose worker went silent."""
        now = time.monotonic()
        if now - self._reap_at < every:
            return
        self._reap_at = now
        for entry in self.leases.expired(self.r):
            run = self.runs.get(entry.batch.job)
            if run is None or run.is_done(entry.batch):
                self.finish(entry.batch.id)
                continue
            self.metrics.lease_expiries += 1
            log.info("lease of %s expired", entry.batch.id)
            self.give_up_or_requeue(run, entry.batch,
                                    "its worker stopped answering (lease expired)")

    # -- a job's work -------------------------------------------------------------------------

    def inflight(self, job: str) -> list[Inflight]:
        return [e for e in self.leases.table.values() if e.batch.job == job]

    def leased_tiles(self) -> dict[str, set]:
        """job → {(frame, tile)} a worker holds a lease on now."""
        out: dict[str, set] = {}
        for e in self.leases.table.values():
            if e.leased:
                out.setdefault(e.batch.job, set()).add((e.batch.frame, e.batch.tile))
        return out

    def drop_job(self, run) -> None:
        """Drop a job's remaining work: its pending batches and every dispatch in flight (a
        worker that still renders one finds its ticket gone; a result still arriving is merged
        if the job is not cancelled)."""
        run.pending.clear()
        gone = [e.batch.id for e in self.inflight(run.rec.id)]
        for bid in gone:
            self.leases.pop(bid)
        if gone:
            self.r.hdel(P.K_INFLIGHT, *gone)

    def skip_in_flight(self, run) -> None:
        """Take out of a replanned job's pending list the batches already in flight."""
        keep = [b for b in run.pending if b.id not in self.leases]
        run.pending.clear()
        run.pending.extend(keep)

    def forget_attempts(self, job: str) -> None:
        """Clear the start counts of a job's batches (the job ended)."""
        ids = [k for k, _ in self.r.hscan_iter(P.K_ATTEMPTS, match=f"{job}/*", count=500)]
        if ids:
            self.r.hdel(P.K_ATTEMPTS, *ids)


def _count(raw) -> int | None:
    """A whole number Redis holds as text (a ticket, an attempt count); None when it is not one."""
    try:
        return int(raw)
    except (TypeError, ValueError):
        return None
