"""ID mattes (engine/mattes.py, docs/shot-file.md `[output] id_mattes`) against the open ID-matte
convention for EXR (Psyop's Cryptomatte specification, version 1.1.0, 2015: "the
specification" below), the MurmurHash3 algorithm and closed-form geometry.

* Ids: MurmurHash3_x86_32 (Austin Appleby's published algorithm) checked against published test
  vectors and against a second implementation written here from the algorithm; the float32
  conversion as the specification's example code does it; the specification's own manifest
  examples reproduced.
* The frame file read back with the OpenEXR library: the header entries and the JSON manifest
  the specification names, the ranked (id, coverage) channels, and the coverages of a pixel
  adding up to its A.
* A sphere's matte against its projected area (the disc a sphere on the optical axis projects
  to), and a second sphere's against an independent ray-sphere quadrature in numpy.
* The kernel's slots against the slow reference beside it, merging against its reference.
"""

from __future__ import annotations

import json
import math
import struct

import numpy as np
import pytest

from .scenes import load, shot_text

MATTES = '\n[output]\nid_mattes = ["object", "material"]\n'


# --------------------------------------------------------------------------- ids


def _murmur_independent(data: bytes, seed: int) -> int:
    """MurmurHash3_x86_32 written again from the published algorithm (body of 4-byte little-endian
    blocks, tail, length, final mix), in numpy uint32 arithmetic that wraps by itself."""
    u = np.uint32
    with np.errstate(over="ignore"):
        h = u(seed)
        n = len(data) // 4
        blocks = np.frombuffer(data[:4 * n], dtype="<u4")

        def rotl(x, r):
            return u((x << u(r)) | (x >> u(32 - r)))

        for k in blocks:
            k = u(k) * u(0xCC9E2D51)
            k = rotl(k, 15) * u(0x1B873593)
            h = rotl(h ^ k, 13) * u(5) + u(0xE6546B64)
        k = u(0)
        for i, byte in enumerate(data[4 * n:]):
            k ^= u(byte) << u(8 * i)
        if len(data) % 4:
            h ^= rotl(k * u(0xCC9E2D51), 15) * u(0x1B873593)
        h ^= u(len(data) & 0xFFFFFFFF)
        h ^= h >> u(16)
        h *= u(0x85EBCA6B)
        h ^= h >> u(13)
        h *= u(0xC2B2AE35)
        h ^= h >> u(16)
    return int(h)


# Published MurmurHash3_x86_32 verification values (the SMHasher author's algorithm; these are the
# widely quoted test vectors, from memory): (bytes, seed, hash).
VECTORS = [
    (b"", 0, 0x00000000),
    (b"", 1, 0x514E28B7),
    (b"", 0xFFFFFFFF, 0x81F16F39),
    (b"\x00\x00\x00\x00", 0, 0x2362F9DE),
    (b"aaaa", 0x9747B28C, 0x5A97808A),
    (b"Hello, world!", 0x9747B28C, 0x24884CBA),
    (b"The quick brown fox jumps over the lazy dog", 0x9747B28C, 0x2FA826CD),
]


@pytest.mark.parametrize("data, seed, expected", VECTORS)
def test_murmur3_matches_published_vectors(data, seed, expected):
    from lampyr.engine.mattes import murmur3_32

    assert murmur3_32(data, seed) == expected
    assert _murmur_independent(data, seed) == expected  # the second implementation too


def test_murmur3_matches_an_independent_implementation():
    from lampyr.engine.mattes import murmur3_32

    rng = np.random.default_rng(7)
    for length in range(0, 41):  # every tail length, several block counts
        for _ in range(5):
            data = rng.integers(0, 256, length, dtype=np.uint8).tobytes()
            seed = int(rng.integers(0, 2**32))
            assert murmur3_32(data, seed) == _murmur_independent(data, seed), (data, seed)


def test_manifest_values_reproduce_the_specification_examples():
    # the specification, "Metadata": manifest = {"bunny":"13851a76", "default":"42c9679f"} and
    # {"bunny_porcelain_mat":"b24b26d4"}
    from lampyr.engine.mattes import name_hex

    assert name_hex("bunny") == "13851a76"
    assert name_hex("default") == "42c9679f"
    assert name_hex("bunny_porcelain_mat") == "b24b26d4"


