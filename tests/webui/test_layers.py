"""A frame file's layers as pictures (webui/layers.py): which layers a file holds, each layer's
mapping to 8-bit codes, the thumbnails, and the routes that serve them."""

from __future__ import annotations

import html
import io

import numpy as np
import pytest
from PIL import Image

from lampyr.webui import layers as L


def codes_of(data: bytes) -> np.ndarray:
    return np.asarray(Image.open(io.BytesIO(data)).convert("RGB"), np.int64)


def srgb(linear):
    """IEC 61966-2-1:1999 sRGB transfer function, written out here from the standard."""
    x = np.clip(linear, 0.0, 1.0)
    return np.where(x <= 0.0031308, 12.92 * x, 1.055 * np.power(x, 1 / 2.4) - 0.055)


# -- which layers ---------------------------------------------------------------------------

FRAME = ["A", "B", "G", "R", "N.X", "N.Y", "N.Z", "Z", "albedo.B", "albedo.G", "albedo.R",
         "dropped", "hits", "spp", "var.B", "var.G", "var.R"]


def test_a_plain_frame_offers_beauty_albedo_normal_depth_and_variance():
    assert L.layers_from_channels(FRAME) == ["beauty", "albedo", "normal", "depth", "variance"]
    assert L.default_layer(L.layers_from_channels(FRAME)) == "beauty"


def test_extra_colour_layers_are_found_by_their_channel_names():
    extra = [f"{n}.{c}" for n in ("specular_indirect", "diffuse_direct", "group_key")
             for c in "RGB"]
    found = L.layers_from_channels(FRAME + extra + ["denoised.R", "denoised.G", "denoised.B",
                                                    "half.R", "half.G"])  # half: no B
    assert found == ["denoised", "beauty", "diffuse_direct", "specular_indirect", "group_key",
                     "albedo", "normal", "depth", "variance"]  # light paths, then light groups
    assert L.default_layer(found) == "denoised"


def test_a_layer_name_unfit_for_an_address_is_not_offered():
    bad = [f"{n}.{c}" for n in ("two words", "x/y", "9lives") for c in "RGB"]
    assert L.layers_from_channels(FRAME + bad) == L.layers_from_channels(FRAME)


# -- the mappings -----------------------------------------------------------------------------


def test_colour_layers_go_through_the_srgb_curve_like_the_beauty_preview():
    rng = np.random.default_rng(3)
    rgb = rng.uniform(0.0, 1.5, (5, 7, 3))
    for stops in (0.0, 1.0, -2.5):
        want = np.floor(srgb(rgb * 2.0 ** stops) * 255 + 0.5)
        assert np.abs(L.colour_codes(rgb, stops) - want).max() <= 1e-9


def test_normals_show_as_half_plus_half_n():
    # the usual normal-picture encoding c = 0.5 + 0.5·n per axis (rule of thumb); 8-bit codes
    # round half up: 0.5 → 127.5 → 128
    n = np.array([[[0.0, 0.0, 1.0], [-1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 0.0]]])
    assert L.normal_codes(n).tolist() == [[[128, 128, 255], [0, 128, 128], [128, 255, 128],
                                           [128, 128, 128]]]
    # a unit vector at 60° from z in the x–z plane: (sin 60°, 0, cos 60°) = (0.866, 0, 0.5)
    s60 = np.sqrt(3) / 2
    got = L.normal_codes(np.array([[[s60, 0.0, 0.5]]]))[0, 0]
    assert got.tolist() == [int(np.floor(255 * (0.5 + 0.5 * s60) + 0.5)), 128, 191]


def test_depth_is_grey_from_the_nearest_hit_white_to_the_farthest_black():
    z = np.array([[2.0, 6.0, 10.0, 0.0, 4.0]])
    hits = np.array([[3, 1, 2, 0, 5]])
    codes, scale = L.depth_codes(z, hits)
    assert scale == {"near": 2.0, "far": 10.0}
    # grey = (far − z) / (far − near): 1, 0.5, 0, (nothing hit) 0, 0.75
    assert codes[..., 0].tolist() == [[255, 128, 0, 0, 191]]
    assert (codes[..., 0] == codes[..., 1]).all() and (codes[..., 1] == codes[..., 2]).all()


