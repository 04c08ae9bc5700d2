"""The head's numbers for monitoring: counters it keeps, and a Prometheus text endpoint.

The head counts what happens to batches (merged, raised, failed for good, leases lapsed) and,
with every status publish, writes a snapshot of its counters and queue to the `metrics` hash in
Redis. The endpoint runs in the head (`--metrics-port`) and reads that snapshot plus the live
worker heartbeats with the head's own address: neither the workers' nor the artists' Redis user
may read `metrics` (scheduler/acl.py).

The text (Prometheus exposition format 0.0.4) is written by the prometheus_client library from
metric families built for each request; the metric names are lampyr's, counters end in `_total`.
"""

from __future__ import annotations

import json
import threading
import time
from collections import deque
from dataclasses import dataclass, field, fields

from . import protocol as P

CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"  # what generate_latest writes
RATE_WINDOW = 60.0  # seconds over which batches/s and samples/s gauges are averaged


@dataclass
class HeadCounters:
    """Monotonic counts since this head process started (Prometheus copes with resets)."""

    batches_merged: int = 0
    pixel_samples_merged: int = 0
    batch_errors: int = 0  # a worker reported an exception (the batch may be retried)
    batches_failed: int = 0  # gave up after the attempt limit
    lease_expiries: int = 0  # a worker went silent while it held a batch
    started: float = field(default_factory=time.time)
    born: float = field(default_factory=time.monotonic)
    _recent: deque = field(default_factory=deque, repr=False)

    def merged(self, pixel_samples: int, now: float | None = None) -> None:
        now = time.monotonic() if now is None else now
        self.batches_merged += 1
        self.pixel_samples_merged += int(pixel_samples)
        self._recent.append((now, int(pixel_samples)))

    def rates(self, now: float | None = None) -> tuple[float, float]:
        """(batches per second, pixel-samples per second) over the last RATE_WINDOW seconds
        (over the head's life so far, while that is shorter)."""
        now = time.monotonic() if now is None else now
        while self._recent and self._recent[0][0] < now - RATE_WINDOW:
            self._recent.popleft()
        span = max(min(RATE_WINDOW, now - self.born), 1e-9)
        return (len(self._recent) / span, sum(n for _, n in self._recent) / span)

    def as_dict(self) -> dict:
        # the counters only: dataclasses.asdict would deep-copy the minute of merges in _recent
        # (12 000 entries at 200 batches/s), 29 ms at every snapshot, four times a second
        return {f.name: getattr(self, f.name) for f in fields(self)
                if f.name not in ("_recent", "born")}


def snapshot(head, job_states: dict | None = None) -> dict:
    """The numbers the endpoint shows, from a running `Head` (plain JSON-able values);
    job_states: job → state, when the caller has them (else asked of the head)."""
    batches_per_s, samples_per_s = head.metrics.rates()
    states: dict[str, int] = {}
    for job, run in head.jobs.items():
        s = job_states[job] if job_states is not None else head.job_state(run)
        states[s] = states.get(s, 0) + 1
    rendering = sum(1 for e in head.leases.table.values() if e.leased)
    return {
        **head.metrics.as_dict(),
        "batches_pending": sum(len(run.pending) for run in head.jobs.values()
                               if not run.rec.cancelled),
        "batches_queued": len(head.leases) - rendering,
        "batches_rendering": rendering,
        "batches_per_second": round(batches_per_s, 4),
        "pixel_samples_per_second": round(samples_per_s, 1),
        "jobs": states,
        "updated": time.time(),
    }


def publish(pipe, snap: dict) -> None:
    pipe.set(P.K_METRICS, json.dumps(snap))


def read_snapshot(r) -> dict | None:
    raw = r.get(P.K_METRICS)
    return json.loads(raw) if raw else None


# ---------------------------------------------------------------------------------------------
# the text format, written by prometheus_client from metric families built per request

