"""The lease keeper: which queued batches are alive, and which must be queued again.

The head keeps, for every batch it has queued, the ticket of its current dispatch and whether a
worker's lease on it has been seen. A worker holds `lease:<batch>` (with a TTL of
`lease_seconds`) while it renders and renews it at every sample chunk. When a lease that was
seen vanishes without a result, the worker went silent (powered off, frozen, unplugged): the
batch is queued again under a new ticket. A batch whose lease was never seen is left alone until
Celery's own redelivery backstop (the visibility timeout) has passed.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

from . import protocol as P


@dataclass
class Inflight:
    """One queued or running batch. sent: time.monotonic() of the dispatch."""

    batch: P.Batch
    ticket: int
    sent: float = field(default_factory=time.monotonic)
    leased: bool = False


class LeaseKeeper:
    """Inflight batches by id; `expired(r)` returns those to queue again."""

    def __init__(self, backstop: float = P.VISIBILITY_TIMEOUT + 60):
        self.table: dict[str, Inflight] = {}
        self.backstop = backstop

    def __len__(self) -> int:
        return len(self.table)

    def __contains__(self, bid: str) -> bool:
        return bid in self.table

    def add(self, batch: P.Batch, ticket: int) -> None:
        self.table[batch.id] = Inflight(batch, ticket)

    def pop(self, bid: str) -> Inflight | None:
        return self.table.pop(bid, None)

    def get(self, bid: str) -> Inflight | None:
        return self.table.get(bid)

    def waiting(self) -> int:
        """Batches queued but not yet picked up by a worker."""
        return sum(1 for e in self.table.values() if not e.leased)

    def expired(self, r) -> list[Inflight]:
        """Poll every lease once; entries whose worker went silent, or that outlived the
        backstop without ever being leased."""
        if not self.table:
            return []
        entries = list(self.table.values())
        pipe = r.pipeline(transaction=False)
        for e in entries:
            pipe.exists(P.k_lease(e.batch.id))
            pipe.exists(P.k_result(e.batch.id, e.ticket))
        answers = pipe.execute()
        now = time.monotonic()
        out = []
        for i, e in enumerate(entries):
            leased, has_result = answers[2 * i], answers[2 * i + 1]
            if leased:
                e.leased = True
            elif has_result:
                continue  # finished; its notice is on its way to the merger
            elif e.leased or now - e.sent > self.backstop:
                out.append(e)
        return out
