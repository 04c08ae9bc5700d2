"""The page's pictures in a real browser (Debian's Chromium through Playwright) against a real farm
(`lampyr head` serving the page, one `lampyr worker`), judged by their pixels: the strip's
thumbnails, playing the shot, and the layer picker. Screenshots go to
tests/webui/screenshots-out/ (fixtures shared with test_browser.py)."""

from __future__ import annotations

import io
import time

import numpy as np
import pytest
from PIL import Image

from .shots import courtyard_upload
from .test_browser import Shots, browser, log_in, upload, web_head  # noqa: F401  (fixtures)

KNOWN_NOISE = "#frame-facts[data-noise]:not([data-noise=''])"


def pixels(data: bytes) -> np.ndarray:
    return np.asarray(Image.open(io.BytesIO(data)).convert("RGB"), np.float64)


def srgb_decode(code):
    """8-bit sRGB codes → linear (IEC 61966-2-1, from memory: c/12.92 up to 0.04045, else
    ((c + 0.055)/1.055)^2.4), written out here, not lampyr's."""
    c = np.clip(np.asarray(code, np.float64) / 255.0, 0.0, 1.0)
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def srgb_encode(linear):
    """The same standard's forward curve (from memory): 12.92·L up to 0.0031308, else
    1.055·L^(1/2.4) − 0.055, as 8-bit code values before rounding."""
    x = np.clip(linear, 0.0, 1.0)
    return 255 * np.where(x <= 0.0031308, 12.92 * x, 1.055 * x ** (1 / 2.4) - 0.055)


def block_mean(img: np.ndarray, w: int, h: int) -> np.ndarray:
    """Area-average an image down to w × h (PIL's box filter, a reference library)."""
    return np.stack([np.asarray(Image.fromarray(img[..., c].astype(np.float32), "F")
                                .resize((w, h), Image.BOX)) for c in range(3)], -1)


def centres(shot: np.ndarray, w: int, h: int) -> np.ndarray:
    """The screenshot of a w × h picture shown enlarged with nearest-neighbour scaling, read
    back at the centre of each source pixel."""
    H, W = shot.shape[:2]
    ys = ((np.arange(h) + 0.5) * H / h).astype(int)
    xs = ((np.arange(w) + 0.5) * W / w).astype(int)
    return shot[ys][:, xs]


@pytest.fixture
def shot_farm(web_head):
    """The head and one plain worker (no test delays)."""
    farm, url = web_head
    farm.start_worker("w1")
    return farm, url


def open_finished_job(page, frames: int):
    page.click("a.shot")
    page.wait_for_selector("#job-state .st-done", timeout=300_000)
    page.locator("#strip .cell.st-done").nth(frames - 1).wait_for()
    page.wait_for_selector(KNOWN_NOISE)
    page.check("input[name=overlay][value=none]")  # the picture without the tile map


def preview_of(page, frame: int, query: str = "") -> np.ndarray:
    job = page.get_attribute("#job", "data-job")
    resp = page.request.get(f"{page.url.split('/jobs/')[0]}/jobs/{job}/frames/{frame}"
                            f"/preview.png?exposure=0{query}")
    assert resp.status == 200, resp.text()
    return pixels(resp.body())


def stage(page) -> np.ndarray:
    return pixels(page.locator("#stage").screenshot())