def test_depth_of_one_flat_distance_is_white_and_of_nothing_hit_black():
    codes, _ = L.depth_codes(np.full((2, 2), 3.0), np.ones((2, 2)))
    assert (codes == 255).all()
    codes, scale = L.depth_codes(np.zeros((2, 2)), np.zeros((2, 2)))
    assert (codes == 0).all() and scale == {"near": None, "far": None}


def test_variance_shows_the_standard_error_against_its_99th_percentile():
    # samples of known spread per pixel; the unbiased variance from numpy (ddof=1), the
    # standard error of a mean σ/√n (rule of thumb), the percentile as numpy computes it
    rng = np.random.default_rng(11)
    spp = 64
    sigma = rng.uniform(0.05, 0.5, (6, 9))
    samples = rng.normal(1.0, sigma[..., None, None], (6, 9, spp, 3))
    var = samples.var(axis=2, ddof=1)
    codes, scale = L.variance_codes(var, np.full((6, 9), spp))
    # BT.709 weights sum to 1, so equal channel variances v give a luminance variance v
    se = np.sqrt(var @ np.array([0.2126, 0.7152, 0.0722]) / spp)
    white = np.percentile(se, 99)
    assert scale["white"] == pytest.approx(white)
    want = np.floor(np.clip(se / white, 0, 1) * 255 + 0.5)
    assert np.array_equal(codes[..., 0], want)
    assert (codes[..., 0] == 255).sum() >= 1  # the top percent is white


def test_variance_of_pixels_with_fewer_than_two_samples_is_black():
    var = np.ones((1, 3, 3))
    codes, _ = L.variance_codes(var, np.array([[1, 0, 4]]))
    assert codes[0, :, 0].tolist() == [0, 0, 255]


def test_box_downscaling_averages_each_block_of_pixels():
    rng = np.random.default_rng(5)
    rgb = rng.uniform(0, 4, (54 * 2, 96 * 2, 3))
    small = L.box_downscale(rgb, 96)
    blocks = rgb.reshape(54, 2, 96, 2, 3).mean(axis=(1, 3))  # a 2 × 2 block mean, by numpy
    assert small.shape == (54, 96, 3)
    assert np.abs(small - blocks).max() < 1e-5  # float32 inside PIL
    assert L.box_downscale(rgb[:10, :50], 96).shape == (10, 50, 3)  # never enlarged


# -- the routes -----------------------------------------------------------------------------


def exr_path(state, job, frame=1):
    return next((state / "jobs" / job / "frames").glob(f"*.{frame:04d}.exr"))


def read_exr(path, names):
    import OpenEXR

    with OpenEXR.File(str(path), separate_channels=True) as f:
        return np.stack([np.array(f.channels()[c].pixels, np.float64) for c in names], -1)


def test_the_frame_json_lists_the_layers_of_its_file(user, finished_job):
    d = user.get(f"/api/jobs/{finished_job}/frames/1").get_json()
    assert d["layers"] == ["denoised", "beauty", "albedo", "normal", "depth", "variance"]
    frames = user.get(f"/api/jobs/{finished_job}").get_json()["frames"]
    assert all(isinstance(f["exr"], float) for f in frames)


@pytest.mark.parametrize("layer", ["denoised", "beauty", "albedo", "normal", "depth", "variance"])
def test_every_layer_is_served_as_a_picture_of_the_frame_s_size(user, finished_job, layer):
    resp = user.get(f"/jobs/{finished_job}/frames/1/preview.png?layer={layer}")
    assert resp.status_code == 200 and resp.mimetype == "image/png"
    assert codes_of(resp.data).shape == (12, 16, 3)