def _spec_float(name: str) -> float:
    """The specification's Python example, "Example code": the hash's exponent clamped to [1, 254],
    mantissa kept, the sign applied to the float built from exponent and mantissa."""
    h = _murmur_independent(name.encode("utf-8"), 0)
    mantissa = h & ((1 << 23) - 1)
    exp = min(max((h >> 23) & 255, 1), 254)
    value = struct.unpack("<f", struct.pack("<I", (exp << 23) | mantissa))[0]
    return -value if h >> 31 else value


def _names_with_exponent(exponent: int, count: int) -> list[str]:
    out, i = [], 0
    while len(out) < count:
        name = f"probe{i}"
        if (_murmur_independent(name.encode(), 0) >> 23) & 255 == exponent:
            out.append(name)
        i += 1
    return out


def test_ids_convert_to_float32_as_the_specification_says():
    from lampyr.engine.mattes import name_hex, name_id

    names = [f"object {i}" for i in range(2000)] + ["", "ä-ü ß", "node3", "(glTF default)"]
    names += _names_with_exponent(0, 3) + _names_with_exponent(255, 3)  # the clamped ends
    for name in names:
        value = name_id(name)
        assert value == _spec_float(name), name
        # a normal, finite, non-zero float32 (the specification: no NaN, inf or denormals)
        f32 = np.float32(value)
        assert float(f32) == value and np.isfinite(f32) and abs(f32) >= np.finfo(np.float32).tiny
        # the manifest's hex digits are the float's bits ("Manifest": decoded with struct)
        assert struct.unpack(">f", bytes.fromhex(name_hex(name)))[0] == value
    for name in _names_with_exponent(0, 3):
        assert (int(name_hex(name), 16) >> 23) & 255 == 1
    for name in _names_with_exponent(255, 3):
        assert (int(name_hex(name), 16) >> 23) & 255 == 254


# --------------------------------------------------------------------------- slots and merging


def _random_slots(rng, shape, pool, slots=8):
    """(ids, cov) with distinct ids per pixel from `pool`, ranked as a merge leaves them."""
    from lampyr.engine.mattes import rank

    ids = np.zeros(shape + (slots,))
    cov = np.zeros_like(ids)
    for idx in np.ndindex(*shape):
        k = int(rng.integers(0, slots + 1))
        ids[idx][:k] = rng.choice(pool, k, replace=False)
        cov[idx][:k] = rng.integers(1, 20, k)
    return rank(ids, cov, slots)


def test_merge_matches_the_reference_and_ignores_order_without_truncation():
    from lampyr.engine.mattes import merge_slots, reference_merge

    rng = np.random.default_rng(3)
    pool = np.array([-3.5, -1.25, 0.5, 1.0, 2.0, 3.0, 7.0, 11.0, 13.0, 17.0, 19.0, 23.0])
    a = _random_slots(rng, (6, 5), pool)
    b = _random_slots(rng, (6, 5), pool)
    ids, cov = merge_slots(*a, *b)
    ids2, cov2 = merge_slots(*b, *a)
    for idx in np.ndindex(6, 5):
        want = reference_merge(zip(a[0][idx], a[1][idx]), zip(b[0][idx], b[1][idx]))
        got = [(i, c) for i, c in zip(ids[idx], cov[idx]) if c > 0]
        assert got == want, idx
        union = {i for i in np.concatenate([a[0][idx], b[0][idx]]) if i != 0}
        if len(union) <= 8:  # nothing dropped: the same set and sums either way
            assert np.array_equal(ids[idx], ids2[idx]) and np.array_equal(cov[idx], cov2[idx])
            assert cov[idx].sum() == a[1][idx].sum() + b[1][idx].sum()


def test_film_bytes_carry_the_slots_exactly(tmp_path):
    from lampyr.engine.film import Film, from_bytes, merge, to_bytes
    from lampyr.engine.mattes import name_id

    rng = np.random.default_rng(5)
    pool = np.array([name_id(f"n{i}") for i in range(12)])
    film = Film.zeros(3, 4, (), ("object", "material"))
    film.n[:] = 30.0
    ids, cov = _random_slots(rng, (3, 4, 2), pool)
    film.matte_ids[:] = ids
    film.matte_cov[:] = cov
    for bits in (32, 64):  # ids are float32 values and counts below 2^24: exact either way
        back = from_bytes(to_bytes(film, bits=bits))
        assert back.matte_kinds == ("object", "material")
        assert np.array_equal(back.matte_ids, film.matte_ids)
        assert np.array_equal(back.matte_cov, film.matte_cov)
    # 21 values per pixel (format 4: the odd half's count and sum among them), 2 kinds × 8 slots ×
    # (id, coverage) more (docs/design.md, film bytes)
    assert len(to_bytes(film, bits=32)) == 25 + (1 + 6) + (1 + 8) + 12 * (21 + 32) * 4 + 4
    doubled = merge(film, film)
    assert np.array_equal(doubled.matte_ids, film.matte_ids)
    assert np.array_equal(doubled.matte_cov, 2 * film.matte_cov)
    with pytest.raises(Exception, match="ID mattes"):
        merge(film, Film.zeros(3, 4, (), ("object",)))


