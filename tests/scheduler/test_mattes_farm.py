"""ID mattes through the farm: their slots travel as float32 results, the head merges them by id
in its accumulators, `refine` adds samples to them, and the frame files hold the same ranked
(id, coverage) pairs as a render in one process (docs/design.md, invariants 1-2, 10;
engine/mattes.py).

Coverages are whole sample counts until the frame file stores them as float32 fractions of
`spp` (IEEE 754 binary32: 2^-24 relative per rounding), so ids must match exactly and coverages
to float32 rounding.
"""

from __future__ import annotations

import json

import numpy as np

from .farmtools import LAYOUT, wait_for

MATTE_OPTIONS = '\n[output]\nid_mattes = ["object", "material"]\n'


def _matted(tiny_shot):
    path = tiny_shot.with_name("matted.toml")
    path.write_text(tiny_shot.read_text() + MATTE_OPTIONS)
    return path


def _direct(path, first, count, frame=1):
    from lampyr.engine.render import render_frame
    from lampyr.engine.shot import load_shot

    return render_frame(load_shot(path), frame, first, count, tile_size=8)


def _same_ranks(film, whole):
    """The frame file's ranks equal the one-process render's top ranks."""
    from lampyr.engine.mattes import MATTE_RANKS, rank

    ids, cov = rank(whole.matte_ids, whole.matte_cov, MATTE_RANKS)
    assert np.array_equal(film.matte_ids[..., :MATTE_RANKS], ids)
    np.testing.assert_allclose(film.matte_cov[..., :MATTE_RANKS], cov, rtol=4 * 2.0**-24, atol=0)


def test_results_carry_the_slots_and_merge_to_the_whole(tiny_shot):
    from lampyr.engine.film import from_bytes, merge, to_bytes
    from lampyr.engine.mattes import rank

    path = _matted(tiny_shot)
    parts = [from_bytes(to_bytes(_direct(path, a, c), bits=32)) for a, c in ((0, 1), (1, 3), (4, 4))]
    whole = _direct(path, 0, 8)
    merged = merge(merge(parts[2], parts[0]), parts[1])  # any order
    ids, cov = rank(whole.matte_ids, whole.matte_cov, 8)
    assert np.array_equal(merged.matte_ids, ids) and np.array_equal(merged.matte_cov, cov)
    # the tiny scene sees both balls and the sky: each pixel's coverages add up to its alpha
    assert np.array_equal(merged.matte_cov.sum(-1)[..., 0], merged.alpha_sum)
    assert 0 < merged.alpha_sum.sum() < merged.n.sum()


def test_farm_mattes_equal_a_local_render_and_grow_through_refine(farm, tiny_shot, tmp_path):
    # batches of 1 and 3 samples over 8 px tiles, merged by a real head from a real worker's
    # results, then 4 more samples each through `refine`
    import OpenEXR

    from lampyr.engine.exr import read_frame
    from lampyr.engine.shot import load_shot

    path = _matted(tiny_shot)
    farm.start_head()
    farm.start_worker("a")
    job = farm.submit(path, "--out", tmp_path / "out", "--samples", 4, *LAYOUT)
    farm.wait(job)
    for f in (1, 2):
        film, _ = read_frame(tmp_path / "out" / f"tiny.{f:04d}.exr")
        assert film.matte_kinds == ("object", "material")
        assert film.matte_cov[:, :, 0, 0].any() and film.matte_cov[:, :, 1, 0].any()
        _same_ranks(film, _direct(path, 0, 4, frame=f))
    farm.cli("refine", job, "--samples", 8, "--head", farm.url)
    wait_for(lambda: farm.status(job)["samples"] == 8, what="the refine command")
    st = farm.wait(job)
    assert st["state"] == "done"
    for f in (1, 2):
        exr = tmp_path / "out" / f"tiny.{f:04d}.exr"
        film, _ = read_frame(exr)
        _same_ranks(film, _direct(path, 0, 8, frame=f))
        with OpenEXR.File(str(exr)) as handle:
            header = dict(handle.header())
        manifests = [json.loads(v) for k, v in header.items() if k.endswith("/manifest")]
        shot = load_shot(path)
        assert {o.name for o in shot.objects} in [set(m) for m in manifests]  # ball, light, floor
        assert {m.name for m in shot.materials} in [set(m) for m in manifests]
