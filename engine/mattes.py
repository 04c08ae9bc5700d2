"""ID mattes: per-object and per-material coverage, stored the way the open ID-matte convention
for EXR lays it out (Psyop's Cryptomatte specification, 2015; docs/shot-file.md, `[output]
id_mattes`, says what users get).

Ids. An object or material is known by its name. Its id is the 32-bit MurmurHash3 (x86 variant,
seed 0; Austin Appleby's public-domain algorithm) of the name's UTF-8 bytes, turned into a
float32 by copying the bits with the exponent clamped to [1, 254], so an id is never zero,
denormal, infinite or NaN. Zero means "no id" (an empty slot). The manifest maps each name to
the 8 hexadecimal digits of its id's bits.

Names. Objects: a shot `[[object]]` by its `name` (every part of its mesh file shares it), a
node of the shot's `scene` file by the node's name (an unnamed node is `node<index>`, as the
glTF reader names it). Materials: by name (a shot `[[material]]`, a file's material; an unnamed
glTF material is `material<index>`); triangles with no material are `(glTF default)` in glTF
files and `(grey default)` in others. Equal names share one id, and so one matte.

Per pixel and kind a film keeps MATTE_SLOTS (id, coverage) slots: coverage counts the samples
whose first camera hit (the surface that sets alpha) was that id. Misses count nowhere, so the
coverages of a pixel add up to its `alpha_sum`. The kernel fills slots in the order ids appear;
a sample whose id finds every slot taken by others counts in no slot (truncation: then the
pixel's coverages add up to less than its alpha). Merging adds coverage by id and keeps the
MATTE_SLOTS largest (ties by id), so merging is exact and order-free while a pixel sees at most
MATTE_SLOTS ids; beyond that the smallest are dropped. The frame file keeps the MATTE_RANKS
largest (the convention's suggested depth of 6).
"""

from __future__ import annotations

import json
import struct
from functools import lru_cache

import numpy as np
from numba import njit

MATTE_KINDS = ("object", "material")
KIND_OBJECT = 0  # matte_src values: the id of the first hit's instance ...
KIND_MATERIAL = 1  # ... or of its material row
MATTE_SLOTS = 8  # (id, coverage) pairs per pixel and kind in a film (rule of thumb: few pixels see more)
MATTE_RANKS = 6  # ranks in the frame file: 3 RGBA channel sets of 2 ranks each
LAYER_PREFIX = "matte_"  # the frame file's layer of a kind: matte_object, matte_material
GLTF_DEFAULT = "(glTF default)"
GREY_DEFAULT = "(grey default)"
HASH_NAME = "MurmurHash3_32"  # the convention's metadata values
CONVERSION = "uint32_to_float32"

_M = 0xFFFFFFFF


# ------------------------------------------------------------------ ids from names


def murmur3_32(data: bytes, seed: int = 0) -> int:
    """MurmurHash3_x86_32 of `data` as an unsigned 32-bit integer."""
    c1, c2 = 0xCC9E2D51, 0x1B873593
    h = seed & _M
    n = len(data) // 4
    for (k,) in struct.iter_unpack("<I", data[:4 * n]):
        k = (k * c1) & _M
        k = ((k << 15) | (k >> 17)) & _M
        k = (k * c2) & _M
        h ^= k
        h = ((h << 13) | (h >> 19)) & _M
        h = (h * 5 + 0xE6546B64) & _M
    tail = data[4 * n:]
    if tail:
        k = int.from_bytes(tail, "little")
        k = (k * c1) & _M
        k = ((k << 15) | (k >> 17)) & _M
        k = (k * c2) & _M
        h ^= k
    h ^= len(data)
    h ^= h >> 16
    h = (h * 0x85EBCA6B) & _M
    h ^= h >> 13
    h = (h * 0xC2B2AE35) & _M
    h ^= h >> 16
    return h


def hash_bits(h: int) -> int:
    """The float32 bits of a hash: sign and mantissa kept, exponent clamped to [1, 254]."""
    exponent = min(max((h >> 23) & 0xFF, 1), 254)
    return (h & 0x807FFFFF) | (exponent << 23)


@lru_cache(maxsize=65536)
def name_bits(name: str) -> int:
    return hash_bits(murmur3_32(name.encode("utf-8")))