def test_thumbnails_playback_and_the_layer_picker_show_the_frames(shot_farm, repo_root, browser,
                                                                   tmp_path):
    farm, url = shot_farm
    W, H, N, FPS = 192, 108, 3, 2
    shot, archive = courtyard_upload(tmp_path, repo_root, W, H, N, FPS)
    shots = Shots(tmp_path / "screenshots")
    page = log_in(browser, farm, url)
    thumbs = {}
    page.on("response", lambda r: thumbs.__setitem__(r.url, r) if "thumb.jpg" in r.url else None)
    upload(page, shot, archive, tile="32")
    open_finished_job(page, N)
    previews = {f: preview_of(page, f) for f in range(1, N + 1)}

    # -- thumbnails: one small picture per frame, like its preview shrunk --------------------
    for f in range(1, N + 1):
        page.wait_for_selector(f"#strip .cell[data-frame='{f}'] img.c-pic[src*='v=']")
    page.wait_for_load_state("networkidle")
    shots.take(page, "20-job-thumbnails-laptop")
    sizes = [len(r.body()) for r in thumbs.values() if r.status == 200]
    assert len(sizes) >= N and max(sizes) < 6000, sizes  # "a few kB"
    for f in range(1, N + 1):
        shown = pixels(page.locator(f"#strip .cell[data-frame='{f}'] img.c-pic").screenshot())
        assert shown.std() > 8  # not a blank or flat image
        # the reference: the frame's preview shrunk to the cell in linear light (decode, area
        # mean, encode: the sRGB standard's curves above); both then shrunk to 24 × 13 so that
        # the browser's own resampling and JPEG's blocks wash out
        h, w = shown.shape[:2]
        want = srgb_encode(block_mean(srgb_decode(previews[f]), w, h))
        a, b = block_mean(shown, 24, 13), block_mean(want, 24, 13)
        assert np.abs(a - b).mean() < 6, (f, np.abs(a - b).mean())
        # and it is this frame's picture more than another's
        others = [np.abs(a - block_mean(srgb_encode(block_mean(srgb_decode(previews[g]), w, h)),
                                        24, 13)).mean() for g in range(1, N + 1) if g != f]
        assert np.abs(a - b).mean() < min(others), (f, others)

    # -- playing: the picture steps through the frames at the shot's fps, and stops ----------
    page.click("#strip .cell[data-frame='1']")
    page.wait_for_selector("#frame-facts[data-frame='1']")
    page.click("#play")
    page.wait_for_selector("#stage[data-shown]", timeout=60_000)
    # the order and pace, from the frame number the stage says it shows (read every few ms)
    seen, stamps = [], []
    give_up = time.monotonic() + 9 / FPS
    while time.monotonic() < give_up:
        now = int(page.get_attribute("#stage", "data-shown"))
        if not seen or seen[-1] != now:
            seen.append(now)
            stamps.append(time.monotonic())
    assert len(seen) >= 8, seen
    for a, b in zip(seen, seen[1:]):
        assert b == a % N + 1, seen  # each next frame in turn, then round again
    # the shot's fps, over the changes seen (each seen up to a poll late: a few hundredths of a
    # second over several seconds); slower only when the page falls behind, as it never skips a
    # frame, so the upper bound is loose on a busy machine
    period = (stamps[-1] - stamps[1]) / (len(stamps) - 2)
    assert 0.85 / FPS < period < 1.5 / FPS, period
    # the pixels: each screenshot is exactly the preview of the frame the stage names (a
    # screenshot takes a few tenths of a second, so only those taken within one frame count)
    shown_frames, slow = set(), 0
    give_up = time.monotonic() + 4.5 / FPS
    while time.monotonic() < give_up or len(shown_frames) < N:
        assert time.monotonic() < give_up + 20 / FPS, shown_frames
        before = page.get_attribute("#stage", "data-shown")
        img = centres(stage(page), W, H)
        if page.get_attribute("#stage", "data-shown") != before:
            slow += 1
            continue  # the frame changed while the screenshot was taken
        dist = {f: np.abs(img - previews[f]).mean() for f in previews}
        best = min(dist, key=dist.get)
        # nearest-neighbour enlargement keeps the codes: within a code for colour handling
        assert dist[best] < 1.0 and best == int(before), (before, dist)
        shown_frames.add(best)
    shots.take(page, "21-job-playing-laptop", full=False)
    info = page.inner_text("#play-info")
    assert f"{FPS} frames a second" in info and "3 frames written" in info

    page.click("#play")  # "Pause"
    page.wait_for_selector("#stage:not([data-shown])")
    paused_at = int(page.inner_text("#sel-frame"))
    page.wait_for_selector(f"#preview[src*='/frames/{paused_at}/preview.png']")
    page.wait_for_load_state("networkidle")
    still = stage(page)
    time.sleep(1.5)  # three frames' time at 2 a second
    assert np.array_equal(stage(page), still)
    assert np.abs(centres(still, W, H) - previews[paused_at]).mean() < 1.0

    # keys: the arrows step, the space bar plays and pauses
    page.click("#strip .cell[data-frame='1']")
    page.wait_for_selector("#frame-facts[data-frame='1']")
    page.locator("h1").click()  # focus away from the buttons and the strip
    page.keyboard.press("ArrowRight")
    page.wait_for_selector("#frame-facts[data-frame='2']")
    page.keyboard.press("ArrowLeft")
    page.wait_for_selector("#frame-facts[data-frame='1']")
    page.keyboard.press("ArrowLeft")  # no frame before the first: it stays
    time.sleep(0.3)
    assert page.get_attribute("#frame-facts", "data-frame") == "1"
    page.keyboard.press(" ")
    page.wait_for_selector("#stage[data-shown]", timeout=60_000)
    page.keyboard.press(" ")
    page.wait_for_selector("#stage:not([data-shown])")

    # -- the layer picker changes the pixels -------------------------------------------------
    page.click("#strip .cell[data-frame='1']")
    page.wait_for_selector("#frame-facts[data-frame='1']")
    options = page.locator("#layer option").all_inner_texts()
    assert options[:2] == ["denoised", "beauty (the raw mean)"]
    assert options[-4:] == ["albedo", "normal", "depth", "variance (noise)"]
    shown = {}
    for layer in ("beauty", "albedo", "normal", "depth", "variance"):
        page.select_option("#layer", layer)
        page.wait_for_selector(f"#preview[src*='layer={layer}']")
        page.wait_for_load_state("networkidle")
        time.sleep(0.2)
        shown[layer] = centres(stage(page), W, H)
        served = preview_of(page, 1, f"&layer={layer}")
        assert np.abs(shown[layer] - served).mean() < 1.0, layer  # the served picture, shown
        shots.take(page, f"22-job-layer-{layer}-laptop", full=False)
        if layer in ("normal", "depth", "variance"):
            assert page.is_disabled("#exposure")  # data, not light
            assert "Exposure does not apply" in page.inner_text("#layer-note")
    names = sorted(shown)
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            assert np.abs(shown[a] - shown[b]).mean() > 8, (a, b)
    # grey layers are grey; the normal and albedo pictures are not
    for layer in ("depth", "variance"):
        assert np.array_equal(shown[layer][..., 0], shown[layer][..., 2])
    assert np.abs(shown["normal"][..., 0] - shown["normal"][..., 2]).mean() > 10

    # -- a frame without a file: no picture in the strip, left out of playing ----------------
    page.select_option("#layer", "denoised")
    gone = next((farm.state / "jobs").glob("courtyard-*/frames/courtyard.0002.exr"))
    gone.unlink()
    page.wait_for_selector("#strip .cell[data-frame='2'] .c-pic.none", timeout=10_000)
    page.click("#play")
    page.wait_for_selector("#stage[data-shown]", timeout=60_000)
    seen = []
    give_up = time.monotonic() + 3.5 / FPS
    while time.monotonic() < give_up:
        now = int(page.get_attribute("#stage", "data-shown"))
        if not seen or seen[-1] != now:
            seen.append(now)
    assert len(seen) >= 3 and set(seen) == {1, 3}, seen  # 1, 3, 1, 3, …
    assert "2 frames written, 1 not written yet (left out)" in page.inner_text("#play-info")
    shots.take(page, "24-job-playing-one-frame-missing-laptop")
    page.click("#play")


