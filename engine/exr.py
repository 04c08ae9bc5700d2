"""Frame files: an OpenEXR image that is also its own checkpoint (docs/design.md, invariant 10).

One scanline part, ZIP compression (lossless; float32 survives bit for bit), per pixel:

  R G B        FLOAT  mean radiance (scene-linear, no exposure or tone curve)
  A            FLOAT  coverage: fraction of samples whose camera ray hit geometry
  spp          UINT   samples in the mean
  var.R/G/B    FLOAT  unbiased sample variance of ONE sample (noise of the mean = var / spp)
  albedo.R/G/B FLOAT  mean first-hit albedo over all samples (misses count 0)
  N.X/Y/Z      FLOAT  mean first-hit normal over the hits, not renormalised (shorter than 1
                      where hits disagree, so that the sum can be rebuilt exactly)
  Z            FLOAT  mean first-hit distance over the hits (OpenEXR's conventional depth
                      channel name, from memory); 0 where nothing was hit
  hits         UINT   samples whose camera ray hit geometry (the count behind N and Z)
  dropped      UINT   NaN / inf samples thrown away
  <layer>.R/G/B FLOAT  optional, one per layer the shot keeps (light-path layers such as
                      diffuse_direct, light groups group_<NAME>): the layer's mean, its sum / spp;
                      the header attribute `lampyr.layers` lists them in order
  matte_<kind>NN.R/G/B/A FLOAT  optional, per ID matte kind the shot keeps (object, material;
                      engine/mattes.py): the open ID-matte convention's ranked pairs, rank 2i's
                      id and coverage in matte_<kind>0i.R/.G, rank 2i + 1's in .B/.A, 6 ranks;
                      ids are float32 hashes of names, coverage the fraction of the pixel's
                      samples whose first hit was that id (the ranks add up to A unless a pixel
                      sees more ids than are kept); the header attribute `lampyr.mattes` lists
                      the kinds, and `cryptomatte/<key>/name`, `hash`, `conversion` and
                      `manifest` (JSON: name -> hex id) describe each layer as the convention asks
  oddhalf.R/G/B FLOAT  the mean of the samples whose sample index is odd (the film's odd half,
                      engine/film.py; docs/denoising.md), 0 where there are none
  oddhalf.spp  UINT   how many samples that mean holds; a file without these two (written before
                      lampyr kept the halves) reads back with every sample in the even half
  denoised.R/G/B FLOAT  optional: the mean through the denoiser (engine/denoise.py), written
                      when a frame is complete; NOT an unbiased estimate, so `read_frame`
                      ignores it (merging and refining never see it); `read_denoised` reads it

Header attributes: every caller attribute as a string named `lampyr.<key>`, plus
`lampyr.format` = "1". Numbers are kept as strings because the bindings store float attributes
as 32-bit and mangle large integers (measured with OpenEXR 3.5: 2**40 reads back as 0).

`read_frame` rebuilds the sums from the means (rgb_sum = mean·n, rgb_sq = var·(n−1) + mean²·n,
...), so a frame is refined by `merge(read_frame(path)[0], new_batches)`.
"""

from __future__ import annotations

import os
import secrets
from contextlib import contextmanager, suppress
from pathlib import Path

import numpy as np
import OpenEXR

from lampyr.errors import FrameFileError

from . import mattes
from .film import Film

FORMAT = "1"
PREFIX = "lampyr."
BEAUTY = ("R", "G", "B")
VARIANCE = ("var.R", "var.G", "var.B")
ALBEDO = ("albedo.R", "albedo.G", "albedo.B")
NORMAL = ("N.X", "N.Y", "N.Z")
FLOAT_CHANNELS = BEAUTY + ("A",) + VARIANCE + ALBEDO + NORMAL + ("Z",)
UINT_CHANNELS = ("spp", "hits", "dropped")
DENOISED = ("denoised.R", "denoised.G", "denoised.B")
ODD = ("oddhalf.R", "oddhalf.G", "oddhalf.B")
ODD_COUNT = "oddhalf.spp"
CHANNELS = FLOAT_CHANNELS + UINT_CHANNELS


