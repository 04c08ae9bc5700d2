"""The JSON the page reads: overview, job, frame; 404s for what does not exist."""

from __future__ import annotations

import json
import time

import numpy as np
import pytest

from lampyr.scheduler import protocol as P

JOB_FIELDS = {"job", "name", "state", "frames", "frames_done", "samples", "pixel_samples_done",
              "pixel_samples_total", "samples_per_second", "eta_seconds", "priority", "out",
              "submitted", "progress", "failed_batches"}


def test_the_overview_lists_the_job_with_its_progress(user, finished_job):
    data = user.get("/api/farm").get_json()
    (row,) = data["jobs"]
    assert JOB_FIELDS <= set(row)
    assert row["job"] == finished_job and row["state"] == "done" and row["progress"] == 1.0
    assert set(data) == {"now", "jobs", "folded", "workers", "offline", "throughput"}


def _submitted_days_ago(head, job, days):
    head.r.hset(P.k_job(job), "submitted", json.dumps(time.time() - days * 86400))


def test_the_overview_leaves_out_shots_finished_more_than_a_day_ago(user, head, finished_job):
    _submitted_days_ago(head, finished_job, 2)
    data = user.get("/api/farm").get_json()
    assert data["jobs"] == [] and data["folded"] == {"shots": 1, "done": 1, "frames": 2}


def test_the_overview_lists_old_finished_shots_when_asked_for_all(user, head, finished_job):
    _submitted_days_ago(head, finished_job, 2)
    data = user.get("/api/farm?all=1").get_json()
    assert [j["job"] for j in data["jobs"]] == [finished_job]
    assert data["folded"] == {"shots": 0, "done": 0, "frames": 0}


def test_the_overview_keeps_a_failed_shot_however_old(user, head, finished_job):
    _submitted_days_ago(head, finished_job, 30)
    head.r.hset(P.k_job(finished_job), "state", json.dumps("failed"))
    assert [j["job"] for j in user.get("/api/farm").get_json()["jobs"]] == [finished_job]


def test_the_overview_has_a_letter_for_each_frame_s_state(user, finished_job):
    (row,) = user.get("/api/farm").get_json()["jobs"]
    assert row["frame_states"] == "dd"


def test_the_throughput_history_holds_every_merged_pixel_sample(user, finished_job):
    th = user.get("/api/farm").get_json()["throughput"]
    assert th["step"] == 60 and len(th["values"]) == 6 * 60
    assert sum(th["values"]) == 2 * 16 * 12 * 8  # frames × pixels × samples


def test_the_job_json_has_its_layout_and_every_frame(user, finished_job):
    data = user.get(f"/api/jobs/{finished_job}").get_json()
    # fps: the tiny shot names none; 24 is the shot file's default (docs/shot-file.md)
    assert data["layout"] == {"width": 16, "height": 12, "fps": 24.0, "frames": [1, 2],
                              "tiles": [[0, 0, 8, 8], [8, 0, 8, 8], [0, 8, 8, 4], [8, 8, 8, 4]]}
    assert [(f["frame"], f["state"], f["held"], f["target"]) for f in data["frames"]] == [
        (1, "done", 8, 8), (2, "done", 8, 8)]
    assert "tiles" not in data["frames"][0]


def test_the_polled_job_json_counts_failed_batches_without_their_errors(user, head,
                                                                        finished_job):
    failed = [{"batch": f"{finished_job}/1/{t}/0/4", "error": "x" * 500}
              for t in range(4)]
    head.r.hset(P.k_job(finished_job), "failed", json.dumps(failed))
    job = user.get(f"/api/jobs/{finished_job}").get_json()["job"]
    assert job["failed_batches"] == 4 and "failed" not in job
    frame = user.get(f"/api/jobs/{finished_job}/frames/1").get_json()
    assert frame["failed"] == failed  # the errors come with their frame


def test_a_frame_file_is_found_from_a_status_and_layout_already_read(user, finished_job,
                                                                     state):
    from lampyr.scheduler import progress

    r = user.application.extensions["lampyr.redis"]
    st, lay = user.get(f"/api/jobs/{finished_job}").get_json()["job"], progress.job_layout(
        r, finished_job)
    path = progress.frame_file(None, finished_job, 1, "exr", st, lay)  # no Redis to ask
    assert path == next((state / "jobs" / finished_job / "frames").glob("*.0001.exr")).resolve()


def test_the_shared_overview_is_not_waited_for_while_it_is_rebuilt():
    import threading

    from lampyr.webui.api import SharedSnapshot

    snap = SharedSnapshot(0.0)
    assert snap.get(lambda: "old") == "old"
    time.sleep(0.01)
    started, release = threading.Event(), threading.Event()

    def slow():
        started.set()
        release.wait(10)
        return "new"

    t = threading.Thread(target=snap.get, args=(slow,))
    t.start()
    started.wait(10)
    assert snap.get(lambda: "other") == "old"  # the previous answer, at once
    release.set()
    t.join(10)
    assert snap.value == "new"


def test_a_tile_s_published_noise_is_the_mean_relative_noise_of_its_pixels(user, finished_job,
                                                                           state):
    """Against Film.rel_noise of the frame file read back with OpenEXR (float32 storage, so
    agreement to float32 rounding: IEEE 754 single precision)."""
    from lampyr.engine.exr import read_frame

    d = user.get(f"/api/jobs/{finished_job}/frames/1").get_json()
    film, _ = read_frame(next((state / "jobs" / finished_job / "frames").glob("*.0001.exr")))
    rel = film.rel_noise()
    for t in d["tiles"]:
        want = float(np.mean(rel[t["y"]:t["y"] + t["h"], t["x"]:t["x"] + t["w"]]))
        assert t["noise"] == pytest.approx(want, rel=1e-4)


