"""Per-pixel sample sums of a tile or a frame, their merge, and the statistics read from them.

A `Film` holds sums, never means: merging two batches of samples of the same pixels is an exact
elementwise sum in float64, whatever the order the batches arrive in. The integrator adds into
the arrays directly (they are C-contiguous float64).

Conventions per pixel (n = samples kept, hits = samples whose camera ray hit geometry):
  beauty mean = rgb_sum / n; alpha = alpha_sum / n; albedo = albedo_sum / n (a miss adds 0,
  like the beauty's coverage); normal = normal_sum normalised; depth = depth_sum / hits.
Samples whose radiance was NaN or infinite are not in any sum; `dropped` counts them.

Half-frames (docs/denoising.md, "A noise goal for the denoised frame"): `odd_n` and `odd_sum`
count and sum the kept samples whose sample index is odd. The rest (n - odd_n, rgb_sum - odd_sum)
is the other half. The two halves hold disjoint samples, so their means are independent
estimates of the pixel; samples merged from an older film (which kept no halves) count in the
even half, which keeps the halves disjoint.

Layers (light-path layers and light groups, engine/layers.py): `layers` (h, w, K, 3) holds one
Σ L per name of `layer_names`, merged like every other sum; a layer's mean is its sum / n. A film
of a shot that keeps no layers has K = 0.

ID mattes (engine/mattes.py): `matte_ids` and `matte_cov` (h, w, M, S) hold per pixel and kept
kind (`matte_kinds`: object, material) S slots of (id, Σ coverage); an empty slot has id 0. They
merge by id, not elementwise (`mattes.merge_slots`). A film of a shot that keeps none has M = 0.
"""

from __future__ import annotations

import struct
import zlib
from dataclasses import dataclass, fields

import numpy as np

from lampyr.errors import LampyrError

from .mattes import MATTE_KINDS, MATTE_SLOTS, merge_slots

# Rec. 709 / sRGB luminance weights: ITU-R BT.709-6 item 3.2 (E'Y = 0.2126 R + 0.7152 G +
# 0.0722 B), the same as IEC 61966-2-1's Y row for linear sRGB (from memory).
LUMA_709 = np.array([0.2126, 0.7152, 0.0722])

FORMAT_VERSION = 4  # 2: layers and 32-bit transport; 3: ID mattes; 4: the odd half (odd_n,
# odd_sum); versions 1 (float64, no layers), 2 (no ID mattes) and 3 (no odd half) are still read
_MAGIC = b"LMPFILM\x00"
_HEAD = struct.Struct("<8sHHII")  # magic, version, field count, h, w
_HEAD2 = struct.Struct("<BH")  # version 2: bits per value (32 or 64; 0: MIXED), layer count
_HEAD3 = struct.Struct("<BB")  # version 3: ID matte kind count, slots per kind
_CRC = struct.Struct("<I")


class FilmDataError(LampyrError):
    """Film arrays or film bytes that are not a valid accumulation state."""