def test_the_albedo_and_normal_pictures_are_the_file_s_channels_mapped(user, finished_job,
                                                                       state):
    path = exr_path(state, finished_job)
    got = codes_of(user.get(f"/jobs/{finished_job}/frames/1/preview.png?layer=albedo"
                            "&exposure=1").data)
    want = np.floor(srgb(read_exr(path, ["albedo.R", "albedo.G", "albedo.B"]) * 2) * 255 + 0.5)
    assert np.abs(got - want).max() <= 1  # one code for float32 rounding at the knee
    got = codes_of(user.get(f"/jobs/{finished_job}/frames/1/preview.png?layer=normal").data)
    want = np.floor(np.clip(0.5 + 0.5 * read_exr(path, ["N.X", "N.Y", "N.Z"]), 0, 1) * 255 + .5)
    assert np.abs(got - want).max() <= 1
    # the tiny shot's camera looks down at a white ball over a floor: most normals point up and
    # towards the camera (+y, +z), so green and blue are above mid grey on average
    assert got[..., 1].mean() > 140 and got[..., 2].mean() > 128


def test_layers_differ_from_each_other(user, finished_job):
    pics = {layer: codes_of(user.get(f"/jobs/{finished_job}/frames/1/preview.png?layer="
                                     f"{layer}").data)
            for layer in ("beauty", "albedo", "normal", "depth")}
    names = sorted(pics)
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            assert np.abs(pics[a] - pics[b]).mean() > 5, (a, b)


@pytest.mark.parametrize("layer", ["nothing_here", "diffuse_direct"])
def test_a_layer_the_frame_does_not_hold_is_a_404_in_one_line(user, finished_job, layer):
    resp = user.get(f"/jobs/{finished_job}/frames/1/preview.png?layer={layer}")
    text = html.unescape(resp.get_data(as_text=True))
    assert resp.status_code == 404 and "Traceback" not in text
    assert f"has no layer '{layer}' (it has denoised, beauty, albedo" in text


@pytest.mark.parametrize("layer", ["../../x", "a b", "%00", "", "x" * 80])
def test_a_malformed_layer_name_is_a_404_in_one_line(user, finished_job, layer):
    resp = user.get(f"/jobs/{finished_job}/frames/1/preview.png", query_string={"layer": layer})
    text = html.unescape(resp.get_data(as_text=True))
    assert resp.status_code == 404 and "Traceback" not in text and "layer: expected" in text


def test_the_thumbnail_is_a_small_jpeg_of_the_downscaled_preview(user, finished_job, state):
    resp = user.get(f"/jobs/{finished_job}/frames/1/thumb.jpg")
    assert resp.status_code == 200 and resp.mimetype == "image/jpeg"
    assert len(resp.data) < 4096
    thumb = codes_of(resp.data)
    # the tiny frame (16 px) is narrower than a thumbnail: it is not enlarged, only JPEG-coded
    denoised = read_exr(exr_path(state, finished_job), ["denoised.R", "denoised.G", "denoised.B"])
    want = np.floor(srgb(denoised) * 255 + 0.5)
    assert thumb.shape == want.shape
    # JPEG at quality 80 with 4:2:0 chroma: a rule-of-thumb error of a few codes on average
    assert np.abs(thumb - want).mean() < 8


def test_pictures_are_kept_beside_the_frames_and_the_frame_file_is_left_alone(
        user, finished_job, state, app, monkeypatch):
    path = exr_path(state, finished_job)
    before = (path.read_bytes(), path.stat().st_mtime_ns)
    first = user.get(f"/jobs/{finished_job}/frames/1/preview.png?layer=depth").data
    kept = sorted(p.name for p in (path.parent / ".previews").iterdir())
    assert kept == [f"{path.name[:-4]}.depth.e+0.00.{path.stat().st_mtime_ns}-"
                    f"{path.stat().st_size}.png"]
    # a fresh page process (empty memory) serves the kept picture without making it again
    made = []
    monkeypatch.setattr(L, "layer_codes", lambda *a, **k: made.append(a))
    from lampyr.webui.files import PreviewCache

    app.extensions["lampyr.previews"] = PreviewCache()
    assert user.get(f"/jobs/{finished_job}/frames/1/preview.png?layer=depth").data == first
    assert made == []
    assert (path.read_bytes(), path.stat().st_mtime_ns) == before


def test_a_rewritten_frame_gets_new_pictures_and_its_old_ones_go(user, finished_job, state):
    import os

    path = exr_path(state, finished_job)
    user.get(f"/jobs/{finished_job}/frames/1/thumb.jpg")
    old = {p.name for p in (path.parent / ".previews").iterdir()}
    st = path.stat()
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))  # as if the head rewrote it
    user.get(f"/jobs/{finished_job}/frames/1/thumb.jpg")
    new = {p.name for p in (path.parent / ".previews").iterdir()}
    assert len(new) == 1 and not new & old


