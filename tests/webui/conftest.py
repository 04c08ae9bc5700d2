"""Fixtures of the web page tests: a head in this process, the app on the test client, and a
job rendered by the worker's own task code (`worker.tasks.run_batch`) fed from the real queue."""

from __future__ import annotations

import base64
import json
import time

import pytest

from lampyr.scheduler import protocol as P

PASSWORD = "lantern at dusk"


@pytest.fixture
def state(tmp_path):
    return tmp_path / "state"


@pytest.fixture
def head(redis_url, state):
    from lampyr.scheduler.head import Head

    h = Head(state, redis_url, lease_seconds=30)
    h.start()
    return h


@pytest.fixture
def app(head, redis_url, state):
    from lampyr.webui.app import create_app

    return create_app({"STATE": state, "REDIS_URL": redis_url, "PASSWORD": PASSWORD,
                       "SECRET_KEY": "test-secret", "TESTING": True,
                       "MAX_UPLOAD_BYTES": 2 * 1024 * 1024})


def token_of(client) -> str:
    with client.session_transaction() as s:
        return s.get("csrf", "")


def log_in(client) -> str:
    """Log the client in through the form; returns the session's anti-forgery token."""
    client.get("/login")
    resp = client.post("/login", data={"password": PASSWORD, "token": token_of(client)})
    assert resp.status_code == 302, resp.data
    return token_of(client)


@pytest.fixture
def client(app):
    return app.test_client()


@pytest.fixture
def user(app):
    """A logged-in test client; `user.token` is its anti-forgery token."""
    c = app.test_client()
    c.token = log_in(c)
    return c


def post(client, url, body=None, **kw):
    return client.post(url, json=body or {}, headers={"X-Lampyr-Token": client.token}, **kw)


def work_off(head, job: str, timeout: float = 120.0) -> dict:
    """Carry out every queued render message with the worker's task code until the job ends."""
    from lampyr.scheduler.store import job_status
    from lampyr.worker.tasks import Context, run_batch

    ctx = Context(head.url, "test-worker")
    give_up_at = time.monotonic() + timeout
    while True:
        head.step()
        raw = head.r.rpop(P.QUEUE)
        if raw is not None:
            body = json.loads(base64.b64decode(json.loads(raw)["body"]))
            run_batch(ctx, body[0][0])
            continue
        st = job_status(head.r, job)
        if st["state"] in ("done", "failed", "cancelled") and not head.leases.table:
            head.publish(every=0)
            return job_status(head.r, job)
        assert time.monotonic() < give_up_at, f"job {job} still {st['state']}"


@pytest.fixture
def finished_job(head, tiny_shot, compiled_kernels):
    """A 2-frame 16 × 12 job in 8 px tiles (4 per frame), rendered to the end: its id."""
    from lampyr.scheduler.submit import submit_request

    job = submit_request(head.r, tiny_shot, {}, None, 0, tile_size=8, batch_samples=4)
    head.take_commands()
    work_off(head, job)
    return job
