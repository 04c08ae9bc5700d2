"""The login throttle (webui/auth.py LoginThrottle) is shared by waitress's request threads:
every failed login is counted even when many threads fail at once, and the table of addresses
never breaks under them. The threads switch as often as CPython lets them
(sys.setswitchinterval), so an unlocked read-modify-write loses counts, or one thread walks the
table while another changes it."""

from __future__ import annotations

import sys
import threading

THREADS, ROUNDS = 8, 400


def hammer(work) -> list[BaseException]:
    """work(n, i) from THREADS threads, ROUNDS times each, started together; their errors."""
    errors: list[BaseException] = []
    start = threading.Barrier(THREADS)

    def run(n: int) -> None:
        try:
            start.wait()
            for i in range(ROUNDS):
                work(n, i)
        except BaseException as err:  # noqa: BLE001 - the test reports it
            errors.append(err)

    old = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)
    try:
        threads = [threading.Thread(target=run, args=(n,)) for n in range(THREADS)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(120)
    finally:
        sys.setswitchinterval(old)
    return errors


def test_failed_logins_from_many_threads_are_all_counted(monkeypatch):
    from lampyr.webui import auth

    monkeypatch.setattr(auth, "LOGIN_TRIES", 10**9)  # count only; nobody is blocked
    throttle = auth.LoginThrottle()

    def guess(n, i):
        throttle.blocked("10.0.0.1")
        throttle.failed("10.0.0.1")

    assert not hammer(guess)
    assert len(throttle.fails["10.0.0.1"]) == THREADS * ROUNDS  # no failure lost


def test_a_full_table_of_addresses_holds_under_many_threads(monkeypatch):
    from lampyr.webui import auth

    monkeypatch.setattr(auth, "THROTTLE_ADDRESSES", 64)  # full at once: the pruning walk runs
    throttle = auth.LoginThrottle()

    def guess(n, i):
        throttle.failed(f"10.1.{n}.{i % 200}")
        throttle.blocked(f"10.1.{n}.{(i + 100) % 200}")

    errors = hammer(guess)
    assert not errors, errors[:3]
    assert len(throttle.fails) <= 64