def name_id(name: str) -> float:
    """The id of a name: a float32 value (as a Python float, exact)."""
    return struct.unpack("<f", struct.pack("<I", name_bits(name)))[0]


def name_hex(name: str) -> str:
    """The manifest's form of a name's id: 8 lowercase hexadecimal digits of its bits."""
    return f"{name_bits(name):08x}"


def layer_name(kind: str) -> str:
    return LAYER_PREFIX + kind


def metadata_key(layer: str) -> str:
    """The key of a layer's header entries (`cryptomatte/<key>/...`): 7 hexadecimal digits of the
    hash of its name, as the convention suggests, so it stays the same from frame to frame."""
    return f"{murmur3_32(layer.encode('utf-8')):08x}"[:7]


def rank_channels(layer: str, ranks: int = MATTE_RANKS) -> list[tuple[str, str]]:
    """(id channel, coverage channel) of each rank: rank 2i in `<layer>0i.R`/`.G`, rank 2i + 1 in
    `.B`/`.A`."""
    out = []
    for r in range(ranks):
        base = f"{layer}{r // 2:02d}."
        out.append((base + "R", base + "G") if r % 2 == 0 else (base + "B", base + "A"))
    return out


def header_entries(kind: str, names) -> dict[str, str]:
    """The frame file's header entries for one kind: its layer's name, hash, conversion and
    manifest (a JSON object name -> hex id)."""
    layer = layer_name(kind)
    key = f"cryptomatte/{metadata_key(layer)}/"
    manifest = {n: name_hex(n) for n in sorted(set(names))}
    return {key + "name": layer, key + "hash": HASH_NAME, key + "conversion": CONVERSION,
            key + "manifest": json.dumps(manifest, ensure_ascii=False, separators=(",", ":"))}


# ------------------------------------------------------------------ what a shot asks for


def matte_plan(shot) -> tuple[str, ...]:
    """The kinds of ID matte the shot keeps, in MATTE_KINDS order."""
    wanted = tuple(getattr(shot, "id_mattes", ()) or ())
    return tuple(k for k in MATTE_KINDS if k in wanted)


def matte_sources(kinds) -> np.ndarray:
    """(M,) int64 for the kernel: KIND_OBJECT or KIND_MATERIAL per kept kind."""
    return np.array([MATTE_KINDS.index(k) for k in kinds], np.int64)


def instance_ids(geometry) -> np.ndarray:
    """(instances,) float64 ids of the instances compile_frame places: the geometry's parts,
    then its deforming meshes (rebuilt per frame, in the same order), at least one entry."""
    names = [p.name for p in geometry.parts]
    scene = geometry.scene
    names += [scene.nodes[node].name for node, _ in geometry.deforming]
    return np.array([name_id(n) for n in names] or [0.0], np.float64)


def material_ids(geometry) -> np.ndarray:
    """(material rows,) float64 ids of the geometry's material rows."""
    names = list(geometry.mat_names)
    names += [""] * (len(geometry.mats) - len(names))
    return np.array([name_id(n) if n else 0.0 for n in names], np.float64)


def manifest(shot, scene=None, files=None) -> dict[str, list[str]]:
    """{kind: names} of every object and material the shot can show, for the frame file's
    header, without building the scene (the head writes it). scene, files: `read_shot_files`'s,
    read here when not given. The names are those `scene_import.assemble` gives its parts and
    material rows."""
    kinds = matte_plan(shot)
    if not kinds:
        return {}
    if files is None:
        from .compiler import read_shot_files

        scene, files = read_shot_files(shot)
    from .scene_import import GLTF_EXTENSIONS, _mesh_nodes
    from pathlib import Path

    objects = [o.name for o in shot.objects]
    materials = [m.name for m in shot.materials]
    for sd, gltf in [(sd, Path(sd.path).suffix.lower() in GLTF_EXTENSIONS) for sd in files.values()] + (
            [(scene, True)] if scene is not None else []):
        materials += [spec.name for spec in sd.materials]
        materials.append(GLTF_DEFAULT if gltf else GREY_DEFAULT)
    if scene is not None:
        objects += [scene.nodes[n].name for n in _mesh_nodes(scene)]
    out = {"object": sorted(set(objects)), "material": sorted(set(materials))}
    return {k: out[k] for k in kinds}


