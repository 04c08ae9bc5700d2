"""Every file a shot uses is read when the shot is checked (`check_shot_files`, which `lampyr
render`, `lampyr submit` and the page's upload run before anything is queued), and each bad one
is one line naming the shot file, the key and the asset, with exit status 2 (docs/shot-file.md,
"Errors" and "Files a shot uses"). The cases are the ones an outside fuzz of the shot file found
reaching a worker, a traceback or a crash."""

from __future__ import annotations

import json
import os
import struct
from pathlib import Path

import numpy as np
import OpenEXR
import pytest

from lampyr.engine.compiler import check_shot_files
from lampyr.engine.shot import load_shot
from lampyr.errors import LampyrError

BASE = """name = "t"
frames = 1
[image]
width = 8
height = 6
[sampling]
samples = 2
[camera]
position = [0.0, 1.0, 4.0]
target = [0.0, 0.8, 0.0]
[environment]
color = [0.2, 0.25, 0.3]
"""
TRIANGLE = b"v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n"
MESH_OBJECT = '[[object]]\nname = "m"\nmesh = "a/{name}"\n'
SPHERE = ('[[material]]\nname = "w"\ntype = "diffuse"\n'
          '[[object]]\nname = "b"\nmaterial = "w"\nsphere = { center = [0, 0, 0], radius = 1 }\n')


def exr_bytes(tmp: Path, rgb: np.ndarray) -> bytes:
    path = tmp / "_map.exr"
    header = {"compression": OpenEXR.ZIP_COMPRESSION, "type": OpenEXR.scanlineimage}
    with OpenEXR.File(header, {"RGB": rgb.astype(np.float32)}) as f:
        f.write(str(path))
    data = path.read_bytes()
    path.unlink()
    return data


def write_shot(folder: Path, body: str, files: dict[str, bytes] = {}) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    for rel, data in files.items():
        (folder / rel).parent.mkdir(parents=True, exist_ok=True)
        (folder / rel).write_bytes(data)
    shot = folder / "shot.toml"
    shot.write_text(BASE + body)
    return shot


def check(shot: Path) -> list[str]:
    return check_shot_files(load_shot(shot))


def refused(shot: Path) -> str:
    """The one line a bad shot gives (status 2)."""
    with pytest.raises(LampyrError) as info:
        check(shot)
    err = info.value
    text = str(err)
    assert err.exit_code == 2, text
    assert "\n" not in text and len(text) < 400, text
    assert text.startswith(str(shot)), text  # names the shot file first
    return text


def _mesh_cases(tmp: Path):
    # (id, mesh file name, its bytes, other files, words the line must hold)
    ply_head = b"ply\nformat ascii 1.0\nelement vertex 3\nproperty float x\nproperty float y\n"
    return [
        ("empty obj", "m.obj", b"", {}, ["object[m].mesh", "m.obj", "no faces"]),
        ("garbage obj", "m.obj", bytes(range(256)) * 4, {}, ["object[m].mesh", "m.obj"]),
        ("nan obj", "m.obj", b"v nan 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n", {}, ["m.obj", "NaN"]),
        ("face past the vertices", "m.obj", b"v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 9\n", {}, ["m.obj"]),
        ("only degenerate", "m.obj", b"v 0 0 0\nv 1 0 0\nv 2 0 0\nf 1 2 3\n", {}, ["degenerate"]),
        ("broken ply", "m.ply", ply_head + b"property float z\nelement face 1\nproperty list uchar int "
         b"vertex_indices\nend_header\n0 0\n", {}, ["object[m].mesh", "m.ply"]),
        ("ply header only", "m.ply", ply_head, {}, ["m.ply"]),
        ("broken ascii stl", "m.stl", b"solid x\nfacet normal 0 0 1\nouter loop\nvertex 1 2\n", {}, ["m.stl"]),
        ("truncated binary stl", "m.stl", b"\0" * 80 + struct.pack("<I", 5) + b"\0" * 20, {}, ["m.stl"]),
        ("truncated glb", "m.glb", b"glTF" + struct.pack("<II", 2, 64) + b"\0" * 10, {}, ["m.glb", "truncated"]),
        ("not json gltf", "m.gltf", b'{"asset": ', {}, ["m.gltf", "not JSON"]),
        ("top-level array gltf", "m.gltf", b"[1, 2, 3]", {}, ["m.gltf", "JSON object"]),
        ("deeply nested gltf", "m.gltf", b'{"asset": {"version": "2.0"}, "x": ' + b"[" * 100_000
         + b"]" * 100_000 + b"}", {}, ["m.gltf", "nest"]),
        ("buffers not a list", "m.gltf", json.dumps({"asset": {"version": "2.0"}, "buffers": {"a": 1}}).encode(),
         {}, ["m.gltf"]),
        ("gltf buffer outside", "m.gltf", json.dumps({"asset": {"version": "2.0"},
                                                      "buffers": [{"uri": "../../x.bin", "byteLength": 4}]}).encode(),
         {}, ["object[m].mesh", "a/m.gltf", "../../x.bin"]),
        ("mtllib outside", "m.obj", b"mtllib ../../x.mtl\n" + TRIANGLE, {}, ["a/m.obj", "../../x.mtl"]),
        ("map_Kd outside", "m.obj", b"mtllib m.mtl\nusemtl a\n" + TRIANGLE,
         {"a/m.mtl": b"newmtl a\nmap_Kd ../../x.png\n"}, ["a/m.mtl", "../../x.png"]),
        ("map_Kd missing", "m.obj", b"mtllib m.mtl\nusemtl a\n" + TRIANGLE,
         {"a/m.mtl": b"newmtl a\nmap_Kd nowhere.png\n"}, ["map_Kd", "nowhere.png"]),
        ("map_Kd not an image", "m.obj", b"mtllib m.mtl\nusemtl a\n" + TRIANGLE,
         {"a/m.mtl": b"newmtl a\nmap_Kd t.png\n", "a/t.png": b"not an image"}, ["t.png"]),
    ]


