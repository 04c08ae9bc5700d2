"""The page in a real browser (Debian's Chromium driven by Playwright) against a real farm:
`lampyr head` serving the page, one `lampyr worker`. Log in, upload a small courtyard shot with
its assets, watch it finish, add samples to one frame and see its noise fall. Screenshots go to
the test's tmp folder and to tests/webui/screenshots-out/."""

from __future__ import annotations

import os
import re
import shutil
import signal
import time
from pathlib import Path

import pytest

from .shots import courtyard_upload

CHROMIUM = Path("/usr/bin/chromium")
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync"]
OUT = Path(__file__).resolve().parent / "screenshots-out"
LAPTOP = {"width": 1366, "height": 768}
PHONE = {"width": 390, "height": 844}
# the chosen frame's noise is shown once known (the page's CSP forbids evaluated scripts, so
# waits are selectors)
KNOWN_NOISE = "#frame-facts[data-noise]:not([data-noise=''])"


@pytest.fixture
def browser():
    if not CHROMIUM.exists():
        pytest.fail(f"no Chromium at {CHROMIUM}: run tests/install-browser.sh (it apt-installs "
                    "Debian's chromium)", pytrace=False)
    from playwright.sync_api import sync_playwright

    with sync_playwright() as pw:
        b = pw.chromium.launch(executable_path=str(CHROMIUM), args=ARGS)
        yield b
        b.close()


@pytest.fixture
def web_head(farm):
    """A real head with its page on a free port: (farm, page URL); no worker yet."""
    farm.head_proc = farm._spawn(["head", "--state", farm.state, "--redis", farm.url, "--lease",
                                  10, "--attempts", 1, "--web-port", 0], "head.log")
    give_up_at = time.monotonic() + 60
    while True:
        log = (farm.tmp / "head.log").read_text(errors="replace")
        m = re.search(r"Web page: (http://\S+)", log)
        if m and "Workers join with:" in log:
            break
        assert farm.head_proc.poll() is None and time.monotonic() < give_up_at, log
        time.sleep(0.1)
    return farm, m.group(1)


@pytest.fixture
def web_farm(web_head):
    """The head and one real worker: (farm, page URL)."""
    farm, url = web_head
    # a short sleep after every sample (the worker's test hook), so the page sees it rendering
    farm.start_worker("w1", fakes={"sample_delay": 0.05})
    return farm, url


def log_in(browser, farm, url, viewport=LAPTOP):
    page = browser.new_page(viewport=viewport)
    page.goto(url)
    page.fill("#password", (farm.state / "web" / "password").read_text().strip())
    page.click("button[type=submit]")
    page.wait_for_selector("#fig-shots")
    return page


def upload(page, shot, archive, tile="16"):
    page.click("#open-submit")
    page.set_input_files("input[name=shot]", str(shot))
    page.set_input_files("input[name=assets]", str(archive))
    page.fill("input[name=tile]", tile)
    page.click("#submit-panel button[type=submit]")
    page.wait_for_selector("#submit-msg.good", timeout=60_000)


@pytest.fixture
def small_courtyard(tmp_path, repo_root):
    """The demo shot at 64 × 36, 3 frames, 4 spp, beside a zip of its assets."""
    return courtyard_upload(tmp_path, repo_root, width=64, height=36, frames=3)


class Shots:
    def __init__(self, folder: Path):
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)
        OUT.mkdir(exist_ok=True)

    def take(self, page, name: str, full: bool = True) -> None:
        """full: the whole page; else what the window shows without scrolling."""
        path = self.folder / f"{name}.png"
        page.screenshot(path=str(path), full_page=full)
        shutil.copy(path, OUT / path.name)


def test_log_in_submit_watch_it_finish_and_refine_one_frame(web_farm, small_courtyard, browser,
                                                           tmp_path):
    farm, url = web_farm
    shot, archive = small_courtyard
    shots = Shots(tmp_path / "screenshots")
    password = (farm.state / "web" / "password").read_text().strip()
    page = browser.new_page(viewport=LAPTOP)

    page.goto(url)
    assert "/login" in page.url
    shots.take(page, "01-login")
    page.fill("#password", password)
    page.click("button[type=submit]")
    page.wait_for_selector("#fig-shots")

    upload(page, shot, archive, tile="16")  # 4 × 3 tiles of 16 px
    page.wait_for_selector("a.shot", timeout=30_000)
    page.wait_for_selector("#machines .machine")
    shots.take(page, "02-overview-laptop")

    page.click("a.shot")
    page.wait_for_selector("#job-state .st-running", timeout=60_000)
    page.wait_for_selector("#strip .cell")
    shots.take(page, "03-job-rendering-laptop")
    page.wait_for_selector("#job-state .st-done", timeout=240_000)
    page.locator("#strip .cell.st-done").nth(2).wait_for()  # all 3 frames
    page.wait_for_selector(KNOWN_NOISE)
    shots.take(page, "04-job-done-laptop")
    shots.take(page, "04-job-done-laptop-first-screen", full=False)
    page.check("input[name=overlay][value=noise]")
    page.click("#tiles", position={"x": 5, "y": 5})
    assert "tile 0 · 4 of 4 samples · noise " in page.inner_text("#tile-info")
    shots.take(page, "05-job-noise-map-laptop")

    frame = int(page.get_attribute("#frame-facts", "data-frame"))
    before = float(page.get_attribute("#frame-facts", "data-noise"))
    page.fill("#refine input[name=samples]", "32")
    page.check("#refine input[name=where][value=frame]")
    page.click("#refine button[type=submit]")
    page.wait_for_selector("#refine-msg.good")
    page.wait_for_selector("#frame-facts[data-held='32']" + KNOWN_NOISE[12:], timeout=240_000)
    after = float(page.get_attribute("#frame-facts", "data-noise"))
    shots.take(page, "06-job-refined-laptop")
    # the standard error of a mean falls as 1/sqrt(n) (rule of thumb for a path tracer's pixel
    # estimates): 8× the samples gives about a third of it; a wide margin for the sampler
    assert after < 0.75 * before, (frame, before, after)

    page.set_viewport_size(PHONE)
    page.reload()
    page.wait_for_selector(KNOWN_NOISE)
    shots.take(page, "07-job-phone")
    page.goto(url)
    page.wait_for_selector("a.shot")
    shots.take(page, "08-overview-phone")


