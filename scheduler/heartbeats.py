"""The one reader of worker heartbeats (`host:<name>`) and slot records (`slot:<name>:<pid>`).

Everything on the head's side that asks which workers are alive — dispatch counting free cores,
the ready-by forecast, the history of workers seen, `lampyr status` and the web page — reads them
here, with one SCAN and one MGET per kind of key.
"""

from __future__ import annotations

import json

from . import protocol as P

# heartbeat states of a worker that takes no batch now (worker/supervisor.py)
RESTING = ("outside working hours", "paused: user busy")

_HOST = P.key("host", "")
_SLOT = P.key("slot", "")


def _scan(r, prefix: str) -> list[tuple[str, dict]]:
    keys = list(r.scan_iter(match=prefix + "*", count=500))
    if not keys:
        return []
    out = []
    for k, raw in zip(keys, r.mget(keys)):
        if raw:
            try:
                out.append((k.decode()[len(prefix):], json.loads(raw)))
            except ValueError:
                continue  # a record that is not JSON: not a lampyr worker's
    return out


def hosts(r) -> list[dict]:
    """Every live heartbeat, each with "name" (from its key when it does not carry one)."""
    out = []
    for name, info in _scan(r, _HOST):
        if isinstance(info, dict):
            info.setdefault("name", name)
            out.append(info)
    return out


def slots(r) -> list[dict]:
    """Every live slot record, each with "worker" (from its key when it does not carry one)."""
    out = []
    for suffix, slot in _scan(r, _SLOT):
        if isinstance(slot, dict):
            slot.setdefault("worker", suffix.rsplit(":", 1)[0])
            out.append(slot)
    return out


def free_cores(beats: list[dict]) -> int:
    """Cores of the hosts that take work now (not resting)."""
    return sum(int(info.get("cores", 1)) for info in beats if info.get("state") not in RESTING)
