"""The scheduler's public state API over Redis: find a head, send it commands, read status.

The command line and the web page use these functions and never raw keys. Commands are queued
on `control` and carried out by the head in order, so they work while the head is busy or even
briefly down (they wait in Redis).
"""

from __future__ import annotations

import json
import os
import time
from pathlib import Path

from ..errors import LampyrError
from . import protocol as P


class FarmError(LampyrError):
    """The farm cannot be reached or refused a request."""


def default_state() -> Path:
    env = os.environ.get("LAMPYR_STATE")
    if env:
        return Path(env)
    xdg = os.environ.get("XDG_DATA_HOME")
    return (Path(xdg) if xdg else Path.home() / ".local" / "share") / "lampyr"


def connect(url: str, check: bool = True, read_size: int = 65536):
    """A redis client for `url`; with `check`, fail with one clear line when it cannot talk.
    read_size: the most bytes one read from the socket takes (redis-py's default: 64 KiB)."""
    import redis

    try:
        r = redis.Redis.from_url(url, socket_timeout=10, socket_connect_timeout=5,
                                 health_check_interval=15, retry_on_timeout=True,
                                 socket_read_size=read_size)
    except ValueError as err:  # a scheme, host or port redis-py cannot read
        shown = redact(url) if "://" in url else url
        raise FarmError(f"not a farm address: {shown[:60]!r} ({err})") from None
    if check:
        try:
            r.ping()
        except redis.exceptions.AuthenticationError:
            if "@" not in url:
                raise FarmError(f"the farm at {url} requires a password "
                                "(use the address the head prints)") from None
            raise FarmError(f"the farm at {redact(url)} refused the password") from None
        except redis.exceptions.ResponseError as err:
            if "NOAUTH" in str(err):
                raise FarmError(f"the farm at {redact(url)} requires a password "
                                "(use the address the head prints)") from None
            raise
        except redis.exceptions.ConnectionError as err:
            raise FarmError(f"cannot reach the farm at {redact(url)}: {err}") from None
    return r


def transient_errors() -> tuple:
    """The exceptions of a lost or busy Redis (kombu's OperationalError wraps the same for
    Celery's sender): the head waits them out and carries on where it was, so no guard may take
    one for a fault of the command or result it was handling."""
    import redis
    from kombu.exceptions import OperationalError

    return (redis.exceptions.ConnectionError, redis.exceptions.TimeoutError,
            redis.exceptions.BusyLoadingError, OperationalError)


def redact(url: str) -> str:
    if "@" not in url:
        return url
    scheme, rest = url.split("://", 1)
    return f"{scheme}://***@{rest.split('@', 1)[1]}"


def check_protocol(r) -> None:
    theirs = r.get(P.K_PROTOCOL)
    if theirs is None:
        raise FarmError("no lampyr head has set up this Redis yet (start `lampyr head`)")
    if int(theirs) != P.PROTOCOL_VERSION:
        raise P.ProtocolSkew(int(theirs))


def send_command(r, op: str, **args) -> None:
    r.rpush(P.K_CONTROL, json.dumps({"op": op, **args}))


def job_status(r, job: str) -> dict | None:
    raw = r.hgetall(P.k_job(job))
    if not raw:
        return None
    return {k.decode(): json.loads(v) for k, v in raw.items()}


def list_jobs(r) -> list[dict]:
    """Every job's status, oldest first, in one round trip to Redis."""
    ids = [j.decode() for j in r.zrange(P.K_JOBS, 0, -1)]
    pipe = r.pipeline(transaction=False)
    for job in ids:
        pipe.hgetall(P.k_job(job))
    return [{k.decode(): json.loads(v) for k, v in raw.items()} for raw in pipe.execute() if raw]


def workers(r) -> list[dict]:
    """Live worker hosts with the batches their processes render now."""
    from . import heartbeats

    hosts = {}
    for info in heartbeats.hosts(r):
        info["slots"] = []
        hosts[info["name"]] = info
    for slot in heartbeats.slots(r):
        worker = slot["worker"]
        hosts.setdefault(worker, {"name": worker, "slots": []})["slots"].append(slot)
    return sorted(hosts.values(), key=lambda h: h["name"])


def wait_for_job(r, job: str, states=("done", "failed", "cancelled"), timeout: float = 600,
                 poll: float = 0.2) -> dict:
    """Poll a job's status until its state is one of `states`; returns the status."""
    give_up_at = time.monotonic() + timeout
    while True:
        st = job_status(r, job)
        if st is not None and st.get("state") in states:
            return st
        if time.monotonic() > give_up_at:
            raise FarmError(f"job {job} still {st and st.get('state')} after {timeout:.0f} s")
        time.sleep(poll)