def test_extra_layers_in_the_file_are_offered_and_shown_like_the_beauty(user, finished_job,
                                                                        state):
    """Light-path and light-group layers are found by their channel names: a frame file given
    two more colour layers (written here with the OpenEXR library) offers both, each exposed and
    through the sRGB curve."""
    import OpenEXR

    path = exr_path(state, finished_job)
    with OpenEXR.File(str(path), separate_channels=True) as f:
        header = dict(f.header())
        chans = {n: np.array(c.pixels) for n, c in f.channels().items()}
    rng = np.random.default_rng(2)
    extra = {"diffuse_direct": rng.uniform(0, 2, (12, 16, 3)),
             "group_key_light": rng.uniform(0, 2, (12, 16, 3))}
    for name, rgb in extra.items():
        for i, c in enumerate("RGB"):
            chans[f"{name}.{c}"] = np.ascontiguousarray(rgb[..., i], np.float32)
    header = {k: v for k, v in header.items() if k not in ("channels", "dataWindow",
                                                          "displayWindow")}
    OpenEXR.File(header, chans).write(str(path))
    d = user.get(f"/api/jobs/{finished_job}/frames/1").get_json()
    assert d["layers"] == ["denoised", "beauty", "diffuse_direct", "group_key_light", "albedo",
                           "normal", "depth", "variance"]
    for name, rgb in extra.items():
        got = codes_of(user.get(f"/jobs/{finished_job}/frames/1/preview.png?layer={name}"
                                "&exposure=-1").data)
        want = np.floor(srgb(rgb.astype(np.float32) * 0.5) * 255 + 0.5)
        assert np.abs(got - want).max() <= 1


def test_a_picture_for_playing_is_shrunk_in_linear_light(tmp_path):
    """A 960 × 540 frame asked for at 480 px: each pixel the mean radiance of a 2 × 2 block
    (numpy), then the sRGB curve; data layers shrink after their mapping."""
    import OpenEXR

    rng = np.random.default_rng(8)
    rgb = rng.uniform(0, 1.2, (540, 960, 3))
    n = np.tile(np.array([0.0, 0.6, 0.8]), (540, 960, 1)) * rng.choice([-1, 1], (540, 960, 1))
    chans = {c: np.ascontiguousarray(rgb[..., i], np.float32) for i, c in enumerate("RGB")}
    chans.update({f"N.{c}": np.ascontiguousarray(n[..., i], np.float32)
                  for i, c in enumerate("XYZ")})
    path = tmp_path / "big.0001.exr"
    OpenEXR.File({"compression": OpenEXR.ZIP_COMPRESSION, "type": OpenEXR.scanlineimage},
                 chans).write(str(path))
    layers = L.layers_from_channels(L.channel_names(path))
    assert layers == ["beauty", "normal"]
    got = L.layer_codes(path, "beauty", layers, 0.0, width=480).astype(np.float64)
    blocks = rgb.astype(np.float32).astype(np.float64).reshape(270, 2, 480, 2, 3).mean((1, 3))
    assert got.shape == (270, 480, 3)
    assert np.abs(got - np.floor(srgb(blocks) * 255 + 0.5)).max() <= 1
    normal = L.layer_codes(path, "normal", layers, 0.0, width=480).astype(np.float64)
    full = L.layer_codes(path, "normal", layers).astype(np.float64)
    assert np.abs(normal - full.reshape(270, 2, 480, 2, 3).mean((1, 3))).max() <= 0.5 + 1e-9
    assert L.layer_codes(path, "beauty", layers, 0.0, width=960).shape == (540, 960, 3)


@pytest.mark.parametrize("width", ["100", "abc", "960.0", "-480"])
def test_a_width_not_offered_for_playing_is_refused_in_one_line(user, finished_job, width):
    resp = user.get(f"/jobs/{finished_job}/frames/1/preview.png?width={width}")
    assert resp.status_code == 400 and "width: expected one of 480, 960" in resp.get_data(
        as_text=True)