# ------------------------------------------------------------------ accumulating and merging


@njit(cache=True)
def add_coverage(ids, cov, ty, tx, m, idv, w):
    """Add coverage w of id idv to pixel (ty, tx), kind m: into idv's slot, else into the first
    empty one (id 0). False when every slot holds another id (the coverage is dropped)."""
    for s in range(ids.shape[3]):
        cur = ids[ty, tx, m, s]
        if cur == idv:
            cov[ty, tx, m, s] += w
            return True
        if cur == 0.0:
            ids[ty, tx, m, s] = idv
            cov[ty, tx, m, s] = w
            return True
    return False


def reference_coverage(sample_ids, slots: int = MATTE_SLOTS):
    """The slow, readable form of what the kernel keeps for one pixel and kind: `sample_ids`
    lists each kept sample's first-hit id in sample order (0 for a miss). Returns (ids, cov) of
    length `slots`, in the order the ids first appeared, dropping samples of ids that found
    every slot taken."""
    counts: dict[float, float] = {}
    for i in sample_ids:
        if i == 0.0:
            continue
        if i in counts:
            counts[i] += 1.0
        elif len(counts) < slots:
            counts[i] = 1.0
    ids = list(counts) + [0.0] * (slots - len(counts))
    cov = list(counts.values()) + [0.0] * (slots - len(counts))
    return np.array(ids), np.array(cov)


def rank(ids: np.ndarray, cov: np.ndarray, keep: int):
    """(ids, cov) with the last axis ordered by coverage, largest first (equal coverage: smaller
    id first), empty slots (id 0 or no coverage) last as zeros, cut to `keep` entries: a merge
    with nothing."""
    nothing = np.zeros(ids.shape[:-1] + (0,))
    ids, cov = merge_slots(ids, cov, nothing, nothing)
    return np.ascontiguousarray(ids[..., :keep]), np.ascontiguousarray(cov[..., :keep])


def merge_slots(ids_a, cov_a, ids_b, cov_b):
    """The slots of a and b merged: coverage added by id, the largest kept as `rank` orders
    them. Arrays (..., S) float64 (b may have another S); a given id appears at most once in each
    input's last axis. Returns new C-contiguous (ids, cov) of a's shape."""
    shape = ids_a.shape
    out_ids = np.zeros(shape)
    out_cov = np.zeros(shape)
    if ids_a.size:
        rows = ids_a.size // shape[-1]
        sa, sb = (rows, shape[-1]), (rows, ids_b.shape[-1])
        _merge_pixels(np.ascontiguousarray(ids_a, np.float64).reshape(sa),
                      np.ascontiguousarray(cov_a, np.float64).reshape(sa),
                      np.ascontiguousarray(ids_b, np.float64).reshape(sb),
                      np.ascontiguousarray(cov_b, np.float64).reshape(sb),
                      out_ids.reshape(sa), out_cov.reshape(sa))
    return out_ids, out_cov


@njit(cache=True)
def _merge_pixels(ids_a, cov_a, ids_b, cov_b, out_ids, out_cov):
    """merge_slots per row (a pixel and kind): gather a's entries, add b's by id, sort by
    coverage (largest first, then by id), keep the first S."""
    keep = ids_a.shape[1]
    ids = np.empty(keep + ids_b.shape[1])
    cov = np.empty(keep + ids_b.shape[1])
    for p in range(ids_a.shape[0]):
        k = 0
        for s in range(keep):
            if ids_a[p, s] != 0.0 and cov_a[p, s] > 0.0:
                ids[k] = ids_a[p, s]
                cov[k] = cov_a[p, s]
                k += 1
        for s in range(ids_b.shape[1]):
            i = ids_b[p, s]
            c = cov_b[p, s]
            if i == 0.0 or not c > 0.0:
                continue
            q = 0
            while q < k and ids[q] != i:
                q += 1
            if q < k:
                cov[q] += c
            else:
                ids[k] = i
                cov[k] = c
                k += 1
        for q in range(1, k):  # insertion sort: k is at most a few dozen
            ci = ids[q]
            cc = cov[q]
            r = q - 1
            while r >= 0 and (cov[r] < cc or (cov[r] == cc and ids[r] > ci)):
                ids[r + 1] = ids[r]
                cov[r + 1] = cov[r]
                r -= 1
            ids[r + 1] = ci
            cov[r + 1] = cc
        for s in range(min(k, keep)):
            out_ids[p, s] = ids[s]
            out_cov[p, s] = cov[s]


