"""Actions from the page: each one a head command, carried out by a head in this process."""

from __future__ import annotations

import pytest

from lampyr.scheduler.store import job_status

from .conftest import post, work_off


def carried_out(head, job):
    head.take_commands()
    head.publish(force=True)
    return job_status(head.r, job)


@pytest.fixture
def queued_job(head, tiny_shot):
    from lampyr.scheduler.submit import submit_request

    job = submit_request(head.r, tiny_shot, {}, None, 0, tile_size=8, batch_samples=4)
    head.take_commands()
    head.publish(force=True)
    return job


def test_pause_stops_queueing_and_resume_queues_again(user, head, queued_job):
    assert post(user, f"/api/jobs/{queued_job}/pause").status_code == 202
    assert carried_out(head, queued_job)["state"] == "paused"
    assert post(user, f"/api/jobs/{queued_job}/resume").status_code == 202
    assert carried_out(head, queued_job)["state"] == "queued"


def test_cancel_drops_the_remaining_work(user, head, queued_job):
    resp = post(user, f"/api/jobs/{queued_job}/cancel")
    assert resp.status_code == 202 and resp.get_json()["ok"] is True
    assert carried_out(head, queued_job)["state"] == "cancelled"


def test_priority_changes_the_job_s_priority(user, head, queued_job):
    assert post(user, f"/api/jobs/{queued_job}/priority", {"priority": 7}).status_code == 202
    assert carried_out(head, queued_job)["priority"] == 7


@pytest.mark.parametrize("value", ["high", 2.5, None, 5000, True])
def test_a_bad_priority_is_refused_naming_the_field(user, queued_job, value):
    resp = post(user, f"/api/jobs/{queued_job}/priority", {"priority": value})
    assert resp.status_code == 400
    assert resp.get_json()["error"].startswith("priority: expected a whole number between")


@pytest.mark.parametrize("raw", ['{"priority": 1e999}', '{"priority": -Infinity}',
                                 '{"priority": NaN}'])
def test_a_priority_beyond_any_number_is_refused_not_a_crash(user, queued_job, raw):
    # Python's json reads these as float infinities and NaN (json module documentation)
    resp = user.post(f"/api/jobs/{queued_job}/priority", data=raw,
                     content_type="application/json", headers={"X-Lampyr-Token": user.token})
    assert resp.status_code == 400
    assert resp.get_json()["error"].startswith("priority: expected a whole number between")


def test_a_body_nested_deeper_than_python_reads_is_refused_not_a_crash(user, queued_job):
    resp = user.post(f"/api/jobs/{queued_job}/priority", data="[" * 100_000,
                     content_type="application/json", headers={"X-Lampyr-Token": user.token})
    assert resp.status_code == 400 and resp.get_json() == {"error": "body: expected a JSON object"}


def test_a_long_bad_value_is_quoted_short_in_the_error(user, queued_job):
    resp = post(user, f"/api/jobs/{queued_job}/priority", {"priority": "9" * 5000})
    err = resp.get_json()["error"]
    assert resp.status_code == 400 and err.startswith("priority: ") and len(err) < 120


@pytest.mark.parametrize("op", ["pause", "resume", "cancel", "retry"])
def test_an_action_on_an_unknown_job_is_a_404(user, op):
    assert post(user, f"/api/jobs/nope-123456/{op}").status_code == 404


@pytest.fixture
def failed_tile_job(head, tiny_shot, compiled_kernels):
    """A job whose tile 2 of frame 1 raised on every attempt (tests/harness.py's poison)."""
    from lampyr.scheduler.submit import submit_request

    from ..harness import install_task_fakes

    with pytest.MonkeyPatch.context() as mp:  # poisoned only while the job is worked off
        install_task_fakes({"poison": "1/2"}, mp.setattr)
        job = submit_request(head.r, tiny_shot, {}, None, 0, tile_size=8, batch_samples=4)
        head.take_commands()
        st = work_off(head, job)
    assert st["state"] == "failed"
    return job