def test_a_frame_s_noise_is_the_pixel_weighted_mean_of_its_tiles(user, finished_job):
    d = user.get(f"/api/jobs/{finished_job}/frames/2").get_json()
    area = sum(t["w"] * t["h"] for t in d["tiles"])
    want = sum(t["noise"] * t["w"] * t["h"] for t in d["tiles"]) / area
    assert d["noise"] == pytest.approx(want, rel=1e-5)


def test_the_frame_json_has_its_tiles_files_and_no_failures(user, finished_job):
    d = user.get(f"/api/jobs/{finished_job}/frames/1").get_json()
    assert [(t["tile"], t["state"], t["held"]) for t in d["tiles"]] == [
        (0, "done", 8), (1, "done", 8), (2, "done", 8), (3, "done", 8)]
    assert d["files"]["exr"]["bytes"] > 0 and d["files"]["png"]["bytes"] > 0
    assert d["failed"] == []


@pytest.mark.parametrize("url", ["/api/jobs/nope-123456", "/api/jobs/nope-123456/frames/1",
                                 "/api/jobs/..%2F..%2Fetc", "/jobs/nope-123456"])
def test_an_unknown_job_is_a_404_with_a_message(user, url):
    resp = user.get(url)
    assert resp.status_code == 404
    assert b"Traceback" not in resp.data


def test_the_404_json_names_the_job(user):
    assert user.get("/api/jobs/nope-123456").get_json() == {
        "error": "no job 'nope-123456' on this farm"}


def test_one_tile_s_json_is_its_row_of_the_frame(user, finished_job):
    d = user.get(f"/api/jobs/{finished_job}/frames/2/tiles/3").get_json()
    assert d == {**user.get(f"/api/jobs/{finished_job}/frames/2").get_json()["tiles"][3],
                 "frame": 2, "failed": []}


@pytest.mark.parametrize("tile", ["4", "-1", "x", "99999999"])
def test_a_tile_the_frame_does_not_have_is_a_404(user, finished_job, tile):
    resp = user.get(f"/api/jobs/{finished_job}/frames/1/tiles/{tile}")
    assert resp.status_code == 404 and b"Traceback" not in resp.data


@pytest.mark.parametrize("frame", ["0", "3", "99999", "-1", "one"])
def test_a_frame_the_job_does_not_have_is_a_404(user, finished_job, frame):
    resp = user.get(f"/api/jobs/{finished_job}/frames/{frame}")
    assert resp.status_code == 404 and b"Traceback" not in resp.data


def test_the_job_page_is_served_with_its_id(user, finished_job):
    resp = user.get(f"/jobs/{finished_job}")
    assert resp.status_code == 200 and f'data-job="{finished_job}"'.encode() in resp.data


def test_a_worker_whose_heartbeat_expired_is_listed_as_not_heard_from(user, head):
    beat = {"name": "desk-7", "host": "desk-7", "cores": 4, "pool": "prefork"}
    head.r.set(P.k_host("desk-7"), json.dumps(beat), ex=60)
    head.history.record(head, pipe := head.r.pipeline(), now=time.time() + 10)
    pipe.execute()
    online = user.get("/api/farm").get_json()["workers"]
    assert [w["name"] for w in online] == ["desk-7"]
    head.r.delete(P.k_host("desk-7"))  # as when its heartbeat's TTL runs out
    user.application.extensions["lampyr.overview"].at = -1e9
    data = user.get("/api/farm").get_json()
    assert data["workers"] == [] and [w["name"] for w in data["offline"]] == ["desk-7"]
    assert data["offline"][0]["cores"] == 4 and data["offline"][0]["last_seen"] > 0


def test_an_offline_worker_can_be_forgotten(user, head):
    from .conftest import post

    head.r.hset(P.K_SEEN, "old-pc", json.dumps({"name": "old-pc", "last_seen": time.time() - 99}))
    assert post(user, "/api/workers/old-pc/forget").status_code == 200
    assert head.r.hexists(P.K_SEEN, "old-pc") == 0


def test_a_live_worker_cannot_be_forgotten(user, head):
    from .conftest import post

    head.r.set(P.k_host("desk-7"), json.dumps({"name": "desk-7"}), ex=60)
    head.r.hset(P.K_SEEN, "desk-7", json.dumps({"name": "desk-7", "last_seen": time.time()}))
    assert post(user, "/api/workers/desk-7/forget").status_code == 404
    assert head.r.hexists(P.K_SEEN, "desk-7") == 1


@pytest.mark.parametrize("hours", ["0", "25", "lots"])
def test_a_throughput_window_out_of_range_is_refused(user, hours):
    resp = user.get(f"/api/throughput?hours={hours}")
    assert resp.status_code == 400 and "hours" in resp.get_json()["error"]


def test_a_farm_whose_redis_is_gone_answers_503_with_a_message(state, tmp_path):
    from lampyr.scheduler.redis_server import free_port
    from lampyr.webui.app import create_app

    from .conftest import PASSWORD, log_in

    app = create_app({"STATE": state, "REDIS_URL": f"redis://127.0.0.1:{free_port()}/0",
                      "PASSWORD": PASSWORD, "SECRET_KEY": "s", "TESTING": True})
    c = app.test_client()
    log_in(c)
    resp = c.get("/api/farm")
    assert resp.status_code == 503 and "does not answer" in resp.get_json()["error"]
