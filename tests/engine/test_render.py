"""Batches are deterministic, merge exactly, refine from a frame file, and converge like N^-1/2."""

from __future__ import annotations

import numpy as np
import pytest

from lampyr.engine.exr import read_frame, write_frame
from lampyr.engine.film import merge
from lampyr.engine.render import FrameRenderer, Tile, render_frame

from .scenes import load, shot_text, write_quad

SCENE = """
[environment]
color = [0.3, 0.35, 0.45]
[[material]]
name = "floor"
type = "diffuse"
color = [0.7, 0.6, 0.5]
[[material]]
name = "ball"
type = "plastic"
color = [0.2, 0.4, 0.8]
roughness = 0.2
[[material]]
name = "chrome"
type = "metal"
color = [0.9, 0.9, 0.9]
roughness = 0.25
[[material]]
name = "lamp"
type = "diffuse"
color = [0.1, 0.1, 0.1]
emission = [6, 5, 4]
[[object]]
name = "floor"
material = "floor"
mesh = "floor.obj"
[[object]]
name = "ball"
material = "ball"
sphere = { center = [-0.6, 0.5, -3], radius = 0.5 }
[[object]]
name = "chrome"
material = "chrome"
sphere = { center = [0.6, 0.4, -2.6], radius = 0.4 }
[[object]]
name = "lamp"
material = "lamp"
sphere = { center = [0.5, 2.0, -2], radius = 0.3 }
"""
CAMERA = "position = [0, 1, 1]\ntarget = [0, 0.5, -3]\nfov = 50"


@pytest.fixture
def scene_shot(tmp_path):
    write_quad(tmp_path / "floor.obj", half=6.0)
    return lambda **kw: load(tmp_path, shot_text(SCENE, camera=CAMERA, **kw))


@pytest.mark.parametrize("sampler", ["sobol", "random"])
def test_same_batch_twice_gives_identical_bits(scene_shot, sampler):
    shot = scene_shot(width=12, height=10, sampler=sampler)
    r = FrameRenderer(shot, 1)
    tile = Tile(2, 1, 8, 7)
    a = r.render(tile, 5, 9)
    b = FrameRenderer(shot, 1).render(tile, 5, 9)
    assert a.n.sum() > 0
    for field in ("n", "rgb_sum", "rgb_sq", "albedo_sum", "normal_sum", "depth_sum"):
        assert np.array_equal(getattr(a, field), getattr(b, field)), field


@pytest.mark.parametrize("sampler", ["sobol", "random"])
def test_two_sample_ranges_merge_to_the_whole_range(scene_shot, sampler):
    shot = scene_shot(width=10, height=8, sampler=sampler)
    r = FrameRenderer(shot, 1)
    tile = Tile(0, 0, 10, 8)
    whole = r.render(tile, 0, 64)
    halves = merge(r.render(tile, 0, 32), r.render(tile, 32, 32))
    assert np.array_equal(whole.n, halves.n)
    # float64 sums added in a different order: equal to far better than float32 rounding
    np.testing.assert_allclose(halves.rgb_sum, whole.rgb_sum, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(halves.rgb_sq, whole.rgb_sq, rtol=1e-12, atol=1e-12)


def test_tiles_render_the_same_pixels_as_the_whole_frame(scene_shot):
    shot = scene_shot(width=12, height=10, samples=4)
    whole = render_frame(shot, 1, tile_size=64)
    tiled = render_frame(shot, 1, tile_size=5)
    np.testing.assert_allclose(tiled.rgb_sum, whole.rgb_sum, rtol=1e-12, atol=1e-12)


def test_refining_a_frame_read_from_disk_equals_rendering_the_total(scene_shot, tmp_path):
    shot = scene_shot(width=10, height=8, samples=64)
    first = render_frame(shot, 1, 0, 24)
    path = tmp_path / "test.0001.exr"
    write_frame(path, first, {"shot": "test"})
    state, attrs = read_frame(path)
    refined = merge(state, render_frame(shot, 1, 24, 40))
    direct = render_frame(shot, 1, 0, 64)
    assert np.array_equal(refined.n, direct.n)
    # the file holds float32 means and variances: agreement to float32 rounding
    np.testing.assert_allclose(refined.mean(), direct.mean(), rtol=2e-6, atol=1e-7)
    np.testing.assert_allclose(refined.variance(), direct.variance(), rtol=1e-4, atol=1e-6)


def test_error_falls_like_one_over_square_root_of_samples(scene_shot):
    # Monte Carlo with independent samples: RMS error ∝ N^-1/2 (central limit theorem).
    shot = scene_shot(width=8, height=8, sampler="random")
    reference = render_frame(shot, 1, 100_000, 4096).mean()
    counts = np.array([16, 64, 256, 1024])
    rmse = np.array([
        np.sqrt(np.mean((render_frame(shot, 1, 0, int(n)).mean() - reference) ** 2)) for n in counts
    ])
    slope = np.polyfit(np.log(counts), np.log(rmse), 1)[0]
    # the reference's own error (1/4 of the 1024-sample error) flattens the tail a little
    assert -0.62 < slope < -0.38, (slope, rmse)


@pytest.fixture
def ball_shot(tmp_path):
    """SCENE with the plastic ball as a mesh of 5,120 triangles (trimesh's icosphere)."""
    import trimesh

    write_quad(tmp_path / "floor.obj", half=6.0)
    ball = trimesh.creation.icosphere(subdivisions=4, radius=0.5)
    ball.apply_translation([-0.6, 0.5, -3])
    ball.export(tmp_path / "ball.obj")
    text = SCENE.replace('sphere = { center = [-0.6, 0.5, -3], radius = 0.5 }', 'mesh = "ball.obj"')
    return load(tmp_path, shot_text(text, camera=CAMERA, width=12, height=8, samples=4))


def test_leaf_spans_are_kept_from_the_threshold_and_zero_below(ball_shot):
    from lampyr.engine.compiler import compile_frame, compile_geometry

    geom = compile_geometry(ball_shot)
    rows = geom.meshes.tris.nbytes  # 5,122 triangles: 184 kB, under the default 1 MB
    below, _ = compile_frame(ball_shot, geom, 1)
    assert (below.blas_span == 0).all()
    at, _ = compile_frame(ball_shot, geom, 1, span_min_bytes=rows)
    assert (at.blas_span == geom.meshes.blas_span).all() and (at.blas_span[:, 1] > 0).any()
    above, _ = compile_frame(ball_shot, geom, 1, span_min_bytes=rows + 1)
    assert (above.blas_span == 0).all()


def test_span_prefetches_leave_the_image_unchanged(ball_shot):
    """Prefetching cannot change a value (LLVM Language Reference, "llvm.prefetch"): the same
    bits with the scene's leaf spans as without."""
    from lampyr.engine.compiler import compile_frame

    r = FrameRenderer(ball_shot, 1)
    assert (r.scene.blas_span == 0).all()
    without = r.render(Tile(0, 0, 12, 8), 0, 4)
    r.scene, _ = compile_frame(ball_shot, r.geometry, 1, span_min_bytes=0)
    assert (r.scene.blas_span[:, 1] > 0).any()
    with_spans = r.render(Tile(0, 0, 12, 8), 0, 4)
    assert without.n.sum() > 0
    for field in ("n", "rgb_sum", "rgb_sq", "albedo_sum", "normal_sum", "depth_sum"):
        assert np.array_equal(getattr(without, field), getattr(with_spans, field)), field