@dataclass(frozen=True, eq=False)
class Film:
    """Sums of one image rectangle. Each field is C-contiguous float64, (h, w) or (h, w, 3).

    The dataclass is frozen (fields cannot be rebound) but the arrays are written in place.
    """

    n: np.ndarray  # (h, w) samples kept
    rgb_sum: np.ndarray  # (h, w, 3) Σ L
    rgb_sq: np.ndarray  # (h, w, 3) Σ L² per channel
    alpha_sum: np.ndarray  # (h, w) Σ coverage (1 per sample whose camera ray hit)
    albedo_sum: np.ndarray  # (h, w, 3) Σ first-hit albedo
    normal_sum: np.ndarray  # (h, w, 3) Σ first-hit shading normal, facing the camera
    depth_sum: np.ndarray  # (h, w) Σ first-hit ray distance
    hits: np.ndarray  # (h, w) samples whose camera ray hit geometry
    dropped: np.ndarray  # (h, w) NaN / inf samples thrown away
    odd_n: np.ndarray | None = None  # (h, w) samples kept whose sample index is odd; None: zeros
    odd_sum: np.ndarray | None = None  # (h, w, 3) Σ L of those samples; None: zeros
    layers: np.ndarray | None = None  # (h, w, K, 3) Σ L per layer; None: zeros
    layer_names: tuple = ()  # the K layers' names, in order
    matte_ids: np.ndarray | None = None  # (h, w, M, S) ids (float32 values); None: zeros
    matte_cov: np.ndarray | None = None  # (h, w, M, S) Σ coverage of each id; None: zeros
    matte_kinds: tuple = ()  # the M ID matte kinds (mattes.MATTE_KINDS), in order

    def __post_init__(self):
        if np.ndim(self.n) != 2:
            raise FilmDataError(f"film.n: expected an (h, w) array, got shape {np.shape(self.n)}")
        h, w = self.n.shape
        for name, shape in (("odd_n", (h, w)), ("odd_sum", (h, w, 3))):
            if getattr(self, name) is None:
                object.__setattr__(self, name, np.zeros(shape))
        names = tuple(self.layer_names)
        if len(set(names)) != len(names) or not all(isinstance(x, str) and x for x in names):
            raise FilmDataError(f"film.layer_names: expected distinct names, got {names!r}")
        object.__setattr__(self, "layer_names", names)
        if self.layers is None:
            object.__setattr__(self, "layers", np.zeros((h, w, len(names), 3)))
        lay = self.layers
        if not isinstance(lay, np.ndarray) or lay.dtype != np.float64 or not lay.flags.c_contiguous:
            raise FilmDataError("film.layers: expected a C-contiguous float64 array")
        if lay.shape != (h, w, len(names), 3):
            raise FilmDataError(f"film.layers: expected shape {(h, w, len(names), 3)}, got {lay.shape}")
        kinds = tuple(self.matte_kinds)
        if len(set(kinds)) != len(kinds) or not all(k in MATTE_KINDS for k in kinds):
            raise FilmDataError(f"film.matte_kinds: expected distinct kinds among {MATTE_KINDS}, "
                                f"got {kinds!r}")
        object.__setattr__(self, "matte_kinds", kinds)
        for name in ("matte_ids", "matte_cov"):
            arr = getattr(self, name)
            if arr is None:
                object.__setattr__(self, name, np.zeros((h, w, len(kinds), MATTE_SLOTS)))
                continue
            if not isinstance(arr, np.ndarray) or arr.dtype != np.float64 or not arr.flags.c_contiguous:
                raise FilmDataError(f"film.{name}: expected a C-contiguous float64 array")
            if arr.ndim != 4 or arr.shape[:3] != (h, w, len(kinds)):
                raise FilmDataError(f"film.{name}: expected shape {(h, w, len(kinds), MATTE_SLOTS)}, "
                                    f"got {arr.shape}")
        if self.matte_ids.shape != self.matte_cov.shape:
            raise FilmDataError(f"film.matte_cov: expected the shape of matte_ids {self.matte_ids.shape}, "
                                f"got {self.matte_cov.shape}")
        for name, arr in self._arrays():
            want = (h, w, 3) if name in RGB_FIELDS else (h, w)
            if not isinstance(arr, np.ndarray) or arr.dtype != np.float64:
                raise FilmDataError(f"film.{name}: expected a float64 array, got "
                                    f"{getattr(arr, 'dtype', type(arr).__name__)}")
            if arr.shape != want:
                raise FilmDataError(f"film.{name}: expected shape {want}, got {arr.shape}")
            if not arr.flags.c_contiguous:
                raise FilmDataError(f"film.{name}: expected a C-contiguous array")

    def _arrays(self):
        return ((f, getattr(self, f)) for f in FIELDS)

    @classmethod
    def zeros(cls, h: int, w: int, layer_names=(), matte_kinds=()) -> Film:
        """An empty film of h rows and w columns, with the named layers and ID matte kinds."""
        return cls(**{f: np.zeros((h, w, 3) if f in RGB_FIELDS else (h, w)) for f in FIELDS},
                   layers=np.zeros((h, w, len(layer_names), 3)), layer_names=tuple(layer_names),
                   matte_kinds=tuple(matte_kinds))

    @property
    def shape(self) -> tuple[int, int]:
        """(h, w)."""
        return self.n.shape

    def copy(self) -> Film:
        return Film(**{f: a.copy() for f, a in self._arrays()}, layers=self.layers.copy(),
                    layer_names=self.layer_names, **self._mattes(self.matte_ids.copy(),
                                                                 self.matte_cov.copy()))

    def _mattes(self, ids, cov) -> dict:
        return {"matte_ids": ids, "matte_cov": cov, "matte_kinds": self.matte_kinds}

    def matte_coverage(self, kind: str, ident: float) -> np.ndarray:
        """(h, w) the fraction of each pixel's samples whose first hit had the id `ident`
        (mattes.name_id) in the ID matte `kind`; 0 where n == 0."""
        m = self.matte_kinds.index(kind)
        total = np.where(self.matte_ids[:, :, m] == ident, self.matte_cov[:, :, m], 0.0).sum(-1)
        return _ratio(total, self.n)

    def layer_mean(self, name: str) -> np.ndarray:
        """(h, w, 3) mean of the layer `name` (its sum / n); 0 where n == 0."""
        return _ratio(self.layers[:, :, self.layer_names.index(name)], self.n[..., None])

    def add_into(self, src: Film, y0: int, x0: int) -> None:
        """Add `src` into this film's rows [y0, y0 + src.h), columns [x0, x0 + src.w)."""
        add_into(self, src, y0, x0)

    # -- statistics: (h, w[, 3]) float64 ---------------------------------------------------------

    def mean(self) -> np.ndarray:
        """(h, w, 3) mean radiance; 0 where n == 0."""
        return _ratio(self.rgb_sum, self.n[..., None])

    def variance(self) -> np.ndarray:
        """(h, w, 3) unbiased sample variance of ONE sample, (Σ L² − (Σ L)²/n) / (n − 1).

        Clipped at 0 (rounding can make it slightly negative); 0 where n < 2. The variance of
        the mean is variance() / n.
        """
        n = self.n[..., None]
        out = np.zeros_like(self.rgb_sq)
        ok = np.broadcast_to(n >= 2, out.shape)
        dev = self.rgb_sq - _ratio(self.rgb_sum * self.rgb_sum, n)
        np.divide(dev, n - 1.0, out=out, where=ok)
        return np.maximum(out, 0.0)

    def std_error(self) -> np.ndarray:
        """(h, w, 3) standard error of the mean, sqrt(variance / n); 0 where n < 2."""
        return np.sqrt(_ratio(self.variance(), self.n[..., None]))

    def rel_noise(self, eps: float = 1e-3) -> np.ndarray:
        """(h, w) relative standard error of the mean's Rec. 709 luminance, se_Y / max(Y, eps).

        Only per-channel variances are kept, not covariances, so se_Y is bounded from above by
        Σ_c w_c se_c (Minkowski's inequality; exact when the channels' noise is perfectly
        correlated, as on grey surfaces). inf where n < 2: the noise is not known yet.
        eps: radiance floor of the denominator, so black pixels do not divide by zero.
        """
        se_y = self.std_error() @ LUMA_709
        y = self.mean() @ LUMA_709
        out = se_y / np.maximum(y, eps)
        out[self.n < 2] = np.inf
        return out

    def halves(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(even mean, odd mean, even count, odd count): (h, w, 3), (h, w, 3), (h, w), (h, w).
        The even half is every kept sample not counted in the odd half; a mean is 0 where its
        count is 0."""
        n_even = np.maximum(self.n - self.odd_n, 0.0)
        even = _ratio(self.rgb_sum - self.odd_sum, n_even[..., None])
        return even, _ratio(self.odd_sum, self.odd_n[..., None]), n_even, self.odd_n

    def alpha(self) -> np.ndarray:
        """(h, w) coverage in [0, 1]; 0 where n == 0."""
        return _ratio(self.alpha_sum, self.n)

    def albedo(self) -> np.ndarray:
        """(h, w, 3) mean first-hit albedo over all samples (misses count 0); 0 where n == 0."""
        return _ratio(self.albedo_sum, self.n[..., None])

    def normal(self) -> np.ndarray:
        """(h, w, 3) unit mean first-hit normal; 0 where no sample hit."""
        length = np.linalg.norm(self.normal_sum, axis=-1, keepdims=True)
        return _ratio(self.normal_sum, length)

    def normal_mean(self) -> np.ndarray:
        """(h, w, 3) mean first-hit normal over hits, NOT normalised (shorter than 1 where the
        hits disagree, as on silhouettes); 0 where no sample hit."""
        return _ratio(self.normal_sum, self.hits[..., None])

    def depth(self) -> np.ndarray:
        """(h, w) mean first-hit distance over hits; 0 where no sample hit."""
        return _ratio(self.depth_sum, self.hits)


FIELDS = tuple(f.name for f in fields(Film)
               if f.name not in ("layers", "layer_names", "matte_ids", "matte_cov", "matte_kinds"))
RGB_FIELDS = frozenset({"rgb_sum", "rgb_sq", "albedo_sum", "normal_sum", "odd_sum"})
HALF_FIELDS = ("odd_n", "odd_sum")  # format 4 on; formats 1 to 3 hold the fields before them
_OLD_FIELDS = tuple(f for f in FIELDS if f not in HALF_FIELDS)


def _ratio(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    """num / den broadcast, 0 where den == 0."""
    out = np.zeros(np.broadcast_shapes(num.shape, den.shape))
    np.divide(num, den, out=out, where=np.broadcast_to(den != 0, out.shape))
    return out


def merge(a: Film, b: Film) -> Film:
    """A new film holding the samples of both: the exact elementwise sum (same shapes)."""
    if a.shape != b.shape:
        raise FilmDataError(f"cannot merge films of shapes {a.shape} and {b.shape}")
    _same_layers(a, b)
    ids, cov = a.matte_ids.copy(), a.matte_cov.copy()
    if a.matte_kinds:
        ids, cov = merge_slots(a.matte_ids, a.matte_cov, b.matte_ids, b.matte_cov)
    return Film(**{f: getattr(a, f) + getattr(b, f) for f in FIELDS}, layers=a.layers + b.layers,
                layer_names=a.layer_names, **a._mattes(ids, cov))


def _same_layers(a: Film, b: Film) -> None:
    if a.layer_names != b.layer_names:
        raise FilmDataError(f"cannot merge films with layers {list(a.layer_names)} and "
                            f"{list(b.layer_names)}")
    if a.matte_kinds != b.matte_kinds or a.matte_ids.shape[-1] != b.matte_ids.shape[-1]:
        raise FilmDataError(f"cannot merge films with ID mattes {list(a.matte_kinds)} and "
                            f"{list(b.matte_kinds)}")


def add_into(dst: Film, src: Film, y0: int, x0: int) -> None:
    """Add `src` into `dst` at rows [y0, y0 + h), columns [x0, x0 + w) of `dst`, in place."""
    h, w = src.shape
    H, W = dst.shape
    if y0 < 0 or x0 < 0 or y0 + h > H or x0 + w > W:
        raise FilmDataError(f"a {w}x{h} film at ({x0}, {y0}) does not fit in a {W}x{H} film")
    _same_layers(dst, src)
    for f in FIELDS:
        getattr(dst, f)[y0:y0 + h, x0:x0 + w] += getattr(src, f)
    dst.layers[y0:y0 + h, x0:x0 + w] += src.layers
    if dst.matte_kinds:
        block = (slice(y0, y0 + h), slice(x0, x0 + w))
        ids, cov = merge_slots(dst.matte_ids[block], dst.matte_cov[block], src.matte_ids, src.matte_cov)
        dst.matte_ids[block] = ids
        dst.matte_cov[block] = cov


# -- bytes for transport (Redis) and the head's tile accumulators -------------------------------
#
# Layout (version 4), little-endian: magic "LMPFILM\0", u16 format version, u16 field count,
# u32 h, u32 w, u8 bits per value (32 or 64), u16 layer count K, then K layer names (u8 length,
# UTF-8), u8 ID matte kind count M, u8 slots per kind S, the M kinds' names (u8 length, UTF-8),
# then every field of FIELDS in order, the layers (h, w, K, 3), the matte ids (h, w, M, S) and
# coverages (h, w, M, S) as raw float32 or float64 C-order, then a CRC-32 (zlib.crc32) of
# everything before it. FIELDS ends with the odd half (odd_n, odd_sum), new in version 4: version
# 3 (9 fields, no odd half), version 2 (no M, S, kinds or mattes) and version 1 (no bits, no
# layers, float64) are still read, their samples all in the even half. Ids are float32 values, exact in either width.
#
# Workers send 32 bits (a batch's sums need no more: the head merges in float64, so long merges
# do not lose precision); the counts stay exact up to 2^24 samples of one pixel in one batch.
#
# Version 5 is version 4 with bits = 0 (MIXED), what the head's tile files hold: the radiance
# sums (WIDE: rgb_sum, rgb_sq, odd_sum, the layers) in float64, on which unbiased merging and the
# variance (Σ L² − (Σ L)² / n, a difference of large numbers) rest, the rest in float32: counts
# (n, hits, dropped, odd_n, alpha_sum, matte coverages; integers, exact in float32 below 2^24,
# EXACT_COUNT), the first-hit albedo, normal and depth sums (denoiser guides, rounded to float32
# in the frame file anyway) and the matte ids (float32 values). 120 bytes a pixel instead of 168:
# a 64 × 64 tile file is 491 KB instead of 688 KB, and every batch the head merges rewrites one.
# A film whose counts reach 2^24 is written with 64 bits (version 4) instead.


MIXED = 0  # `bits` of the head's tile files: float64 radiance sums, float32 the rest (version 5)
MIXED_VERSION = 5
WIDE = frozenset({"rgb_sum", "rgb_sq", "odd_sum", "layers"})
COUNTS = ("n", "hits", "dropped", "odd_n", "alpha_sum", "matte_cov")
EXACT_COUNT = 2.0 ** 24  # every integer below it is a float32 (IEEE 754 binary32: 24-bit significand)


def _dtypes(bits: int, stored=FIELDS) -> list:
    """The little-endian dtype of each stored array, in order (fields, layers, ids, coverages)."""
    names = stored + ("layers", "matte_ids", "matte_cov")
    if bits == MIXED:
        return [np.dtype("<f8" if f in WIDE else "<f4") for f in names]
    return [np.dtype("<f4" if bits == 32 else "<f8")] * len(names)


def to_bytes(film: Film, bits: int = 64) -> bytes:
    """The film as bytes: (21 + 3K + 2MS) values per pixel of bits / 8 bytes each (MIXED: the
    WIDE sums of 8, the rest of 4), plus a 25-byte header, the layer and kind names and a 4-byte
    checksum; see the layout above."""
    return b"".join(to_parts(film, bits))


def to_parts(film: Film, bits: int = 64) -> list:
    """`to_bytes` in pieces whose concatenation is its bytes: the header, then each array as a
    buffer (the film's own memory when it is already little-endian and of `bits`, no copy), then
    the checksum. For a writer that hands them to the file whole (`os.writev`): a 64 × 64
    float64 tile is 688 KB, and joining it first was a copy of every byte. The arrays must not
    change until the pieces are written (films are merged into new arrays, never in place)."""
    if bits not in (32, 64, MIXED):
        raise ValueError(f"bits: 32, 64 or MIXED (0), got {bits!r}")
    if bits == MIXED and any(getattr(film, f).size and getattr(film, f).max() >= EXACT_COUNT
                             for f in COUNTS):
        bits = 64  # a count float32 would round
    h, w = film.shape
    version = MIXED_VERSION if bits == MIXED else FORMAT_VERSION
    head = [_HEAD.pack(_MAGIC, version, len(FIELDS), h, w),
            _HEAD2.pack(bits, len(film.layer_names))]
    head += [_name_bytes(name) for name in film.layer_names]
    head.append(_HEAD3.pack(len(film.matte_kinds), film.matte_ids.shape[3]))
    head += [_name_bytes(k) for k in film.matte_kinds]
    parts = [b"".join(head)]
    arrays = [a for _, a in film._arrays()] + [film.layers, film.matte_ids, film.matte_cov]
    for a, dtype in zip(arrays, _dtypes(bits)):
        a = np.ascontiguousarray(a, dtype=dtype)
        if a.size:
            parts.append(memoryview(a).cast("B"))
    crc = 0
    for part in parts:
        crc = zlib.crc32(part, crc)
    parts.append(_CRC.pack(crc))
    return parts


def _name_bytes(name: str) -> bytes:
    raw = name.encode()
    if len(raw) > 255:
        raise FilmDataError(f"film layer name too long: {name[:40]!r}...")
    return bytes([len(raw)]) + raw


def _names(data: bytes, offset: int, count: int, what: str) -> tuple[list[str], int]:
    names = []
    for _ in range(count):
        if offset >= len(data) - _CRC.size:
            raise FilmDataError(f"film bytes: truncated {what} names")
        size = data[offset]
        try:
            names.append(data[offset + 1:offset + 1 + size].decode())
        except UnicodeDecodeError:
            raise FilmDataError(f"film bytes: a {what} name is not UTF-8") from None
        offset += 1 + size
    return names, offset


def from_bytes(data: bytes) -> Film:
    """Rebuild a film written by `to_bytes` (float64 in memory); FilmDataError when the bytes
    are not one."""
    data = bytes(data)
    if len(data) < _HEAD.size + _CRC.size:
        raise FilmDataError(f"film bytes: {len(data)} bytes is too short for a film header")
    magic, version, count, h, w = _HEAD.unpack_from(data)
    if magic != _MAGIC:
        raise FilmDataError("film bytes: not a lampyr film (bad magic)")
    stored = FIELDS if version >= 4 else _OLD_FIELDS
    if version not in (1, 2, 3, FORMAT_VERSION, MIXED_VERSION) or count != len(stored):
        raise FilmDataError(f"film bytes: format version {version} with {count} fields; this "
                            f"lampyr reads versions 1 to 3 with {len(_OLD_FIELDS)} fields and "
                            f"{FORMAT_VERSION} to {MIXED_VERSION} with {len(FIELDS)}")
    (crc,) = _CRC.unpack_from(data, len(data) - _CRC.size)
    if zlib.crc32(memoryview(data)[:-_CRC.size]) != crc:
        raise FilmDataError(f"film bytes: checksum mismatch in a {w}x{h} film (corrupted)")
    offset, bits, names, kinds, slots = _HEAD.size, 64, [], [], MATTE_SLOTS
    if version >= 2:
        if len(data) < offset + _HEAD2.size + _CRC.size:
            raise FilmDataError("film bytes: truncated header")
        bits, k = _HEAD2.unpack_from(data, offset)
        offset += _HEAD2.size
        if bits not in ((MIXED,) if version == MIXED_VERSION else (32, 64)):
            raise FilmDataError(f"film bytes: {bits} bits per value in format version {version};"
                                f" expected {'0' if version == MIXED_VERSION else '32 or 64'}")
        names, offset = _names(data, offset, k, "layer")
    if version >= 3:
        if len(data) < offset + _HEAD3.size + _CRC.size:
            raise FilmDataError("film bytes: truncated header")
        m, slots = _HEAD3.unpack_from(data, offset)
        kinds, offset = _names(data, offset + _HEAD3.size, m, "ID matte kind")
    dtypes = _dtypes(bits, stored)
    sizes = [h * w * (3 if f in RGB_FIELDS else 1) for f in stored] + [h * w * len(names) * 3] \
        + [h * w * len(kinds) * slots] * 2
    want = offset + sum(n * d.itemsize for n, d in zip(sizes, dtypes)) + _CRC.size
    if len(data) != want:
        raise FilmDataError(f"film bytes: a {w}x{h} film takes {want} bytes, got {len(data)} "
                            "(truncated or padded)")
    arrays = {}
    for f, size, dtype in zip(stored + ("layers", "matte_ids", "matte_cov"), sizes, dtypes):
        flat = np.frombuffer(data, dtype=dtype, count=size, offset=offset)
        shape = ((h, w, len(names), 3) if f == "layers" else (h, w, len(kinds), slots)
                 if f.startswith("matte_") else (h, w, 3) if f in RGB_FIELDS else (h, w))
        arrays[f] = flat.astype(np.float64).reshape(shape)
        offset += dtype.itemsize * size
    return Film(**arrays, layer_names=tuple(names), matte_kinds=tuple(kinds))