# --------------------------------------------------------------------------- the kernel


SPECKS = """
[environment]
color = [0.2, 0.2, 0.2]
[[material]]
name = "m0"
type = "diffuse"
[[material]]
name = "m1"
type = "plastic"
[[material]]
name = "m2"
type = "metal"
roughness = 0.3
"""


def _specks(n=5, r=0.12, step=0.3, z=-6.0):
    """n × n small spheres: from 4 × 3 px at fov 30°, several fall inside each pixel."""
    out = []
    for i in range(n):
        for j in range(n):
            x, y = (i - (n - 1) / 2) * step, (j - (n - 1) / 2) * step
            out.append(f'[[object]]\nname = "s{i}_{j}"\nmaterial = "m{(i + j) % 3}"\n'
                       f'sphere = {{ center = [{x}, {y}, {z}], radius = {r} }}\n')
    return "".join(out)


def test_kernel_slots_match_the_reference_sample_by_sample(tmp_path):
    from lampyr.engine.mattes import MATTE_SLOTS, reference_coverage
    from lampyr.engine.render import FrameRenderer, Tile

    count = 48
    shot = load(tmp_path, shot_text(SPECKS + _specks() + MATTES, width=4, height=3, samples=count,
                                    camera="position = [0, 0, 0]\ntarget = [0, 0, -1]\nfov = 30"))
    r = FrameRenderer(shot, 1)
    tile = Tile(0, 0, 4, 3)
    whole = r.render(tile, 0, count)
    singles = [r.render(tile, s, 1) for s in range(count)]
    truncated = 0
    for ty in range(3):
        for tx in range(4):
            for m in range(2):
                seen = []
                for f in singles:
                    if f.n[ty, tx] == 0:
                        continue  # a dropped sample counts nowhere
                    k = f.matte_cov[ty, tx, m] > 0
                    assert k.sum() <= 1 and f.matte_cov[ty, tx, m][k].sum() == f.alpha_sum[ty, tx]
                    seen.append(float(f.matte_ids[ty, tx, m][k][0]) if k.any() else 0.0)
                ids, cov = reference_coverage(seen, MATTE_SLOTS)
                assert np.array_equal(whole.matte_ids[ty, tx, m], ids), (ty, tx, m)
                assert np.array_equal(whole.matte_cov[ty, tx, m], cov), (ty, tx, m)
                distinct = len({i for i in seen if i})
                truncated += distinct > MATTE_SLOTS
                if distinct <= MATTE_SLOTS:  # nothing dropped: the coverages add up to alpha
                    assert cov.sum() == whole.alpha_sum[ty, tx]
    assert truncated > 0  # the scene does exercise a pixel that sees more ids than slots


# --------------------------------------------------------------------------- the frame file


TWO = """
[environment]
color = [0.3, 0.3, 0.3]
[[material]]
name = "chalk"
type = "diffuse"
[[material]]
name = "brass"
type = "metal"
color = [0.9, 0.7, 0.3]
roughness = 0.2
[[object]]
name = "centre ball"
material = "chalk"
sphere = { center = [0.0, 0.0, -5.0], radius = 1.0 }
[[object]]
name = "side ball"
material = "brass"
sphere = { center = [1.9, 0.9, -6.0], radius = 0.7 }
"""
FOV = 40.0
W, H = 48, 36


def _two(tmp_path, samples=64):
    return load(tmp_path, shot_text(TWO + MATTES, width=W, height=H, samples=samples,
                                    camera=f"position = [0, 0, 0]\ntarget = [0, 0, -1]\nfov = {FOV}"))


