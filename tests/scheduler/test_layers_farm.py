"""Light-path layers and light groups through the farm: they are sums, so they travel as float32
results, merge across batches in the head's accumulators and take more samples through refine
exactly as the beauty does (docs/design.md, invariants 1-2; docs/shot-file.md, `[output]`).

"Exactly" means to float32 rounding: the workers send float32 sums and the frame file keeps
float32 means (IEEE 754 binary32, 2^-24 relative per operation; the tolerances below allow for
a few dozen such roundings).
"""

from __future__ import annotations

import numpy as np
import pytest

from .farmtools import LAYOUT, wait_for

LAYER_OPTIONS = """
[output]
layers = ["diffuse_direct", "diffuse_indirect", "specular_direct", "specular_indirect",
          "transmission", "emission", "background"]
light_groups = true
"""


def _layered(tiny_shot):
    """The tiny shot with every layer, its lamp in group "key" and its sky in group "sky"."""
    text = tiny_shot.read_text()
    text = text.replace('emission = [4.0, 3.0, 2.0]', 'emission = [4.0, 3.0, 2.0]\ngroup = "key"')
    text = text.replace('color = [0.2, 0.25, 0.3]', 'color = [0.2, 0.25, 0.3]\ngroup = "sky"')
    path = tiny_shot.with_name("layered.toml")
    path.write_text(text + LAYER_OPTIONS)
    return path


def _direct(path, first, count, frame=1):
    from lampyr.engine.render import render_frame
    from lampyr.engine.shot import load_shot

    return render_frame(load_shot(path), frame, first, count, tile_size=8)


def _close(a, b):
    np.testing.assert_allclose(a, b, rtol=2e-5, atol=1e-6)


def test_results_travel_as_float32_with_their_layers(tiny_shot):
    from lampyr.engine.film import from_bytes, merge, to_bytes

    path = _layered(tiny_shot)
    halves = [from_bytes(to_bytes(_direct(path, a, 4), bits=32)) for a in (0, 4)]
    whole = _direct(path, 0, 8)
    # 21 + 3K float32 values per pixel (docs/design.md, film bytes)
    k = len(whole.layer_names)
    assert k == 10  # seven classes, group_other, group_key, group_sky
    names = sum(1 + len(n) for n in whole.layer_names)
    for bits in (32, 64):
        assert len(to_bytes(whole, bits=bits)) == 25 + names + 16 * 12 * (21 + 3 * k) * bits // 8 + 4
    merged = merge(*halves)
    assert merged.layer_names == whole.layer_names
    _close(merged.layers, whole.layers)
    _close(merged.rgb_sum, whole.rgb_sum)


def test_refining_a_frame_file_adds_to_its_layers(tiny_shot, tmp_path):
    from lampyr.engine.exr import read_frame, write_frame
    from lampyr.scheduler.refine_file import refine_frame_file

    path = _layered(tiny_shot)
    frame = tmp_path / "layered.0001.exr"
    write_frame(frame, _direct(path, 0, 4), {"frame": 1, "samples": 4})
    refine_frame_file(frame, path, 8, tile_size=8)
    film, _ = read_frame(frame)
    whole = _direct(path, 0, 8)
    assert film.layer_names == whole.layer_names
    for name in whole.layer_names:
        _close(film.layer_mean(name), whole.layer_mean(name))


def test_refining_with_a_shot_that_keeps_other_layers_is_refused(tiny_shot, tmp_path):
    from lampyr.engine.exr import write_frame
    from lampyr.errors import FrameFileError
    from lampyr.scheduler.refine_file import refine_frame_file

    frame = tmp_path / "tiny.0001.exr"
    write_frame(frame, _direct(_layered(tiny_shot), 0, 2), {"frame": 1, "samples": 2})
    with pytest.raises(FrameFileError, match="layers"):
        refine_frame_file(frame, tiny_shot, 4, tile_size=8)


def test_farm_layers_merge_across_batches_and_through_refine(farm, tiny_shot, tmp_path):
    # batches of 1 and 3 samples over 8 px tiles, merged by the head, then 4 more samples each
    from lampyr.engine.exr import read_frame

    path = _layered(tiny_shot)
    farm.start_head()
    farm.start_worker("a")
    job = farm.submit(path, "--out", tmp_path / "out", "--samples", 4, *LAYOUT)
    farm.wait(job)
    farm.cli("refine", job, "--samples", 8, "--head", farm.url)
    wait_for(lambda: farm.status(job)["samples"] == 8, what="the refine command")
    st = farm.wait(job)
    assert st["state"] == "done"
    for f in (1, 2):
        film, _ = read_frame(tmp_path / "out" / f"tiny.{f:04d}.exr")
        whole = _direct(path, 0, 8, frame=f)
        assert film.layer_names == whole.layer_names
        for name in whole.layer_names:
            _close(film.layer_mean(name), whole.layer_mean(name))
        # each family adds up to the beauty (Veach 1997, ch. 8), here after the EXR's float32
        mean = film.mean()
        _close(sum(film.layer_mean(n) for n in film.layer_names[:7]), mean)
        _close(sum(film.layer_mean(n) for n in film.layer_names[7:]), mean)