_FAMILIES = (
    # name, kind, help, snapshot key
    ("lampyr_batches_pending", "gauge", "Batches planned but not yet queued.", "batches_pending"),
    ("lampyr_batches_queued", "gauge", "Batches queued that no worker has picked up yet.",
     "batches_queued"),
    ("lampyr_batches_rendering", "gauge", "Batches a worker holds the lease of.",
     "batches_rendering"),
    ("lampyr_batches_merged_total", "counter", "Batch results merged into tile accumulators.",
     "batches_merged"),
    ("lampyr_pixel_samples_merged_total", "counter", "Pixel-samples merged.",
     "pixel_samples_merged"),
    ("lampyr_batches_per_second", "gauge", "Batches merged per second over the last minute.",
     "batches_per_second"),
    ("lampyr_pixel_samples_per_second", "gauge",
     "Pixel-samples merged per second over the last minute.", "pixel_samples_per_second"),
    ("lampyr_batch_errors_total", "counter", "Batches whose worker reported an error.",
     "batch_errors"),
    ("lampyr_batches_failed_total", "counter", "Batches given up after the attempt limit.",
     "batches_failed"),
    ("lampyr_lease_expiries_total", "counter", "Leases that lapsed: a worker went silent.",
     "lease_expiries"),
)
JOB_STATES = ("queued", "running", "paused", "done", "failed", "cancelled")
HEAD_SILENT_AFTER = 10.0  # s; the head publishes several times a second, so older is a dead head


def families(snap: dict | None, workers: list[dict], now: float | None = None) -> list:
    """The metric families for a snapshot (None: no head has published yet) and live workers
    (as `store.workers` returns them), as prometheus_client metric family objects."""
    from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

    now = time.time() if now is None else now
    age = (now - snap["updated"]) if snap else float("inf")
    out = [GaugeMetricFamily("lampyr_head_up", "1 while the head publishes its numbers.",
                             value=float(age < HEAD_SILENT_AFTER))]
    if snap:
        for name, kind, text, key in _FAMILIES:
            cls = CounterMetricFamily if kind == "counter" else GaugeMetricFamily
            out.append(cls(name, text, value=float(snap.get(key, 0))))
        jobs = GaugeMetricFamily("lampyr_jobs", "Jobs by state.", labels=["state"])
        for s in JOB_STATES:
            jobs.add_metric([s], float(snap.get("jobs", {}).get(s, 0)))
        out.append(jobs)
    hosts = [w for w in workers if "host" in w]
    out.append(GaugeMetricFamily("lampyr_workers_online", "Worker hosts whose heartbeat is live.",
                                 value=float(len(hosts))))
    out.append(GaugeMetricFamily("lampyr_worker_cores_online", "Cores offered by live workers.",
                                 value=float(sum(int(w.get("cores", 1)) for w in hosts))))
    speed = GaugeMetricFamily("lampyr_worker_pixel_samples_per_second",
                              "Speed of each worker host's batches in flight.", labels=["worker"])
    for w in workers:
        speed.add_metric([str(w["name"])], sum(float(s.get("pixel_samples_per_second", 0.0))
                                               for s in w.get("slots", [])))
    out.append(speed)
    return out


def exposition(snap: dict | None, workers: list[dict], now: float | None = None) -> str:
    """Prometheus text (exposition format 0.0.4, written by prometheus_client) for a snapshot
    and live workers; see `families`."""
    from prometheus_client.exposition import generate_latest
    from prometheus_client.registry import CollectorRegistry

    fams = families(snap, workers, now)

    class _Once:
        def collect(self):
            return fams

    registry = CollectorRegistry(auto_describe=False)
    registry.register(_Once())
    return generate_latest(registry).decode()


def metrics_app(url: str):
    """A WSGI app answering `GET /metrics` from the farm at `url` (404 elsewhere)."""
    from .store import connect, workers

    r = connect(url, check=False)

    def app(environ, start_response):
        if environ.get("PATH_INFO", "/") not in ("/metrics", "/metrics/"):
            start_response("404 Not Found", [("Content-Type", "text/plain; charset=utf-8")])
            return [b"only /metrics is served here\n"]
        try:
            body = exposition(read_snapshot(r), workers(r)).encode()
        except Exception as err:  # Redis down: say so, do not crash the server thread
            start_response("503 Service Unavailable",
                           [("Content-Type", "text/plain; charset=utf-8")])
            return [f"the farm's Redis cannot be read: {err}\n".encode()]
        start_response("200 OK", [("Content-Type", CONTENT_TYPE),
                                  ("Content-Length", str(len(body)))])
        return [body]

    return app


class MetricsServer:
    """`metrics_app` on waitress in a daemon thread; `close()` stops it."""

    def __init__(self, url: str, host: str, port: int):
        from waitress.server import create_server

        self.server = create_server(metrics_app(url), host=host, port=port, threads=2,
                                    ident="lampyr")
        self.port = int(self.server.effective_port)  # waitress gives it as text; 0 asks for a free one
        self.thread = threading.Thread(target=self.server.run, name="lampyr-metrics",
                                       daemon=True)
        self.thread.start()

    def close(self) -> None:
        self.server.close()
