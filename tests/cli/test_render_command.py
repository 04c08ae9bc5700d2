"""`lampyr render` as a person runs it: the real console command in a subprocess."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import OpenEXR
import pytest
from PIL import Image

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "examples" / "courtyard" / "courtyard.toml"


def lampyr(*args, **kw) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "lampyr.cli", *map(str, args)],
                          capture_output=True, text=True, timeout=600, **kw)


def test_demo_command_renders_frames_and_previews(tmp_path):
    # the README's demo command, made small: same shot, fewer pixels, samples and frames
    out = tmp_path / "renders"
    res = lampyr("render", DEMO, "--out", out, "--frames", "1-2", "--width", 32, "--height", 18,
                 "--samples", 2, "--workers", 2, "--quiet")
    assert res.returncode == 0, res.stderr
    for frame in (1, 2):
        exr = out / f"courtyard.{frame:04d}.exr"
        with OpenEXR.File(str(exr), separate_channels=True) as f:
            ch = f.channels()
            rgb = np.stack([np.array(ch[c].pixels) for c in "RGB"], -1)
            spp = np.array(ch["spp"].pixels)
            dropped = np.array(ch["dropped"].pixels)
        assert rgb.shape == (18, 32, 3)
        assert np.all(spp + dropped == 2)
        assert np.isfinite(rgb).all() and rgb.max() > 0
        with Image.open(out / f"courtyard.{frame:04d}.png") as im:
            assert im.size == (32, 18)
    assert "Wrote 2 frame(s)" in res.stdout


@pytest.mark.parametrize("edit, message", [
    (("fov = 50.0", "fov = 0"), "camera.fov: expected degrees between 1 and 179, got 0"),
    (('scene = "assets/courtyard.glb"', 'scene = "assets/nowhere.glb"'), "scene: expected an existing file"),
    (('material = "glass"', 'material = "crystal"'), "object[glass_ball].material"),
    (("width = 256", "width = 100000"), "image.width"),
])
def test_bad_shot_gives_one_line_and_status_2(tmp_path, edit, message):
    assert edit[0] in DEMO.read_text()  # the edit applies to the demo as it is
    text = DEMO.read_text().replace(*edit)
    shot = tmp_path / "courtyard" / "bad.toml"
    shot.parent.mkdir()
    (shot.parent / "assets").symlink_to(DEMO.parent / "assets")
    shot.write_text(text)
    res = lampyr("render", shot, "--out", tmp_path / "out", "--quiet")
    assert res.returncode == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1, res.stderr
    assert message in lines[0]
    assert "Traceback" not in res.stderr
    assert not (tmp_path / "out").exists()


def _broken_scenes():
    """(name, change to the scene's JSON, what the one line must name): bad glTF input the issue
    lists, each refused before any farm starts (docs/scenes.md)."""
    def missing_texture(doc):
        doc["images"] = [{"uri": "nowhere.png"}]
        doc["textures"] = [{"source": 0}]
        doc["materials"] = [{"pbrMetallicRoughness": {"baseColorTexture": {"index": 0}}}]
        doc["meshes"][0]["primitives"][0]["material"] = 0

    def out_of_range(doc):
        doc["accessors"][doc["meshes"][0]["primitives"][0]["indices"]]["count"] = 10**6

    def lines(doc):
        doc["meshes"][0]["primitives"][0]["mode"] = 1

    def required(doc):
        doc["extensionsUsed"] = doc["extensionsRequired"] = ["KHR_draco_mesh_compression"]

    return [
        pytest.param(missing_texture, "images[0]", id="missing texture"),
        pytest.param(out_of_range, "accessors[", id="accessor past its buffer"),
        pytest.param(lines, "meshes[0].primitives[0].mode", id="lines"),
        pytest.param(required, "KHR_draco_mesh_compression", id="unsupported required extension"),
    ]


@pytest.mark.parametrize("change, names", _broken_scenes())
def test_a_broken_scene_file_is_one_line_and_status_2_before_anything_starts(tmp_path, change, names):
    import json

    from examples.gltf_builder import GltfBuilder
    from tests.engine.gltf_files import QUAD_FACES, QUAD_NORMALS, QUAD_POSITIONS, QUAD_UVS

    b = GltfBuilder()
    b.add_node("quad", mesh=b.add_mesh([b.primitive(QUAD_POSITIONS, QUAD_NORMALS, QUAD_UVS, indices=QUAD_FACES)]))
    path = b.save(tmp_path / "scene.gltf")
    doc = json.loads(path.read_text())
    change(doc)
    path.write_text(json.dumps(doc))
    shot = tmp_path / "shot.toml"
    shot.write_text('name = "broken"\nframes = 1\nscene = "scene.gltf"\n[image]\nwidth = 4\nheight = 4\n'
                    '[sampling]\nsamples = 1\n[camera]\nposition = [0, 0, 3]\ntarget = [0, 0, 0]\n')
    out = tmp_path / "out"
    res = lampyr("render", shot, "--out", out, "--quiet")
    assert res.returncode == 2, res.stderr
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and names in lines[0] and "scene.gltf" in lines[0], res.stderr
    assert not out.exists()  # nothing started, nothing written


def test_bad_option_gives_status_2(tmp_path):
    res = lampyr("render", DEMO, "--out", tmp_path, "--frames", "one-two")
    assert res.returncode == 2
    assert "--frames" in res.stderr


def test_help_lists_the_render_command():
    res = lampyr("--help")
    assert res.returncode == 0
    assert "render" in res.stdout


def as_in_a_terminal() -> None:
    """Ctrl-C's default action, as a program started from a terminal has it. A shell starts a
    background job (`cmd &` with no job control, as CI scripts and nohup do) with SIGINT ignored,
    and children inherit that: Python then installs no KeyboardInterrupt handler, and the render
    ran on to exit 0 (seen once in a suite started in the background)."""
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def test_interrupt_keeps_the_frames_already_written(tmp_path):
    out = tmp_path / "out"
    # frames are written whole, after a first pass over all 48 (docs/farm.md: 1/16 of the
    # samples first, then the rest frame after frame). At 32 × 24 px and 64 spp every frame
    # after the first still needs 60 spp of its own — 47 × 46 080 pixel-samples on one worker —
    # so when the first frame file appears, most of the render is provably still to come
    proc = subprocess.Popen(
        [sys.executable, "-m", "lampyr.cli", "render", str(DEMO), "--out", str(out), "--frames", "1-48",
         "--width", "32", "--height", "24", "--samples", "64", "--workers", "1", "--quiet"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True,
        preexec_fn=as_in_a_terminal,
    )
    give_up_at = time.monotonic() + 300
    while not list(out.glob("*.png")) and time.monotonic() < give_up_at and proc.poll() is None:
        time.sleep(0.1)
    assert proc.poll() is None, "the render ended before it could be interrupted"
    os.killpg(proc.pid, signal.SIGINT)  # as Ctrl-C in a terminal: the whole process group
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    kept = sorted(out.glob("courtyard.*.exr"))
    assert 1 <= len(kept) < 48  # some frames written, some never started
    for path in kept:  # every kept frame is whole and readable
        with OpenEXR.File(str(path), separate_channels=True) as f:
            assert np.array(f.channels()["spp"].pixels).min() == 64
    assert not list(out.glob("*.tmp*")), "a half-written file was left behind"


DENOISED = ("denoised.R", "denoised.G", "denoised.B")


@pytest.mark.parametrize("flags, has_layer", [((), True), (("--no-denoise",), False)])
def test_no_denoise_leaves_the_denoised_layer_out(tmp_path, tiny_shot, flags, has_layer):
    # issue 12: complete frames carry denoised.R/G/B unless turned off; read back with OpenEXR
    out = tmp_path / "renders"
    res = lampyr("render", tiny_shot, "--out", out, "--frames", "1", "--workers", 1, "--quiet",
                 *flags)
    assert res.returncode == 0, res.stderr
    with OpenEXR.File(str(out / "tiny.0001.exr"), separate_channels=True) as f:
        names = set(f.channels())
    assert all((c in names) is has_layer for c in DENOISED)


@pytest.mark.parametrize("command", ["render", "submit"])
def test_both_commands_offer_no_denoise(command):
    res = lampyr(command, "--help")
    assert res.returncode == 0 and "--no-denoise" in res.stdout


def test_no_denoise_becomes_the_shot_override():
    from lampyr.cli import _overrides

    assert _overrides(None, None, None, None, True) == {"denoise": False}
    assert _overrides(None, None, None, None, False) == {}
