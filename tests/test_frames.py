"""Writing one frame's files (lampyr/frames.py): the denoised layer and what it must not touch."""

from __future__ import annotations

import io

import numpy as np
import OpenEXR
import pytest
from PIL import Image

from lampyr.engine.exr import CHANNELS, DENOISED, ODD, ODD_COUNT
from lampyr.engine.preview import to_8bit
from lampyr.engine.shot import parse_shot_text
from lampyr.frames import write_frame_files

from .conftest import TINY_SHOT


@pytest.fixture(scope="module")
def film(compiled_kernels):
    from lampyr.engine.render import render_frame

    return render_frame(parse_shot_text(TINY_SHOT), 1)


def channels(path):
    # read back by the OpenEXR library itself
    with OpenEXR.File(str(path), separate_channels=True) as f:
        return {k: np.array(v.pixels) for k, v in f.channels().items()}


def write(tmp_path, film, text, final=True, folder="out"):
    return write_frame_files(tmp_path / folder, parse_shot_text(text), 1, film, 1.0, final=final)


def test_a_final_frame_has_the_denoised_layer(tmp_path, film):
    got = channels(write(tmp_path, film, TINY_SHOT))
    assert all(c in got and got[c].dtype == np.float32 for c in DENOISED)


STORED = CHANNELS + ODD + (ODD_COUNT,)  # the odd half-frame too (docs/denoising.md)


@pytest.mark.parametrize("name", STORED)
def test_denoising_leaves_every_frame_channel_bit_identical(tmp_path, film, name):
    # RGBA and the rest stay the unbiased mean: the same as a frame written with denoise off
    on = channels(write(tmp_path, film, TINY_SHOT, folder="on"))
    off = channels(write(tmp_path, film, TINY_SHOT + "\n[output]\ndenoise = false\n", folder="off"))
    assert on[name].tobytes() == off[name].tobytes()


def test_denoise_false_writes_no_denoised_layer(tmp_path, film):
    got = channels(write(tmp_path, film, TINY_SHOT + "\n[output]\ndenoise = false\n"))
    assert sorted(got) == sorted(STORED)


def test_an_intermediate_rewrite_is_not_denoised(tmp_path, film):
    # the head rewrites a frame as its tiles grow; only the complete frame is denoised
    got = channels(write(tmp_path, film, TINY_SHOT, final=False))
    assert sorted(got) == sorted(STORED)


@pytest.mark.parametrize("final, layer", [(True, DENOISED), (False, ("R", "G", "B"))])
def test_the_png_preview_shows_the_denoised_picture_when_there_is_one(tmp_path, film, final,
                                                                      layer):
    path = write(tmp_path, film, TINY_SHOT, final=final)
    got = channels(path)
    want = to_8bit(np.stack([got[c] for c in layer], -1))
    png = np.asarray(Image.open(io.BytesIO(path.with_suffix(".png").read_bytes())).convert("RGB"))
    assert np.array_equal(png, want)


def test_the_layer_picker_does_not_offer_the_odd_half(tmp_path, film):
    # the odd half-frame is bookkeeping for the denoised error (docs/denoising.md), not a layer
    from lampyr.webui.layers import layers_from_channels

    got = channels(write(tmp_path, film, TINY_SHOT))
    assert all(c in got for c in ODD) and "oddhalf" not in layers_from_channels(got)