WALL_SHOT = """\
name = "wall"
frames = [1, 1]
fps = 12

[image]
width = 48
height = 32

[sampling]
samples = 4
bounces = 2
seed = 3

[camera]
position = [0.0, 0.0, 5.0]
target = [0.0, 0.0, 0.0]
fov = 40.0

[environment]
color = [0.6, 0.6, 0.6]

[[material]]
name = "paint"
type = "diffuse"
color = [0.8, 0.3, 0.1]

[[object]]
name = "wall"
material = "paint"
sphere = { center = [0.0, 0.0, -1000.0], radius = 995.0 }

[output]
layers = ["diffuse_direct", "background"]
light_groups = true
"""


def test_a_wall_facing_the_camera_shows_the_normal_colour_of_plus_z(shot_farm, browser,
                                                                   tmp_path):
    """A sphere of radius 995 whose near side is 10 units in front of a camera looking down −z
    fills the view as a wall facing the camera: across the picture (±20° of field) its normal
    leans at most asin(10·tan 20° · 1.2 / 995) ≈ 0.3° off +z, so every pixel should show
    0.5 + 0.5·(0, 0, 1) = (0.5, 0.5, 1) → codes (128, 128, 255), within a code."""
    farm, url = shot_farm
    folder = tmp_path / "wall"
    folder.mkdir()
    (folder / "wall.toml").write_text(WALL_SHOT)
    shots = Shots(tmp_path / "screenshots")
    page = log_in(browser, farm, url)
    page.click("#open-submit")
    page.set_input_files("input[name=shot]", str(folder / "wall.toml"))
    page.click("#submit-panel button[type=submit]")
    page.wait_for_selector("#submit-msg.good", timeout=60_000)
    page.wait_for_selector("a.shot")
    open_finished_job(page, 1)
    # the shot's light-path and light-group layers are offered by name, after the beauty
    options = page.locator("#layer option").all_inner_texts()
    assert options == ["denoised", "beauty (the raw mean)", "background", "diffuse direct",
                       "light group other", "albedo", "normal", "depth", "variance (noise)"]
    page.select_option("#layer", "diffuse_direct")
    page.wait_for_selector("#preview[src*='layer=diffuse_direct']")
    page.wait_for_load_state("networkidle")
    time.sleep(0.2)
    assert np.abs(centres(stage(page), 48, 32) - preview_of(page, 1, "&layer=diffuse_direct")
                  ).mean() < 1.0
    page.select_option("#layer", "normal")
    page.wait_for_selector("#preview[src*='layer=normal']")
    page.wait_for_load_state("networkidle")
    time.sleep(0.2)
    shots.take(page, "23-job-wall-normal-laptop", full=False)
    shown = centres(stage(page), 48, 32)
    assert np.abs(shown - np.array([128, 128, 255])).max() <= 1, shown.reshape(-1, 3)[:4]
    # the albedo picture of the same wall is its paint through the sRGB curve
    page.select_option("#layer", "albedo")
    page.wait_for_selector("#preview[src*='layer=albedo']")
    page.wait_for_load_state("networkidle")
    time.sleep(0.2)
    albedo = centres(stage(page), 48, 32)
    assert np.abs(albedo - srgb_encode(np.array([0.8, 0.3, 0.1]))).max() <= 1.5