def test_a_failed_tile_shows_its_error_and_renders_when_retried(web_head, small_courtyard,
                                                               browser, tmp_path):
    farm, url = web_head
    shot, archive = small_courtyard
    shots = Shots(tmp_path / "screenshots")
    # tile 1 of frame 2 raises on this worker (its test hook); one attempt (--attempts 1)
    farm.start_worker("poisoned", fakes={"poison": "2/1"})
    page = log_in(browser, farm, url)
    upload(page, shot, archive)
    page.wait_for_selector("a.shot")
    page.click("a.shot")
    page.wait_for_selector("#job-state .st-failed", timeout=240_000)
    page.click("#strip .cell.st-failed")
    page.wait_for_selector(".failure pre")
    assert "poisoned batch" in page.inner_text(".failure pre")
    page.check("input[name=overlay][value=state]")
    shots.take(page, "10-job-failed-tile-laptop")

    os.killpg(farm.workers["poisoned"].pid, signal.SIGKILL)
    farm.start_worker("clean")
    page.click(".failure button")  # "Retry tile"
    page.wait_for_selector("#job-state .st-done", timeout=240_000)
    page.wait_for_selector("#strip .cell.sel.st-done")
    assert page.locator(".failure").count() == 0


def srgb_decode(code):
    """8-bit sRGB code values → linear, the IEC 61966-2-1 transfer function (from memory:
    c / 12.92 up to 0.04045, else ((c + 0.055) / 1.055) ** 2.4), written out here, not lampyr's."""
    import numpy as np

    c = np.clip(np.asarray(code, np.float64) / 255.0, 0.0, 1.0)
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def png_pixels(data: bytes):
    import io

    import numpy as np
    from PIL import Image

    return np.asarray(Image.open(io.BytesIO(data)).convert("RGB"), np.int64)


def test_the_exposure_control_brightens_the_preview(web_farm, small_courtyard, browser):
    import numpy as np

    farm, url = web_farm
    shot, archive = small_courtyard
    page = log_in(browser, farm, url)
    upload(page, shot, archive)
    page.click("a.shot")
    page.wait_for_selector("#job-state .st-done", timeout=240_000)
    page.wait_for_selector("#preview[src*='exposure=0']")
    # the image the browser is served for the preview once the slider says two stops
    with page.expect_response(lambda resp: "preview.png" in resp.url
                              and "exposure=2" in resp.url) as shown:
        page.fill("#exposure", "2")
    after_url = shown.value.url
    assert shown.value.status == 200
    after = png_pixels(shown.value.body())
    before = png_pixels(page.request.get(after_url.replace("exposure=2", "exposure=0")).body())
    assert page.inner_text("#exposure-out") == "+2.0"
    # two stops are 4× the radiance before the sRGB curve: every code that is not clipped
    # decodes (within its half-step of 8-bit rounding) to 4× the code shown at 0 stops
    lo0, hi0 = srgb_decode(before - 0.5), srgb_decode(before + 0.5)
    lo2, hi2 = srgb_decode(after - 0.5), srgb_decode(after + 0.5)
    free = (after < 255) & (before > 0)
    assert free.mean() > 0.25  # enough of the frame unclipped at +2 for the check to bite
    assert np.all(4 * lo0[free] <= hi2[free] + 1e-12) and np.all(4 * hi0[free] >= lo2[free] - 1e-12)
    assert np.all(after >= before) and after.mean() > before.mean()


def test_a_viewer_login_sees_the_farm_without_its_controls(web_head, browser, tmp_path):
    farm, url = web_head
    shots = Shots(tmp_path / "screenshots")
    (farm.state / "web" / "viewer-password").write_text("just looking\n")
    # the page reads the viewer password at the head's start: start the head again
    farm.head_proc.terminate()
    farm.head_proc.wait(30)
    (farm.tmp / "head.log").write_text("")
    farm.head_proc = farm._spawn(["head", "--state", farm.state, "--redis", farm.url,
                                  "--web-port", 0], "head.log")
    give_up_at = time.monotonic() + 60
    while not (m := re.search(r"Web page: (http://\S+)", (farm.tmp / "head.log").read_text())):
        assert time.monotonic() < give_up_at
        time.sleep(0.1)
    page = browser.new_page(viewport=LAPTOP)
    page.goto(m.group(1))
    page.fill("#password", "just looking")
    page.click("button[type=submit]")
    page.wait_for_selector(".role")
    assert page.inner_text(".role") == "looking only"
    assert not page.is_visible("#open-submit")
    shots.take(page, "11-overview-viewer-laptop")
