"""Reaching the head: one plain reason for each way it can fail, and waiting with back-off.

A worker started before its head, or whose head or network goes away, keeps trying with waits
that double from 1 s up to 60 s and says in one line what it waits for. What cannot mend by
waiting — a wrong password, a head of another protocol version — stops it with one line.
"""

from __future__ import annotations

import threading

from ..scheduler import protocol as P
from ..scheduler.store import FarmError, redact

FIRST_WAIT = 1.0
LONGEST_WAIT = 60.0


class NotYet(Exception):
    """The head cannot be reached now, for a reason that may mend by waiting."""


def reason(err: Exception) -> str:
    """A short, plain reason for a failed Redis call (connection refused, no answer, …)."""
    text = str(err).lower()
    for needle, plain in (
        ("connection refused", "connection refused"),
        ("timed out", "no answer: timed out"),
        ("timeout", "no answer: timed out"),
        ("name or service not known", "host name not found"),
        ("nodename nor servname", "host name not found"),
        ("no route to host", "no route to host: is the network up?"),
        ("network is unreachable", "network unreachable"),
        ("connection reset", "connection reset"),
        ("closed by server", "connection closed by the server"),
        ("loading", "Redis is still loading its data"),
    ):
        if needle in text:
            return plain
    return str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__


def probe(url: str):
    """A checked client of the head at `url`.

    Raises NotYet (may mend), FarmError (wrong or missing password, not a lampyr farm) or
    protocol.ProtocolSkew."""
    import redis

    from ..scheduler.store import connect

    r = connect(url, check=False)
    try:
        r.ping()
        theirs = r.get(P.K_PROTOCOL)
    except redis.exceptions.AuthenticationError:
        raise FarmError(_password_problem(url)) from None
    except redis.exceptions.ResponseError as err:
        if "NOAUTH" in str(err) or "WRONGPASS" in str(err):
            raise FarmError(_password_problem(url)) from None
        raise NotYet(reason(err)) from None
    except (redis.exceptions.ConnectionError, redis.exceptions.TimeoutError, OSError) as err:
        raise NotYet(reason(err)) from None
    if theirs is None:
        raise NotYet("Redis answers, but no lampyr head has set it up yet")
    if int(theirs) != P.PROTOCOL_VERSION:
        raise P.ProtocolSkew(int(theirs))
    from ..scheduler.address import WORKERS, check_role

    try:
        check_role(r, WORKERS)  # the artists' address would fail later, inside Celery
    except (redis.exceptions.ConnectionError, redis.exceptions.TimeoutError, OSError) as err:
        raise NotYet(reason(err)) from None
    return r


def _password_problem(url: str) -> str:
    if "@" not in url:
        return f"the farm at {url} requires a password (use the address the head prints)"
    return f"the farm at {redact(url)} refused the password (use the address the head prints)"


def waiting_line(url: str, why: str, wait: float, what: str = "waiting for the head") -> str:
    return f"{what} at {redact(url)} ({why}); retrying in {wait:g} s"


def wait_for_head(url: str, say, stop: threading.Event | None = None,
                  first: float = FIRST_WAIT, longest: float = LONGEST_WAIT):
    """Probe until the head answers; returns its client, or None when `stop` is set first.

    say(line) is called once per failed try with the reason and the next wait."""
    stop = stop or threading.Event()
    wait = first
    while not stop.is_set():
        try:
            return probe(url)
        except NotYet as err:
            say(waiting_line(url, str(err), wait))
        if stop.wait(wait):
            break
        wait = min(longest, wait * 2)
    return None


class Backoff:
    """Growing waits for a loop that retries (the heartbeat): `next()` gives the wait after a
    failure, `reset()` after a success."""

    def __init__(self, first: float = FIRST_WAIT, longest: float = LONGEST_WAIT):
        self.first, self.longest = first, longest
        self.wait = None

    @property
    def failing(self) -> bool:
        return self.wait is not None

    def next(self) -> float:
        self.wait = self.first if self.wait is None else min(self.longest, self.wait * 2)
        return self.wait

    def reset(self) -> None:
        self.wait = None

