"""Sending render tasks to Celery's queue in groups: one round trip to Redis for many messages.

`send_task` publishes each message with a round trip of its own (an LPUSH on Celery's Redis
transport), about 5 ms a message on a busy two-core machine. kombu's producer can buffer the
messages of a group and push them in one pipeline (`Producer.batch`, kombu 5.7); Celery's
`send_task` takes that producer, so every message keeps the shape and the routing Celery gives
it. Where the transport or an older kombu cannot batch, the messages go one by one as before.

A group is sent whole or raises: when the push fails (Redis at its memory cap, Redis gone) the
caller takes every batch of the group for not sent. A message that reached the queue anyway is
harmless: its batch is sent again under a new ticket, and the worker skips a message whose
ticket is not the current one (docs/design.md, invariant 6).
"""

from __future__ import annotations

from contextlib import nullcontext

from . import protocol as P


def make_sender(url: str):
    """A Celery app used only to send TASK_RENDER messages (no result backend)."""
    from celery import Celery

    app = Celery("lampyr-head", set_as_current=False)
    app.conf.update(P.celery_settings(url))
    return app


def publish(app, payloads: list[str], name: str = P.TASK_RENDER, queue: str = P.QUEUE) -> None:
    """Send one task `name` per payload (its one argument), in order, in one group."""
    if not payloads:
        return
    with app.producer_or_acquire() as producer:
        with _batch(producer):
            for payload in payloads:
                app.send_task(name, args=[payload], queue=queue, producer=producer)


def _batch(producer):
    batch = getattr(producer, "batch", None)  # kombu 5.7 and later
    if batch is None or not getattr(producer, "supports_batch_publish", False):
        return nullcontext()
    return batch()
