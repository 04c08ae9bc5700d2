"""A frame file's layers as pictures: which layers a frame EXR holds, and each one mapped to 8-bit
RGB for the page (the picker in the frame view, the strip's thumbnails, playback).

Layers, by the channel names of `engine/exr.py` (found in the file, never assumed):

    beauty      R G B                 the raw mean radiance
    denoised    denoised.R/G/B        the denoised mean (complete frames)
    <name>      <name>.R/G/B          any other colour layer the file holds (light paths by
                                      name, then light groups `group_<NAME>` by name)
    albedo      albedo.R/G/B          first-hit albedo
    normal      N.X N.Y N.Z           first-hit normal
    depth       Z (and hits)          first-hit distance
    variance    var.R/G/B (and spp)   the variance of one sample

The mappings (the page states them beside the picture):

    colour layers  × 2^exposure, then the sRGB curve of `engine/preview.py`, as the beauty preview
    normal         0.5 + 0.5·N per component, clipped to [0, 1], no tone curve; a pixel that
                   nothing was hit in has N = 0 and shows mid grey
    depth          grey = (far − Z) / (far − near), near and far the least and the greatest
                   distance over the pixels that hit something: the nearest hit white, the
                   farthest black; pixels that hit nothing black (farther than anything)
    variance       the standard error of each pixel's mean, √(Σ w_c·var_c / spp) with the
                   Rec. 709 luminance weights w, divided by the frame's 99th percentile of it
                   and clipped: white is at or above that percentile; pixels with fewer than
                   2 samples black

Grey and normal codes are linear in the value (8-bit code = round(255·v)), with no sRGB curve:
they are data, not light.
"""

from __future__ import annotations

import io
import re
import threading
from collections import OrderedDict
from pathlib import Path

import numpy as np

from ..errors import FrameFileError

LAYER_NAME = re.compile(r"[A-Za-z][A-Za-z0-9_]{0,63}")
COLOUR_FIXED = ("beauty", "denoised", "albedo")
DATA_LAYERS = ("normal", "depth", "variance")
# channel-name prefixes of the frame's own channels: not offered as extra colour layers
OWN_PREFIXES = ("var", "albedo", "denoised", "N", "oddhalf")  # oddhalf: docs/denoising.md
# ID matte layers (engine/mattes.py: matte_<kind>00, 01, ...) hold ids and coverages, not colours
MATTE_LAYER = re.compile(r"matte_[a-z]+[0-9]{2}")
REC709 = (0.2126, 0.7152, 0.0722)  # ITU-R BT.709 luminance weights
VARIANCE_PERCENTILE = 99.0
THUMB_WIDTH = 96  # px: the strip's cells are about this wide
THUMB_QUALITY = 80  # JPEG quality: a 96 px thumbnail is a few kB
# narrower pictures for playing a shot (the page asks for the smallest at least as wide as its
# picture on the screen): a 1920 px frame decoded 48 times over would hold 400 MB in the browser
PLAY_WIDTHS = (480, 960)


class NoSuchLayer(LookupError):
    """The frame file holds no layer of that name; `layers` says which it holds."""

    def __init__(self, layer: str, layers: list[str]):
        self.layer, self.layers = layer, layers
        super().__init__(layer)


# -- which layers a file holds --------------------------------------------------------------


def layers_from_channels(names) -> list[str]:
    """The layers a file with these channel names holds, in the picker's order: denoised,
    beauty, the extra colour layers (light paths, then light groups), albedo, normal, depth,
    variance."""
    names = set(names)
    has = lambda *cs: all(c in names for c in cs)  # noqa: E731
    out = []
    if has("denoised.R", "denoised.G", "denoised.B"):
        out.append("denoised")
    if has("R", "G", "B"):
        out.append("beauty")
    # light paths by name, then the light groups (group_<NAME>) by name
    extra = sorted({n.rsplit(".", 1)[0] for n in names if n.count(".") == 1},
                   key=lambda layer: (layer.startswith("group_"), layer))
    for layer in extra:
        if (layer not in OWN_PREFIXES and layer not in COLOUR_FIXED + DATA_LAYERS
                and not MATTE_LAYER.fullmatch(layer) and LAYER_NAME.fullmatch(layer) and has(*(f"{layer}.{c}" for c in "RGB"))):
            out.append(layer)
    if has("albedo.R", "albedo.G", "albedo.B"):
        out.append("albedo")
    if has("N.X", "N.Y", "N.Z"):
        out.append("normal")
    if has("Z", "hits"):
        out.append("depth")
    if has("var.R", "var.G", "var.B", "spp"):
        out.append("variance")
    return out


def default_layer(layers: list[str]) -> str:
    """What a preview shows unless asked otherwise: the denoised layer, else the raw mean."""
    return "denoised" if "denoised" in layers else "beauty"