def test_the_frame_json_shows_the_failed_tile_and_its_error(user, failed_tile_job):
    d = user.get(f"/api/jobs/{failed_tile_job}/frames/1").get_json()
    assert [t["state"] for t in d["tiles"]] == ["done", "done", "failed", "done"]
    assert d["state"] == "failed"
    assert d["failed"] and all("poisoned batch" in f["error"] for f in d["failed"])


def test_retrying_one_tile_queues_only_that_tile_again(user, head, failed_tile_job):
    resp = post(user, f"/api/jobs/{failed_tile_job}/retry", {"frame": 1, "tile": 2})
    assert resp.status_code == 202
    carried_out(head, failed_tile_job)
    run = head.jobs[failed_tile_job]
    assert run.rec.failed == {}
    assert {(b.frame, b.tile) for b in run.pending} == {(1, 2)}


def test_a_retried_tile_renders_and_the_frame_is_done(user, head, failed_tile_job):
    post(user, f"/api/jobs/{failed_tile_job}/retry", {"frame": 1, "tile": 2})
    head.take_commands()
    assert work_off(head, failed_tile_job)["state"] == "done"
    d = user.get(f"/api/jobs/{failed_tile_job}/frames/1").get_json()
    assert [t["state"] for t in d["tiles"]] == ["done"] * 4


def test_retrying_another_tile_leaves_the_failed_one_alone(user, head, failed_tile_job):
    post(user, f"/api/jobs/{failed_tile_job}/retry", {"frame": 1, "tile": 1})
    carried_out(head, failed_tile_job)
    assert len(head.jobs[failed_tile_job].rec.failed) > 0


@pytest.mark.parametrize("body,code", [({"frame": 9}, 404), ({"frame": 1, "tile": 4}, 404),
                                       ({"tile": 1}, 400), ({"frame": "x"}, 400)])
def test_retrying_work_that_does_not_exist_is_refused(user, queued_job, body, code):
    assert post(user, f"/api/jobs/{queued_job}/retry", body).status_code == code


def test_samples_added_to_one_frame_lower_its_noise_and_leave_the_other(user, head, finished_job):
    before = {f["frame"]: f for f in user.get(f"/api/jobs/{finished_job}").get_json()["frames"]}
    resp = post(user, f"/api/jobs/{finished_job}/refine", {"samples": 32, "frames": [2]})
    assert resp.status_code == 202
    head.take_commands()
    work_off(head, finished_job)
    after = {f["frame"]: f for f in user.get(f"/api/jobs/{finished_job}").get_json()["frames"]}
    assert (after[2]["held"], after[2]["target"]) == (32, 32)
    assert after[1] == before[1]
    # the standard error of a mean falls as 1/sqrt(n) (rule of thumb for a path tracer's
    # pixel estimates): 4× the samples should about halve it; allow a wide margin
    assert after[2]["noise"] < 0.8 * before[2]["noise"]


def test_samples_for_tiles_above_a_noise_goal_go_only_to_those(user, head, finished_job):
    tiles = user.get(f"/api/jobs/{finished_job}/frames/1").get_json()["tiles"]
    quiet = sorted(t["noise"] for t in tiles)
    goal = (quiet[1] + quiet[2]) / 2  # between the quietest two and the rest
    post(user, f"/api/jobs/{finished_job}/refine", {"samples": 16, "noise": goal, "frames": [1]})
    head.take_commands()
    extra = head.jobs[finished_job].rec.extra
    assert set(extra) == {f"1/{t['tile']}" for t in tiles if t["noise"] > goal}


@pytest.mark.parametrize("body,code,field", [
    ({"frames": [1]}, 400, "samples"), ({"samples": 0, "frames": [1]}, 400, "samples"),
    ({"samples": 16, "frames": [7]}, 404, None), ({"samples": 16, "frames": "x"}, 400, "frames"),
    ({"samples": 16, "noise": "loud"}, 400, "noise"), ({"samples": 4}, 400, "samples")])
def test_a_bad_refine_is_refused(user, finished_job, body, code, field):
    resp = post(user, f"/api/jobs/{finished_job}/refine", body)
    assert resp.status_code == code
    if field:
        assert resp.get_json()["error"].startswith(field + ":")