@contextmanager
def atomic_target(path):
    """Yield a temporary path beside `path`; when the block succeeds, the temporary file is
    flushed to disk and renamed over `path` (os.replace is atomic within a file system), so a
    reader sees the old file or the new one, never half of one. On failure it is removed.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{secrets.token_hex(6)}.tmp")  # hidden, no .exr suffix
    os.close(os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666))  # umask applies
    try:
        yield tmp
        _fsync(tmp, os.O_RDONLY)
        os.replace(tmp, path)
    except BaseException:
        with suppress(FileNotFoundError):
            tmp.unlink()
        raise
    with suppress(OSError):  # the rename itself: not every platform can fsync a folder
        _fsync(path.parent, os.O_RDONLY)


def _fsync(path: Path, flags: int) -> None:
    fd = os.open(path, flags)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _counts(values: np.ndarray, what: str) -> np.ndarray:
    """float64 counts -> uint32, refusing anything a UINT channel would not hold exactly."""
    ok = np.isfinite(values) & (values >= 0) & (values < 2.0**32) & (values == np.floor(values))
    if not ok.all():
        raise FrameFileError(f"film.{what} holds counts that are not whole numbers in [0, 2^32)")
    return np.ascontiguousarray(values, dtype=np.uint32)


def frame_channels(film: Film) -> dict[str, np.ndarray]:
    """The channels `write_frame` stores: name -> (h, w) float32 or uint32, C-contiguous."""
    planes = {}

    def put(names, values):
        values = values.astype(np.float32)
        for i, name in enumerate(names):
            planes[name] = np.ascontiguousarray(values[..., i])

    put(BEAUTY, film.mean())
    put(VARIANCE, film.variance())
    put(ALBEDO, film.albedo())
    put(NORMAL, film.normal_mean())
    planes["A"] = np.ascontiguousarray(film.alpha(), dtype=np.float32)
    planes["Z"] = np.ascontiguousarray(film.depth(), dtype=np.float32)
    planes["spp"] = _counts(film.n, "n")
    planes["hits"] = _counts(film.hits, "hits")
    planes["dropped"] = _counts(film.dropped, "dropped")
    put(ODD, _mean_of(film.odd_sum, film.odd_n))
    planes[ODD_COUNT] = _counts(film.odd_n, "odd_n")
    for i, name in enumerate(film.layer_names):
        put(layer_channels(name), _mean_of(film.layers[:, :, i], film.n))
    planes.update(mattes.frame_channels(film))
    return planes


def layer_channels(name: str) -> tuple[str, str, str]:
    """The channels of a layer: `<name>.R`, `<name>.G`, `<name>.B`."""
    return (f"{name}.R", f"{name}.G", f"{name}.B")


def _mean_of(total: np.ndarray, n: np.ndarray) -> np.ndarray:
    out = np.zeros_like(total)
    np.divide(total, n[..., None], out=out, where=np.broadcast_to(n[..., None] != 0, out.shape))
    return out


def _attr_text(key, value) -> str:
    if not isinstance(key, str) or not key or key.strip() != key:
        raise ValueError(f"frame attribute names are non-empty strings, got {key!r}")
    if key == "format":
        raise ValueError("frame attribute 'format' is reserved for the file format version")
    if isinstance(value, np.generic):
        value = value.item()
    if not isinstance(value, (str, int, float)):
        raise TypeError(f"frame attribute {key!r}: expected str, int or float, got "
                        f"{type(value).__name__}")
    return value if isinstance(value, str) else repr(value)  # repr: the shortest exact float


def write_frame(path, film: Film, attrs: dict[str, str | int | float],
                denoised: np.ndarray | None = None, manifest: dict | None = None) -> None:
    """Write `film` as the frame file `path`, atomically (see the module docstring).

    attrs: stored as strings under `lampyr.<key>` (shot, frame, samples, render_seconds,
    version, ...); the key `format` is reserved.
    denoised: None, or an (h, w, 3) image stored as the layer denoised.R/G/B (float32).
    manifest: {kind: names} of the film's ID mattes (`mattes.manifest`); a kind it lacks gets
    an empty manifest.
    """
    header = {PREFIX + k: _attr_text(k, v) for k, v in attrs.items()}
    header[PREFIX + "format"] = FORMAT
    header.pop(PREFIX + "layers", None)
    header.pop(PREFIX + "mattes", None)
    if film.layer_names:
        header[PREFIX + "layers"] = ",".join(film.layer_names)
    if film.matte_kinds:
        header[PREFIX + "mattes"] = ",".join(film.matte_kinds)
        for kind in film.matte_kinds:
            header.update(mattes.header_entries(kind, (manifest or {}).get(kind, ())))
    header["compression"] = OpenEXR.ZIP_COMPRESSION
    header["type"] = OpenEXR.scanlineimage
    channels = frame_channels(film)
    if denoised is not None:
        d = np.asarray(denoised, dtype=np.float32)
        if d.shape != film.n.shape + (3,):
            raise ValueError(f"denoised: expected shape {film.n.shape + (3,)}, got {d.shape}")
        for i, name in enumerate(DENOISED):
            channels[name] = np.ascontiguousarray(d[..., i])
    with atomic_target(path) as tmp:
        # the bindings mutate the dicts they are given: pass copies (seen with OpenEXR 3.5)
        OpenEXR.File(dict(header), dict(channels)).write(str(tmp))


def read_denoised(path) -> np.ndarray | None:
    """The frame file's denoised layer as (h, w, 3) float32, or None when it has none.

    FrameFileError when the file is missing or not a readable OpenEXR file.
    """
    path = Path(path)
    if not path.is_file():
        raise FrameFileError(f"{path}: no such frame file")
    try:
        with OpenEXR.File(str(path), separate_channels=True) as exr:
            chans = exr.channels()
            if not all(c in chans for c in DENOISED):
                return None
            rgb = np.stack([np.array(chans[c].pixels, dtype=np.float32) for c in DENOISED], -1)
    except Exception as err:  # the bindings raise RuntimeError or ValueError on damaged files
        raise FrameFileError(f"{path}: not a readable OpenEXR file ({err})") from None
    return rgb


def read_frame(path) -> tuple[Film, dict[str, str]]:
    """Read a frame file back as sums and its attributes (without the `lampyr.` prefix).

    FrameFileError when the file is missing, is not a readable OpenEXR file, is not a lampyr
    frame, lacks a channel, or holds values no render could have produced.
    """
    path = Path(path)
    if not path.is_file():
        raise FrameFileError(f"{path}: no such frame file")
    try:
        with OpenEXR.File(str(path), separate_channels=True) as exr:
            header = dict(exr.header())
            names = str(header.get(PREFIX + "layers", "") or "")
            layer_names = tuple(x for x in names.split(",") if x)
            kinds = tuple(x for x in str(header.get(PREFIX + "mattes", "") or "").split(",") if x)
            wanted = set(CHANNELS) | set(ODD) | {ODD_COUNT}
            wanted |= {c for x in layer_names for c in layer_channels(x)}
            wanted |= {c for k in kinds for pair in mattes.rank_channels(mattes.layer_name(k)) for c in pair}
            planes = {name: (ch.type(), np.array(ch.pixels))  # other channels (denoised) ignored
                      for name, ch in exr.channels().items() if name in wanted}
    except Exception as err:  # the bindings raise RuntimeError or ValueError on damaged files
        raise FrameFileError(f"{path}: not a readable OpenEXR file ({err})") from None

    attrs = {k[len(PREFIX):]: str(v) for k, v in header.items() if k.startswith(PREFIX)}
    if "format" not in attrs:
        raise FrameFileError(f"{path}: not a lampyr frame (no {PREFIX}format attribute)")
    if attrs["format"] != FORMAT:
        raise FrameFileError(f"{path}: lampyr frame format {attrs['format']!r}; "
                             f"this lampyr reads format {FORMAT!r}")
    missing = [c for c in CHANNELS + tuple(c for x in layer_names for c in layer_channels(x))
               if c not in planes]
    if missing:
        raise FrameFileError(f"{path}: lampyr frame without channel(s) {', '.join(missing)}")
    shapes = {planes[c][1].shape for c in CHANNELS}
    if len(shapes) != 1 or len(next(iter(shapes))) != 2:
        raise FrameFileError(f"{path}: channels differ in size ({sorted(shapes)})")
    wrong = [c for c in UINT_CHANNELS if planes[c][0] != OpenEXR.UINT]
    if wrong:
        raise FrameFileError(f"{path}: channel(s) {', '.join(wrong)} should be UINT counts")

    def get(names):
        return np.stack([planes[c][1].astype(np.float64) for c in names], axis=-1)

    floats = get(FLOAT_CHANNELS)
    lay = np.stack([get(layer_channels(x)) for x in layer_names], axis=2) if layer_names else None
    if not np.isfinite(floats).all() or (lay is not None and not np.isfinite(lay).all()):
        raise FrameFileError(f"{path}: non-finite values in the frame's float channels")
    n = planes["spp"][1].astype(np.float64)
    hits = planes["hits"][1].astype(np.float64)
    if any(k not in mattes.MATTE_KINDS for k in kinds):
        raise FrameFileError(f"{path}: unknown ID matte kind(s) in {PREFIX}mattes: {', '.join(kinds)}")
    matte_ids, matte_cov = mattes.read_channels(planes, kinds, n, path)
    mean, var = get(BEAUTY), get(VARIANCE)
    n3 = n[..., None]
    odd_n = odd_sum = None  # a file written before the halves: every sample in the even half
    if ODD_COUNT in planes and all(c in planes for c in ODD):
        if planes[ODD_COUNT][0] != OpenEXR.UINT:
            raise FrameFileError(f"{path}: channel {ODD_COUNT} should be UINT counts")
        odd_n = planes[ODD_COUNT][1].astype(np.float64)
        odd_mean = get(ODD)
        if odd_n.shape != n.shape or not np.isfinite(odd_mean).all() or (odd_n > n).any():
            raise FrameFileError(f"{path}: channels {', '.join(ODD + (ODD_COUNT,))} are not an "
                                 "odd half of the frame's samples")
        odd_sum = odd_mean * odd_n[..., None]
    film = Film(
        n=n,
        rgb_sum=mean * n3,
        # the (n − 1) factor undoes the unbiased variance; with n < 2 the variance is 0 anyway
        rgb_sq=np.where(n3 >= 2, var * (n3 - 1.0), 0.0) + mean * mean * n3,
        alpha_sum=planes["A"][1].astype(np.float64) * n,
        albedo_sum=get(ALBEDO) * n3,
        normal_sum=get(NORMAL) * hits[..., None],
        depth_sum=planes["Z"][1].astype(np.float64) * hits,
        hits=hits,
        dropped=planes["dropped"][1].astype(np.float64),
        odd_n=odd_n,
        odd_sum=odd_sum,
        layers=None if lay is None else np.ascontiguousarray(lay * n3[..., None]),
        layer_names=layer_names,
        matte_ids=matte_ids,
        matte_cov=matte_cov,
        matte_kinds=kinds,
    )
    return film, attrs
