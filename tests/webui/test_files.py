"""Frame downloads and the tone-mapped preview; nothing outside the job's frames folder."""

from __future__ import annotations

import io
import json

import numpy as np
import pytest
from PIL import Image

from lampyr.scheduler import protocol as P


def exr_path(state, job, frame=1):
    return next((state / "jobs" / job / "frames").glob(f"*.{frame:04d}.exr"))


def test_the_frame_file_downloads_as_written(user, finished_job, state):
    resp = user.get(f"/jobs/{finished_job}/frames/1.exr")
    assert resp.status_code == 200 and resp.data == exr_path(state, finished_job).read_bytes()
    assert "attachment" in resp.headers["Content-Disposition"]


def test_the_head_s_png_downloads_as_written(user, finished_job, state):
    resp = user.get(f"/jobs/{finished_job}/frames/2.png")
    assert resp.data == exr_path(state, finished_job, 2).with_suffix(".png").read_bytes()


def srgb(linear):
    """IEC 61966-2-1:1999 sRGB transfer function, written out here from the standard."""
    x = np.clip(linear, 0.0, 1.0)
    return np.where(x <= 0.0031308, 12.92 * x, 1.055 * np.power(x, 1 / 2.4) - 0.055)


DENOISED = ("denoised.R", "denoised.G", "denoised.B")


@pytest.mark.parametrize("query, layer", [("", DENOISED), ("&raw=0", DENOISED),
                                          ("&raw=1", ("R", "G", "B"))])
@pytest.mark.parametrize("stops", [0.0, 1.5, -2.0])
def test_the_preview_is_the_exposed_radiance_through_the_srgb_curve(user, finished_job, state,
                                                                    stops, query, layer):
    # denoised by default, the raw mean with raw=1; read here with the OpenEXR library
    import OpenEXR

    with OpenEXR.File(str(exr_path(state, finished_job)), separate_channels=True) as f:
        rgb = np.stack([np.array(f.channels()[c].pixels, dtype=np.float64) for c in layer], -1)
    resp = user.get(f"/jobs/{finished_job}/frames/1/preview.png?exposure={stops}{query}")
    got = np.asarray(Image.open(io.BytesIO(resp.data)).convert("RGB")).astype(np.float64)
    want = np.floor(srgb(rgb * 2.0 ** stops) * 255 + 0.5)
    assert got.shape == (12, 16, 3)
    assert np.abs(got - want).max() <= 1  # one code value for float32 rounding at the knee


def test_the_denoised_and_raw_previews_differ(user, finished_job):
    # a frame of 8 samples is noisy, so the denoiser changes pixels (else the switch shows nothing)
    base = f"/jobs/{finished_job}/frames/1/preview.png"
    assert user.get(base).data != user.get(base + "?raw=1").data


@pytest.mark.parametrize("value", ["yes", "2", ""])
def test_an_unknown_raw_switch_is_refused(user, finished_job, value):
    resp = user.get(f"/jobs/{finished_job}/frames/1/preview.png?raw={value}")
    assert resp.status_code == 400 and b"raw" in resp.data


@pytest.mark.parametrize("value", ["bright", "11", "-10.5", "nan"])
def test_an_exposure_out_of_range_is_refused(user, finished_job, value):
    resp = user.get(f"/jobs/{finished_job}/frames/1/preview.png?exposure={value}")
    assert resp.status_code == 400 and b"exposure" in resp.data


@pytest.mark.parametrize("url", [
    "/jobs/..%2F..%2Fetc/frames/1.exr", "/jobs/%2e%2e/frames/1.exr",
    "/jobs/{job}/frames/..%2F..%2Fjob.json", "/jobs/{job}/frames/1.exr/../../job.json",
    "/jobs/{job}/frames/7.exr", "/jobs/{job}/frames/1.json", "/static/..%2Fapp.py",
    "/static/../app.py", "/jobs/{job}/frames/-1/preview.png"])
def test_paths_outside_the_frames_folder_are_404s(user, finished_job, url):
    resp = user.get(url.format(job=finished_job))
    assert resp.status_code == 404 and b"Traceback" not in resp.data


def test_a_status_whose_name_would_leave_the_folder_serves_nothing(user, finished_job, head):
    """A frame file's path is rebuilt from the job's status; a name with `..` in it (never made
    by the head: shot names are letters, digits, spaces and _ - .) must still not escape."""
    head.r.hset(P.k_job(finished_job), "name", json.dumps("../../../state/jobs/x"))
    assert user.get(f"/jobs/{finished_job}/frames/1.exr").status_code == 404


def test_a_frame_not_written_yet_is_a_404(user, head, tiny_shot):
    from lampyr.scheduler.submit import submit_request

    job = submit_request(head.r, tiny_shot, {}, None, 0, tile_size=8, batch_samples=4)
    head.take_commands()
    head.publish(force=True)
    resp = user.get(f"/jobs/{job}/frames/1/preview.png")
    assert resp.status_code == 404 and b"no EXR file yet" in resp.data


def test_a_preview_of_a_file_removed_since_it_was_found_is_a_frame_file_error(tmp_path):
    from lampyr.errors import FrameFileError
    from lampyr.webui.files import PreviewCache

    with pytest.raises(FrameFileError):  # the preview route answers it with a 404
        PreviewCache().get(tmp_path / "courtyard.0001.exr", 0.0)