def is_colour(layer: str) -> bool:
    return layer not in DATA_LAYERS


class ChannelCache:
    """A frame file's layers by (path, mtime_ns, size), read from its header only; least
    recently used dropped."""

    def __init__(self, entries: int = 256):
        self.entries, self.data, self.lock = entries, OrderedDict(), threading.Lock()

    def layers(self, path) -> list[str]:
        path = Path(path)
        try:
            st = path.stat()
        except FileNotFoundError:
            raise FrameFileError(f"{path}: no such frame file") from None
        key = (str(path), st.st_mtime_ns, st.st_size)
        with self.lock:
            if key in self.data:
                self.data.move_to_end(key)
                return list(self.data[key])
        found = layers_from_channels(channel_names(path))
        with self.lock:
            self.data[key] = found
            while len(self.data) > self.entries:
                self.data.popitem(last=False)
        return list(found)


def channel_names(path) -> list[str]:
    import OpenEXR

    try:
        with OpenEXR.File(str(path), header_only=True) as exr:
            return [c.name for c in exr.header()["channels"]]
    except Exception as err:  # the bindings raise RuntimeError or ValueError on damaged files
        raise FrameFileError(f"{path}: not a readable OpenEXR file ({err})") from None


def read_channels(path, names) -> dict[str, np.ndarray]:
    """The named channels of a frame file as (h, w) float64 arrays; KeyError names one missing."""
    import OpenEXR

    try:
        with OpenEXR.File(str(path), separate_channels=True) as exr:
            chans = exr.channels()
            missing = [n for n in names if n not in chans]
            if not missing:
                return {n: np.array(chans[n].pixels, dtype=np.float64) for n in names}
    except Exception as err:
        raise FrameFileError(f"{path}: not a readable OpenEXR file ({err})") from None
    raise KeyError(missing[0])


# -- layer → picture ------------------------------------------------------------------------


def _codes(v: np.ndarray) -> np.ndarray:
    """Values in [0, 1] (clipped; NaN → 0) → 8-bit codes, round half up."""
    v = np.clip(np.nan_to_num(np.asarray(v, np.float64), nan=0.0), 0.0, 1.0)
    return np.floor(v * 255.0 + 0.5).astype(np.uint8)


def colour_codes(rgb: np.ndarray, exposure: float = 0.0) -> np.ndarray:
    """(h, w, 3) linear colour → sRGB codes, exactly as the beauty preview."""
    from ..engine.preview import to_8bit

    return to_8bit(rgb, exposure)


def normal_codes(n: np.ndarray) -> np.ndarray:
    """(h, w, 3) normals → codes of 0.5 + 0.5·N."""
    return _codes(0.5 + 0.5 * np.asarray(n, np.float64))


def depth_codes(z: np.ndarray, hits: np.ndarray) -> tuple[np.ndarray, dict]:
    """(h, w) distances and hit counts → (h, w, 3) grey codes and {"near", "far"} (None when
    nothing was hit)."""
    z = np.asarray(z, np.float64)
    hit = (np.asarray(hits) > 0) & np.isfinite(z)
    grey = np.zeros(z.shape)
    scale = {"near": None, "far": None}
    if hit.any():
        near, far = float(z[hit].min()), float(z[hit].max())
        span = far - near
        grey[hit] = (far - z[hit]) / span if span > 0 else 1.0
        scale = {"near": near, "far": far}
    return np.repeat(_codes(grey)[..., None], 3, axis=-1), scale


def variance_codes(var: np.ndarray, spp: np.ndarray) -> tuple[np.ndarray, dict]:
    """(h, w, 3) per-sample variances and (h, w) sample counts → (h, w, 3) grey codes and
    {"white": the standard error shown white (None when no pixel has 2 samples)}."""
    var = np.asarray(var, np.float64)
    spp = np.asarray(spp, np.float64)
    ok = spp >= 2
    lum = var @ np.asarray(REC709)
    se = np.zeros(spp.shape)
    se[ok] = np.sqrt(np.maximum(lum[ok], 0.0) / spp[ok])
    grey = np.zeros(spp.shape)
    white = None
    if ok.any():
        white = float(np.percentile(se[ok], VARIANCE_PERCENTILE))
        if white > 0:
            grey = se / white
    return np.repeat(_codes(grey)[..., None], 3, axis=-1), {"white": white}


def _stack(ch, names):
    return np.stack([ch[n] for n in names], axis=-1)


def layer_linear(path, layer: str, layers: list[str]):
    """A colour layer's (h, w, 3) linear values. NoSuchLayer when the file lacks it."""
    if layer not in layers or not is_colour(layer):
        raise NoSuchLayer(layer, layers)
    names = ("R", "G", "B") if layer == "beauty" else tuple(f"{layer}.{c}" for c in "RGB")
    try:
        return _stack(read_channels(path, names), names)
    except KeyError:  # rewritten without it since its header was read
        raise NoSuchLayer(layer, layers) from None