def reference_merge(pairs_a, pairs_b, keep: int = MATTE_SLOTS):
    """The slow, readable form of `merge_slots` for one pixel and kind: lists of (id, coverage)."""
    total: dict[float, float] = {}
    for i, c in list(pairs_a) + list(pairs_b):
        if i != 0.0 and c > 0.0:
            total[i] = total.get(i, 0.0) + c
    best = sorted(total.items(), key=lambda ic: (-ic[1], ic[0]))[:keep]
    return best


# ------------------------------------------------------------------ frame file channels


def frame_channels(film) -> dict[str, np.ndarray]:
    """The frame file's matte channels: per kind and rank, the id (float32 bits as the convention
    stores them) and the coverage normalised by the pixel's samples (so the ranks add up to A)."""
    planes = {}
    h, w = film.n.shape
    for m, kind in enumerate(film.matte_kinds):
        ids = np.zeros((MATTE_RANKS, h, w), np.float32)
        frac = np.zeros((MATTE_RANKS, h, w), np.float32)
        _rank_planes(film.matte_ids, film.matte_cov, film.n, m, ids, frac)
        for r, (cid, ccov) in enumerate(rank_channels(layer_name(kind))):
            planes[cid] = ids[r]
            planes[ccov] = frac[r]
    return planes


@njit(cache=True)
def _rank_planes(ids, cov, n, m, out_ids, out_frac):
    """Per pixel, kind m's slots ranked as `rank` orders them, the first R written as planes
    out_ids[r] (the id) and out_frac[r] (coverage / n; 0 where n is 0)."""
    slots = ids.shape[3]
    pi = np.empty(slots)
    pc = np.empty(slots)
    for y in range(ids.shape[0]):
        for x in range(ids.shape[1]):
            k = 0
            for s in range(slots):
                if ids[y, x, m, s] != 0.0 and cov[y, x, m, s] > 0.0:
                    ci = ids[y, x, m, s]
                    cc = cov[y, x, m, s]
                    r = k - 1
                    while r >= 0 and (pc[r] < cc or (pc[r] == cc and pi[r] > ci)):
                        pi[r + 1] = pi[r]
                        pc[r + 1] = pc[r]
                        r -= 1
                    pi[r + 1] = ci
                    pc[r + 1] = cc
                    k += 1
            scale = 1.0 / n[y, x] if n[y, x] > 0.0 else 0.0
            for r in range(min(k, out_ids.shape[0])):
                out_ids[r, y, x] = pi[r]
                out_frac[r, y, x] = pc[r] * scale


def read_channels(planes: dict, kinds, n: np.ndarray, path) -> tuple[np.ndarray, np.ndarray]:
    """(ids, cov) (h, w, M, MATTE_SLOTS) float64 sums rebuilt from a frame file's matte channels
    (`planes`: name -> (type, array)); the ranks past MATTE_RANKS are empty."""
    from lampyr.errors import FrameFileError

    h, w = n.shape
    ids = np.zeros((h, w, len(kinds), MATTE_SLOTS))
    cov = np.zeros_like(ids)
    for m, kind in enumerate(kinds):
        for r, (cid, ccov) in enumerate(rank_channels(layer_name(kind))):
            if cid not in planes or ccov not in planes:
                raise FrameFileError(f"{path}: lampyr frame without channel(s) {cid}, {ccov} of "
                                     f"its {kind} ID matte")
            i = planes[cid][1].astype(np.float32).astype(np.float64)
            c = planes[ccov][1].astype(np.float64)
            if not (np.isfinite(i).all() and np.isfinite(c).all()):
                raise FrameFileError(f"{path}: non-finite values in the {kind} ID matte")
            ids[:, :, m, r] = np.where(c > 0, i, 0.0)
            cov[:, :, m, r] = np.where(i != 0, c, 0.0) * n
    return ids, cov