def _read_exr(path):
    import OpenEXR

    with OpenEXR.File(str(path), separate_channels=True) as f:
        header = dict(f.header())
        chans = {k: np.array(v.pixels) for k, v in f.channels().items()}
    return header, chans


def _rebuild(header, chans, layer):
    """{id bits: (h, w) coverage} of a layer, from its ranked channels as the specification lays
    them out ("Channel contents": rank 2i in <layer>0i.r/.g, rank 2i+1 in .b/.a)."""
    out = {}
    i = 0
    while f"{layer}{i:02d}.R" in chans:
        for cid, ccov in (("R", "G"), ("B", "A")):
            ids = chans[f"{layer}{i:02d}.{cid}"].astype(np.float32)
            cov = chans[f"{layer}{i:02d}.{ccov}"].astype(np.float64)
            for bits in np.unique(ids.view(np.uint32)):
                if bits == 0:
                    continue
                out.setdefault(int(bits), np.zeros(ids.shape))
                out[int(bits)] += np.where(ids.view(np.uint32) == bits, cov, 0.0)
        i += 1
    return out, i


def test_frame_file_follows_the_convention_and_coverage_adds_up_to_alpha(tmp_path):
    from lampyr.engine.exr import write_frame
    from lampyr.engine.mattes import manifest
    from lampyr.engine.render import render_frame

    shot = _two(tmp_path, samples=16)
    film = render_frame(shot, 1)
    path = tmp_path / "two.0001.exr"
    write_frame(path, film, {"frame": 1}, manifest=manifest(shot))
    header, chans = _read_exr(path)

    names = {"object": {"centre ball", "side ball"}, "material": {"chalk", "brass"}}
    layers = {}
    for key, value in header.items():
        if key.startswith("cryptomatte/") and key.endswith("/name"):
            layers[str(value)] = key[len("cryptomatte/"):-len("/name")]
    assert set(layers) == {"matte_object", "matte_material"}
    for layer, key in layers.items():
        assert len(key) <= 7  # the specification: a (maximum) 7-character key
        assert header[f"cryptomatte/{key}/hash"] == "MurmurHash3_32"
        assert header[f"cryptomatte/{key}/conversion"] == "uint32_to_float32"
        table = json.loads(header[f"cryptomatte/{key}/manifest"])
        kind = layer[len("matte_"):]
        assert set(table) == names[kind]
        for name, hexid in table.items():
            assert len(hexid) == 8 and _spec_float(name) == struct.unpack(">f", bytes.fromhex(hexid))[0]
        cover, sets = _rebuild(header, chans, layer)
        assert sets == 3  # 6 ranks, the specification's suggested default
        assert {f"{b:08x}" for b in cover} <= set(table.values())  # every id is in the manifest
        # the coverages of a pixel add up to its A: each of at most 3 float32 values carries a
        # relative rounding of 2^-24 (IEEE 754 binary32), A one more
        total = sum(cover.values())
        np.testing.assert_allclose(total, chans["A"], rtol=0, atol=4 * 2.0**-24)
        assert chans["A"].max() == 1.0 and chans["A"].min() == 0.0  # both balls and sky in view


def _disc_fraction(r, d, fov, aspect):
    """Fraction of the image a sphere of radius r at distance d on the optical axis covers: its
    silhouette is the cone of half-angle asin(r/d), a disc of radius tan(asin(r/d)) on the image
    plane at distance 1, whose height is 2 tan(fov/2)."""
    half = math.tan(math.radians(fov) / 2)
    rho = math.tan(math.asin(r / d))
    return math.pi * rho * rho / (2 * half * 2 * half * aspect)


def _quadrature_fraction(center, r, fov, aspect, n=1200):
    """The same fraction for any sphere by a fine grid of pinhole rays and the ray-sphere test
    |o + t·d - c|² = r² having a real root with t > 0 (numpy, independent of the engine)."""
    half = math.tan(math.radians(fov) / 2)
    v = (np.arange(n) + 0.5) / n * 2 - 1
    x, y = np.meshgrid(v * half * aspect, v * half)
    d = np.stack([x, y, -np.ones_like(x)], -1)
    d /= np.linalg.norm(d, axis=-1, keepdims=True)
    c = np.asarray(center, float)
    b = d @ c
    disc = b * b - (c @ c - r * r)
    return float(np.mean((disc >= 0) & (b > 0)))