@pytest.mark.parametrize("case", range(len(_mesh_cases(Path(".")))),
                         ids=[c[0] for c in _mesh_cases(Path("."))])
def test_a_bad_mesh_file_is_one_line_at_check_time(tmp_path, case):
    _, name, data, files, words = _mesh_cases(tmp_path)[case]
    shot = write_shot(tmp_path / "shot", MESH_OBJECT.format(name=name), {f"a/{name}": data, **files})
    line = refused(shot)
    for word in words:
        assert word in line, line


@pytest.mark.parametrize("kind, words", [
    ("text", ["environment.map", "sky.exr", "OpenEXR"]),
    ("png", ["environment.map", "sky.exr", "OpenEXR"]),
    ("truncated", ["environment.map", "sky.exr"]),
    ("negative", ["environment.map", "radiance >= 0"]),
    ("nan", ["environment.map", "finite"]),
])
def test_a_bad_environment_map_is_one_line_at_check_time(tmp_path, kind, words):
    good = exr_bytes(tmp_path, np.ones((8, 16, 3)))
    rgb = np.ones((8, 16, 3))
    if kind == "negative":
        rgb[3, 4, 0] = -1.0
    if kind == "nan":
        rgb[2, 3, 1] = np.nan
    data = {"text": b"a sky, in words", "png": b"\x89PNG\r\n\x1a\n" + b"\0" * 64,
            "truncated": good[: len(good) // 2]}.get(kind) or exr_bytes(tmp_path, rgb)
    shot = write_shot(tmp_path / "shot", '[environment]\nmap = "a/sky.exr"\n' + SPHERE, {"a/sky.exr": data})
    shot.write_text(shot.read_text().replace('[environment]\ncolor = [0.2, 0.25, 0.3]\n', ""))
    line = refused(shot)
    for word in words:
        assert word in line, line


@pytest.mark.parametrize("nested", ["x = " + "[" * 5000 + "]" * 5000, "x = " + "{a = " * 2000 + "1" + "}" * 2000])
def test_deeply_nested_toml_is_one_line(tmp_path, nested):
    shot = write_shot(tmp_path / "shot", "")
    shot.write_text(nested + "\n")
    assert "nest" in refused(shot)


def test_a_link_to_a_file_outside_the_folder_is_refused_naming_it(tmp_path):
    outside = tmp_path / "elsewhere.obj"
    outside.write_bytes(TRIANGLE)
    shot = write_shot(tmp_path / "shot", MESH_OBJECT.format(name="m.obj"))
    (shot.parent / "a").mkdir()
    (shot.parent / "a" / "m.obj").symlink_to(outside)
    line = refused(shot)
    assert "object[m].mesh" in line and "a/m.obj" in line and "outside" in line


def test_a_folder_link_leading_outside_is_refused_too(tmp_path):
    (tmp_path / "library").mkdir()
    (tmp_path / "library" / "m.obj").write_bytes(TRIANGLE)
    shot = write_shot(tmp_path / "shot", MESH_OBJECT.format(name="m.obj"))
    (shot.parent / "a").symlink_to(tmp_path / "library")
    assert "outside" in refused(shot)


def test_a_texture_linked_from_outside_is_refused_naming_it(tmp_path):
    from examples.gltf_builder import png_bytes

    (tmp_path / "t.png").write_bytes(png_bytes(np.full((2, 2, 4), 200, np.uint8)))
    shot = write_shot(tmp_path / "shot", MESH_OBJECT.format(name="m.obj"),
                      {"a/m.obj": b"mtllib m.mtl\nusemtl a\n" + TRIANGLE, "a/m.mtl": b"newmtl a\nmap_Kd t.png\n"})
    (shot.parent / "a" / "t.png").symlink_to(tmp_path / "t.png")
    line = refused(shot)
    assert "object[m].mesh" in line and "a/t.png" in line and "outside" in line


def test_a_link_inside_the_folder_is_packed_by_its_name(tmp_path):
    shot = write_shot(tmp_path / "shot", MESH_OBJECT.format(name="m.obj"), {"library/tri.obj": TRIANGLE})
    (shot.parent / "a").mkdir()
    (shot.parent / "a" / "m.obj").symlink_to(shot.parent / "library" / "tri.obj")
    spec = load_shot(shot)
    assert check_shot_files(spec) == []
    assert spec.files() == ["a/m.obj"]


def test_latin1_bytes_in_an_obj_comment_read(tmp_path):
    shot = write_shot(tmp_path / "shot", MESH_OBJECT.format(name="m.obj"),
                      {"a/m.obj": b"# caf\xe9 cr\xe8me, \xa9 studio\no pi\xe8ce\n" + TRIANGLE})
    assert check(shot) == []
    from lampyr.engine.mesh_read import read_mesh_file

    sd = read_mesh_file(shot.parent / "a" / "m.obj", "mesh")
    # the three vertices as written (the file itself is the reference)
    assert np.array_equal(np.sort(sd.meshes[0].positions, axis=0), [[0, 0, 0], [0, 0, 0], [1, 1, 0]])


def test_an_obj_with_a_huge_finite_coordinate_is_valid(tmp_path):
    # 1e308 is finite in IEEE 754 binary64 (its largest value is about 1.798e308); the
    # triangle (0,0,0), (1e308,0,0), (0,1,0) has area 5e307, not zero
    shot = write_shot(tmp_path / "shot", MESH_OBJECT.format(name="m.obj"),
                      {"a/m.obj": b"v 0 0 0\nv 1e308 0 0\nv 0 1 0\nf 1 2 3\n"})
    with np.errstate(over="raise", invalid="raise"):  # no overflow on the way either
        notes = check(shot)
    # valid: no error, only the warning that the float32 kernels get it clamped
    assert len(notes) == 1 and "m.obj" in notes[0] and "clamps them to ±1e+30" in notes[0]


def test_collinear_points_stay_degenerate_at_any_scale(tmp_path):
    for scale in (b"1e-300", b"1", b"1e300"):
        shot = write_shot(tmp_path / scale.decode(), MESH_OBJECT.format(name="m.obj"),
                          {"a/m.obj": b"v 0 0 0\nv %s 0 0\nv -%s 0 0\nf 1 2 3\n" % (scale, scale)})
        assert "degenerate" in refused(shot)


def test_a_shot_with_nothing_in_it_checks(tmp_path):
    assert check(write_shot(tmp_path / "shot", "")) == []


def test_an_obj_with_a_huge_finite_coordinate_renders_finite_pixels(tmp_path):
    from lampyr.engine.render import render_frame

    shot = write_shot(tmp_path / "shot", MESH_OBJECT.format(name="m.obj"),
                      {"a/m.obj": b"v 0 0 0\nv 1e308 0 0\nv 0 1 0\nv 0 0 -1\nv 1 0 -1\nf 1 2 3\nf 1 4 5\n"})
    spec = load_shot(shot)
    assert any("clamps" in line for line in check_shot_files(spec))  # said once, at check time
    film = render_frame(spec, 1, tile_size=4)
    assert np.all(film.n == 2) and np.isfinite(film.rgb_sum).all()
    assert film.alpha_sum.max() > 0  # the clamped sliver is still there to be seen
