"""The render task's JSON (scheduler/protocol.py). Reference: the standard library's own
`dataclasses.asdict` followed by `json.dumps(..., sort_keys=True)`, which the head once called for
every task it sent; the text must stay the same, byte for byte, so workers of either read it."""

from __future__ import annotations

import json
from dataclasses import asdict

import pytest

from lampyr.scheduler import protocol as P

OVERRIDES = [
    {},
    {"frames": [1, 48], "width": 1920, "height": 1080, "samples": 64},
    {"frames": (3, 3), "camera": "Camera.001", "nested": {"b": [1, 2.5, None], "a": "ü"}},
]


@pytest.mark.parametrize("overrides", OVERRIDES)
def test_a_tasks_json_is_what_asdict_and_sorted_json_make(overrides):
    batch = P.Batch("20261204-abcd", 12, 100, 4, 3, 64, 128, 64, 32)
    task = P.RenderTask(P.PROTOCOL_VERSION, batch, 17, "ab" * 32, "shots/x.toml", overrides)
    assert task.to_json() == json.dumps(asdict(task), sort_keys=True)


def test_a_task_read_back_from_its_json_is_the_same_task():
    batch = P.Batch("job", 1, 2, 0, 8, 0, 0, 16, 16)
    task = P.RenderTask(P.PROTOCOL_VERSION, batch, 3, "cd" * 32, "a.toml", {"frames": [1, 2]})
    assert P.RenderTask.from_json(task.to_json()) == task