def layer_codes(path, layer: str, layers: list[str], exposure: float = 0.0,
                width: int | None = None) -> np.ndarray:
    """The (h, w, 3) uint8 picture of one layer of a frame file (mappings: module docstring),
    shrunk to `width` when given and narrower than the frame: colour layers in linear light
    before the sRGB curve, data layers after their mapping (`box_downscale` both).
    NoSuchLayer when the file lacks it; FrameFileError when it cannot be read."""
    if layer not in layers:
        raise NoSuchLayer(layer, layers)
    if is_colour(layer):
        rgb = layer_linear(path, layer, layers)
        return colour_codes(rgb if width is None else box_downscale(rgb, width), exposure)
    codes = _data_codes(path, layer, layers)
    if width is None or codes.shape[1] <= width:
        return codes
    return np.floor(box_downscale(codes.astype(np.float64), width) + 0.5).astype(np.uint8)


def _data_codes(path, layer: str, layers: list[str]) -> np.ndarray:
    want = {"normal": ("N.X", "N.Y", "N.Z"), "depth": ("Z", "hits"),
            "variance": ("var.R", "var.G", "var.B", "spp")}[layer]
    try:
        ch = read_channels(path, want)
    except KeyError:
        raise NoSuchLayer(layer, layers) from None
    if layer == "normal":
        return normal_codes(_stack(ch, want))
    if layer == "depth":
        return depth_codes(ch["Z"], ch["hits"])[0]
    return variance_codes(_stack(ch, want[:3]), ch["spp"])[0]


def box_downscale(rgb: np.ndarray, width: int) -> np.ndarray:
    """(h, w, 3) linear values → (h', width, 3), each output pixel the area-weighted mean of the
    input pixels it covers (no upscaling: narrower images are returned as they are)."""
    from PIL import Image

    h, w = rgb.shape[:2]
    if w <= width:
        return np.asarray(rgb, np.float64)
    th = max(1, round(h * width / w))
    planes = [np.asarray(Image.fromarray(np.ascontiguousarray(rgb[..., c], np.float32), "F")
                         .resize((width, th), Image.BOX), np.float64) for c in range(3)]
    return np.stack(planes, axis=-1)


def png_bytes(codes: np.ndarray) -> bytes:
    from PIL import Image

    buf = io.BytesIO()
    Image.fromarray(codes).save(buf, format="PNG")
    return buf.getvalue()


def thumb_bytes(path, layers: list[str], exposure: float = 0.0) -> bytes:
    """A small JPEG of the frame's default layer: downscaled in linear light (`box_downscale`)
    to THUMB_WIDTH, then tone-mapped as the preview."""
    from PIL import Image

    rgb = layer_linear(path, default_layer(layers), layers)
    small = colour_codes(box_downscale(rgb, THUMB_WIDTH), exposure)
    buf = io.BytesIO()
    Image.fromarray(small).save(buf, format="JPEG", quality=THUMB_QUALITY)
    return buf.getvalue()


# -- pictures kept on disk ------------------------------------------------------------------

CACHE_FOLDER = ".previews"  # inside the frames folder, beside the head's PNG previews


def cached_picture(exr: Path, what: str, ext: str, make) -> bytes:
    """The bytes of a picture made from the frame file `exr`, kept in `<frames>/.previews/` under
    a name holding the file's mtime and size (`<stem>.<what>.<mtime_ns>-<size>.<ext>`), so a
    rewritten frame makes new ones; older pictures of the same frame are removed when a new one
    is made. `what` names the picture (layer or thumb, and exposure; a safe file-name part). The
    frame file is only read. When the folder cannot be written, the picture is made, not kept."""
    st = exr.stat()
    folder = exr.parent / CACHE_FOLDER
    stem = exr.name[:-len(".exr")] if exr.name.endswith(".exr") else exr.name
    key = f"{st.st_mtime_ns}-{st.st_size}"
    target = folder / f"{stem}.{what}.{key}.{ext}"
    try:
        return target.read_bytes()
    except OSError:
        pass
    data = make()
    try:
        folder.mkdir(exist_ok=True)
        tmp = folder / f".{target.name}.{threading.get_ident()}.tmp"
        tmp.write_bytes(data)
        tmp.replace(target)  # atomic within the folder: readers see all of it or none
        for old in folder.glob(f"{stem}.*"):
            if f".{key}." not in old.name:
                old.unlink(missing_ok=True)  # made from an older version of this frame
    except OSError:
        pass  # a read-only frames folder: served, not kept
    return data