def test_sphere_mattes_match_their_projected_areas(tmp_path):
    from lampyr.engine.mattes import name_id
    from lampyr.engine.render import render_frame

    spp = 64
    film = render_frame(_two(tmp_path, samples=spp), 1)
    aspect = W / H
    checks = {
        "centre ball": _disc_fraction(1.0, 5.0, FOV, aspect),
        "side ball": _quadrature_fraction((1.9, 0.9, -6.0), 0.7, FOV, aspect),
    }
    # the closed form and the quadrature agree on the centred ball (the grid's error is below
    # its edge's share of cells, about perimeter / n)
    quad = _quadrature_fraction((0.0, 0.0, -5.0), 1.0, FOV, aspect)
    assert abs(quad - checks["centre ball"]) < 2e-3
    for kind, names in (("object", ("centre ball", "side ball")), ("material", ("chalk", "brass"))):
        for name, want in zip(names, checks.values()):
            c = film.matte_coverage(kind, name_id(name))
            # each pixel's coverage is a mean of spp Bernoulli draws (jittered positions in the
            # pixel, independent sampler): its variance c(1 - c)/spp, summed over pixels
            se = math.sqrt(float(np.sum(c * (1 - c))) / spp) / (W * H)
            got = float(c.mean())
            assert abs(got - want) < 5 * se, (kind, name, got, want, se)


def test_read_frame_rebuilds_the_ranks_and_refine_resumes_from_them(tmp_path):
    from lampyr.engine.exr import read_frame, write_frame
    from lampyr.engine.mattes import MATTE_RANKS, manifest, rank
    from lampyr.engine.render import render_frame
    from lampyr.scheduler.refine_file import refine_frame_file

    shot = _two(tmp_path, samples=8)
    film = render_frame(shot, 1, 0, 4, tile_size=16)
    path = tmp_path / "two.0001.exr"
    write_frame(path, film, {"frame": 1, "samples": 4}, manifest=manifest(shot))
    back, attrs = read_frame(path)
    assert back.matte_kinds == ("object", "material")
    ids, cov = rank(film.matte_ids, film.matte_cov, MATTE_RANKS)
    assert np.array_equal(back.matte_ids[..., :MATTE_RANKS], ids)
    # coverage is stored as a float32 fraction of n: back to float32 rounding
    np.testing.assert_allclose(back.matte_cov[..., :MATTE_RANKS], cov, rtol=2.0**-23, atol=0)
    assert not back.matte_cov[..., MATTE_RANKS:].any()

    refine_frame_file(path, shot.path, 8, tile_size=16)
    refined, _ = read_frame(path)
    whole = render_frame(shot, 1, 0, 8, tile_size=16)
    ids, cov = rank(whole.matte_ids, whole.matte_cov, MATTE_RANKS)
    assert np.array_equal(refined.matte_ids[..., :MATTE_RANKS], ids)
    np.testing.assert_allclose(refined.matte_cov[..., :MATTE_RANKS], cov, rtol=1e-6, atol=0)
    header, _ = _read_exr(path)
    assert any(k.endswith("/manifest") and "centre ball" in str(v) for k, v in header.items())


def test_names_of_rendered_ids_are_in_the_manifest_for_a_scene_file():
    # the demo: a glTF scene with named nodes, a skinned (deforming) banner and file materials
    from dataclasses import replace
    from pathlib import Path

    from lampyr.engine.compiler import compile_geometry
    from lampyr.engine.mattes import instance_ids, manifest, material_ids, name_id
    from lampyr.engine.shot import load_shot

    demo = Path(__file__).resolve().parents[2] / "examples" / "courtyard" / "courtyard.toml"
    shot = replace(load_shot(demo), id_mattes=("object", "material"))
    geom = compile_geometry(shot)
    names = manifest(shot)
    assert {name_id(n) for n in names["object"]} >= set(instance_ids(geom))
    assert {name_id(n) for n in names["material"]} >= set(material_ids(geom)) - {0.0}
    assert "banner" in names["object"] and geom.deforming  # the skinned node keeps its name


# --------------------------------------------------------------------------- bad input


@pytest.mark.parametrize("value, found", [
    ('"object"', 'got "object"'),
    ('["objects"]', 'got "objects"'),
    ('["object", "object"]', '"object" twice'),
    ("[1]", "got 1"),
])
def test_bad_id_mattes_give_one_line_naming_the_key(tmp_path, value, found):
    from lampyr.errors import ShotError

    text = shot_text(TWO + f"\n[output]\nid_mattes = {value}\n")
    with pytest.raises(ShotError) as info:
        load(tmp_path, text)
    line = str(info.value)
    assert info.value.key == "output.id_mattes" and found in line and "\n" not in line
    assert "object, material" in line  # what is expected
    assert line.startswith(str(tmp_path / "shot.toml"))


