"""The one reader of worker heartbeats (`host:<name>`) and slot records (`slot:<name>:<pid>`).

Everything on the head's side that asks which workers are alive — dispatch counting free cores,
the ready-by forecast, the history of workers seen, `lampyr status` and the web page — reads them
here, with one SCAN and one MGET per kind of key, and gets only well-formed records: a record a
worker (or anyone with the workers' password) wrote with a field of the wrong type is left out
here, once, and logged, so nothing further on has to doubt a field.
"""

from __future__ import annotations

import json
import logging

from . import protocol as P

log = logging.getLogger("lampyr.head")

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


def _number(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def host_fault(info) -> str | None:
    """What is wrong with a heartbeat (after its name was filled in), None when nothing: name a
    string, cores a whole number >= 1, state a string, windows a list of [start, end] numbers
    (each but the name may be left out or null)."""
    if not isinstance(info, dict):
        return "not a JSON object"
    if not isinstance(info.get("name"), str):
        return "name is not a string"
    cores = info.get("cores")
    if cores is not None and (not isinstance(cores, int) or isinstance(cores, bool) or cores < 1):
        return "cores is not a whole number of 1 or more"
    if not isinstance(info.get("state") or "", str):
        return "state is not a string"
    windows = info.get("windows") or []
    if not isinstance(windows, list) or not all(
            isinstance(w, list) and len(w) == 2 and all(map(_number, w)) for w in windows):
        return "windows is not a list of [start, end] pairs of numbers"
    return None


def slot_fault(slot) -> str | None:
    """What is wrong with a slot record (after its worker was filled in), None when nothing:
    worker and batch strings, pixel_samples_per_second a number (both may be left out or null)."""
    if not isinstance(slot, dict):
        return "not a JSON object"
    if not isinstance(slot.get("worker"), str):
        return "worker is not a string"
    if not isinstance(slot.get("batch") or "", str):
        return "batch is not a string"
    if not _number(slot.get("pixel_samples_per_second") or 0.0):
        return "pixel_samples_per_second is not a number"
    return None


_told: dict[tuple[str, str], None] = {}  # (key, fault) already logged, newest last


def _drop(kind: str, key: str, fault: str) -> None:
    """Log a record set aside once per key and fault (the head reads them every second)."""
    if (key, fault) in _told:
        return
    _told[(key, fault)] = None
    while len(_told) > 256:
        del _told[next(iter(_told))]
    log.warning("%s %s ignored: %s", kind, key, fault)


def hosts(r) -> list[dict]:
    """Every live, well-formed heartbeat, each with "name" (from its key when it does not carry
    one); a malformed one is left out, and logged."""
    out = []
    for name, info in _scan(r, _HOST):
        if isinstance(info, dict):
            info.setdefault("name", name)
        fault = host_fault(info)
        if fault is None:
            info["cores"] = 1 if info.get("cores") is None else info["cores"]  # null or left out
            out.append(info)
        else:
            _drop("heartbeat", name, fault)
    return out


def slots(r) -> list[dict]:
    """Every live, well-formed slot record, each with "worker" (from its key when it does not
    carry one); a malformed one is left out, and logged."""
    out = []
    for suffix, slot in _scan(r, _SLOT):
        if isinstance(slot, dict):
            slot.setdefault("worker", suffix.rsplit(":", 1)[0])
        fault = slot_fault(slot)
        if fault is None:
            out.append(slot)
        else:
            _drop("slot record", suffix, fault)
    return out


def free_cores(beats: list[dict]) -> int:
    """Cores of the hosts that take work now (not resting)."""
    return sum(info.get("cores") or 1 for info in beats if info.get("state") not in RESTING)