def test_a_bad_id_mattes_value_stops_lampyr_render_with_status_2(tmp_path):
    import subprocess
    import sys

    shot = tmp_path / "bad.toml"
    shot.write_text(shot_text(TWO + '\n[output]\nid_mattes = ["objects"]\n'))
    res = subprocess.run([sys.executable, "-m", "lampyr.cli", "render", str(shot), "--out",
                          str(tmp_path / "out"), "--quiet"], capture_output=True, text=True, timeout=300)
    assert res.returncode == 2, res.stderr
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "output.id_mattes" in lines[0] and "bad.toml" in lines[0], res.stderr
    assert not (tmp_path / "out").exists()


def test_no_mattes_by_default(tmp_path):
    from lampyr.engine.render import render_frame

    shot = load(tmp_path, shot_text(TWO, width=4, height=3, samples=2))
    assert shot.id_mattes == ()
    film = render_frame(shot, 1)
    assert film.matte_kinds == () and film.matte_ids.shape == (3, 4, 0, 8)


def test_the_web_page_does_not_offer_matte_channel_sets_as_colour_layers(tmp_path):
    # webui/layers.py finds colour layers by their .R/.G/.B channels; a matte set has them too,
    # but holds ids and coverages
    from lampyr.engine.exr import write_frame
    from lampyr.engine.render import render_frame
    from lampyr.webui.layers import channel_names, layers_from_channels

    shot = _two(tmp_path, samples=2)
    path = tmp_path / "two.0001.exr"
    write_frame(path, render_frame(shot, 1), {"frame": 1})
    names = channel_names(path)
    assert "matte_object00.R" in names and "matte_material02.A" in names
    offered = layers_from_channels(names)
    assert "beauty" in offered and not any(x.startswith("matte_") for x in offered)


def test_scene_file_nodes_and_materials_without_names_get_stable_ones(tmp_path):
    # glTF 2.0 names are optional; the reader calls an unnamed node node<index> and an unnamed
    # material material<index> (docs/shot-file.md, ID mattes). Two instances of one unit quad,
    # facing the camera at depth 4: each projects to a square of side 1/4 on the image plane at
    # distance 1 (similar triangles), whose height is 2 tan(fov / 2).
    from examples.gltf_builder import GltfBuilder
    from lampyr.engine.mattes import manifest, name_id
    from lampyr.engine.render import render_frame

    from .gltf_files import QUAD_FACES, QUAD_NORMALS, QUAD_POSITIONS, QUAD_UVS

    b = GltfBuilder()
    mat = b.add_material(base_color=[0.5, 0.5, 0.5, 1.0])
    mesh = b.add_mesh([b.primitive(QUAD_POSITIONS, QUAD_NORMALS, QUAD_UVS, indices=QUAD_FACES, material=mat)])
    b.add_node(mesh=mesh, translation=[-1.5, -0.5, -4.0])
    b.add_node("right", mesh=mesh, translation=[0.5, -0.5, -4.0])
    b.save(tmp_path / "quads.gltf")
    spp = 32
    shot = load(tmp_path, 'scene = "quads.gltf"\n' + shot_text(
        MATTES, width=W, height=H, samples=spp, camera=f"position = [0, 0, 0]\ntarget = [0, 0, -1]\nfov = {FOV}"))
    names = manifest(shot)
    assert names["object"] == ["node0", "right"] and "material0" in names["material"]
    film = render_frame(shot, 1)
    half = math.tan(math.radians(FOV) / 2)
    want = (1 / 4) ** 2 / (2 * half * 2 * half * W / H)
    for name in ("node0", "right"):
        c = film.matte_coverage("object", name_id(name))
        se = math.sqrt(float(np.sum(c * (1 - c))) / spp) / (W * H)
        assert abs(float(c.mean()) - want) < 5 * se, (name, float(c.mean()), want)
    both = film.matte_coverage("material", name_id("material0"))
    np.testing.assert_allclose(both * film.n, film.alpha_sum, rtol=1e-12)  # one material, every hit
    assert film.alpha_sum.any()
