"""Meshes of a shot's objects as the compiler sees them, environment maps, and the files a shot uses.

A shot with one object naming a mesh file goes through `compile_geometry`, and the checks read
what the mesh table (`geom.meshes`) and the material table (`geom.mats`) hold. Meshes are written
by trimesh and colours patched with pygltflib; EXR files are written with the OpenEXR library.
Expected geometry is trimesh's own (`trimesh.creation.box`, `Scene.to_mesh`); triangles are
compared as sets of world-space corners, matched one to one with scipy's linear_sum_assignment,
so the BVH's leaf order does not matter.
"""

from __future__ import annotations

import numpy as np
import OpenEXR
import pygltflib
import pytest
import trimesh
from scipy.optimize import linear_sum_assignment

from lampyr.engine.assets import load_environment_map
from lampyr.engine.compiler import compile_geometry
from lampyr.engine.material_table import (DIFFUSE, M_COLOR, M_METALLIC, M_ROUGHNESS, M_TYPE,
                                          PBR)
from lampyr.engine.scene_import import read_scene_file
from lampyr.engine.shot import load_shot
from lampyr.errors import AssetError

SHOT = """name = "t"
frames = 1
[image]
width = 4
height = 3
[sampling]
samples = 1
[camera]
position = [0, 0, 5]
target = [0, 0, 0]
fov = 40
"""
KEY = "object[lamp].mesh"


def write_shot(tmp_path, text: str):
    """Write `SHOT` plus `text` as tmp_path/shot.toml and return its path."""
    path = tmp_path / "shot.toml"
    path.write_text(SHOT + text, encoding="utf-8")
    return path


def mesh_shot(tmp_path, mesh: str):
    return load_shot(write_shot(tmp_path, f'[[object]]\nname = "lamp"\nmesh = "{mesh}"\n'))


def object_geometry(tmp_path, mesh: str):
    """`compile_geometry` of a shot whose one object, "lamp", names `mesh` and is not moved: its
    mesh-table triangles are in world space."""
    return compile_geometry(mesh_shot(tmp_path, mesh))


def assert_same_triangles(got, expected, atol: float = 1e-6):
    """Each triangle of `got` (T, 3, 3) matches one triangle of `expected` corner for corner, in
    any vertex order, within `atol` (float32 storage of unit-sized coordinates, rule of thumb)."""
    got, expected = np.asarray(got, np.float64), np.asarray(expected, np.float64)
    assert got.shape == expected.shape
    gap = np.linalg.norm(got[:, None, :, None] - expected[None, :, None, :], axis=-1)  # (T, T, 3, 3)
    cost = np.maximum(gap.min(axis=3).max(axis=2), gap.min(axis=2).max(axis=2))
    rows, cols = linear_sum_assignment(cost)
    assert cost[rows, cols].max() <= atol


def signed_volume(tris) -> float:
    # divergence theorem: V = Σ v0 · (v1 × v2) / 6 over a closed, outward-wound surface
    v = np.asarray(tris, np.float64)
    return float(np.einsum("ij,ij->i", v[:, 0], np.cross(v[:, 1], v[:, 2])).sum() / 6.0)


def colours(geom) -> set:
    """The base colours (linear RGB) of the material rows the triangles use."""
    return {tuple(geom.mats[r, M_COLOR:M_COLOR + 3]) for r in geom.meshes.tri_mat}


def write_glb(path, color=None, matrices=(None,)):
    """A unit box in a GLB, one node per matrix (4, 4) using the same mesh, with a material
    "paint"; `color` puts the exact float baseColorFactor, metallic 0.25 and roughness 0.625 in."""
    box = trimesh.creation.box()
    box.visual = trimesh.visual.TextureVisuals(
        material=trimesh.visual.material.PBRMaterial(name="paint", baseColorFactor=[0.5, 0.5, 0.5, 1.0]))
    scene = trimesh.Scene()
    for i, matrix in enumerate(matrices):
        scene.add_geometry(box, node_name=f"lid{i}", geom_name="box",
                           transform=np.eye(4) if matrix is None else matrix)
    scene.export(str(path))
    if color is not None:  # trimesh writes the factor rounded to 8 bits; put the exact floats in
        doc = pygltflib.GLTF2().load(str(path))
        pbr = doc.materials[0].pbrMetallicRoughness
        pbr.baseColorFactor = list(color) + [1.0]
        pbr.metallicFactor, pbr.roughnessFactor = 0.25, 0.625
        doc.save(str(path))
    return scene


# ---------------------------------------------------------------------------------------------
# meshes


@pytest.mark.parametrize("ext, vertices", [("obj", 8), ("ply", 8), ("glb", 8), ("stl", 36)])
def test_mesh_table_holds_the_files_vertex_and_triangle_counts(tmp_path, ext, vertices):
    # source: trimesh.creation.box: 8 corners, 12 triangles; trimesh writes the file. The STL
    # format lists each facet's own three vertices (from memory): 12 facets, 36 vertices
    trimesh.creation.box().export(str(tmp_path / f"box.{ext}"))
    meshes = object_geometry(tmp_path, f"box.{ext}").meshes
    assert meshes.mesh_tri_count.tolist() == [12] and meshes.mesh_tri_base.tolist() == [0]
    assert meshes.tris.shape == (12, 3, 3) and len(meshes.vtx_n) == vertices
    assert len(np.unique(meshes.tri_vtx)) == vertices


@pytest.mark.parametrize("ext", ["obj", "ply", "stl", "glb"])
def test_mesh_triangles_are_the_written_ones(tmp_path, ext):
    # source: trimesh.creation.box().triangles is the reference geometry
    box = trimesh.creation.box()
    box.export(str(tmp_path / f"box.{ext}"))
    assert_same_triangles(object_geometry(tmp_path, f"box.{ext}").meshes.tris, box.triangles)


@pytest.mark.parametrize("ext", ["obj", "ply", "stl", "glb"])
def test_mesh_table_arrays_have_the_documented_dtypes(tmp_path, ext):
    # source: engine/mesh_table.py's docstring (tris (T, 3, 3) float32, tri_mat int32, bases int64)
    trimesh.creation.box().export(str(tmp_path / f"box.{ext}"))
    meshes = object_geometry(tmp_path, f"box.{ext}").meshes
    assert meshes.tris.dtype == np.float32 and meshes.tri_mat.dtype == np.int32
    assert meshes.mesh_tri_base.dtype == np.int64 and meshes.mesh_tri_count.dtype == np.int64


def test_glb_node_transform_gives_world_triangles(tmp_path):
    # source: trimesh Scene.to_mesh() applies the node graph; the matrix is ours
    matrix = trimesh.transformations.compose_matrix(angles=[0.3, -0.5, 1.1], translate=[1, 2, -3])
    write_glb(tmp_path / "lid.glb", matrices=[matrix])
    ref = trimesh.load_scene(str(tmp_path / "lid.glb"), process=False).to_mesh()
    tris = object_geometry(tmp_path, "lid.glb").meshes.tris
    assert_same_triangles(tris, ref.triangles)
    box = trimesh.creation.box()  # and numpy's own product of the box with the matrix
    assert_same_triangles(tris, box.triangles @ matrix[:3, :3].T + matrix[:3, 3])


def test_glb_instances_become_separate_meshes(tmp_path):
    # source: glTF 2.0 spec, 3.5: several nodes may reference one mesh (instancing);
    # docs/shot-file.md "Meshes": an object's file is flattened, each node a part with its matrix
    shift = np.eye(4)
    shift[:3, 3] = [3.0, 0.0, 0.0]
    write_glb(tmp_path / "two.glb", matrices=[None, shift])
    geom = object_geometry(tmp_path, "two.glb")
    assert len(geom.parts) == 2 and geom.meshes.mesh_tri_count.tolist() == [12, 12]
    box = trimesh.creation.box().triangles
    assert_same_triangles(geom.meshes.tris, np.concatenate([box, box + [3.0, 0.0, 0.0]]))


def test_glb_material_is_a_pbr_row_with_the_files_floats(tmp_path):
    # source: glTF 2.0 spec, 3.9.2 pbrMetallicRoughness: baseColorFactor (linear), metallicFactor,
    # roughnessFactor; written with pygltflib as exact floats (trimesh keeps only 8 bits)
    write_glb(tmp_path / "paint.glb", color=(0.25, 0.5, 0.123456))
    geom = object_geometry(tmp_path, "paint.glb")
    (row,) = {int(r) for r in geom.meshes.tri_mat}
    assert geom.mats[row, M_TYPE] == PBR
    assert geom.mats[row, M_COLOR:M_COLOR + 3].tolist() == [0.25, 0.5, 0.123456]
    assert (geom.mats[row, M_METALLIC], geom.mats[row, M_ROUGHNESS]) == (0.25, 0.625)


def test_mirroring_node_keeps_faces_outward(tmp_path):
    # source: divergence theorem; trimesh's box has volume +1 when wound outward
    write_glb(tmp_path / "mirror.glb", matrices=[np.diag([-1.0, 1.0, 1.0, 1.0])])
    tris = object_geometry(tmp_path, "mirror.glb").meshes.tris
    assert signed_volume(tris) == pytest.approx(1.0, abs=1e-6)  # float32 corners at ±0.5 are exact


def test_obj_colour_is_the_mtl_kd_float(tmp_path):
    # source: MTL format, `Kd r g b` diffuse reflectance (read as linear); docs/shot-file.md "Meshes"
    (tmp_path / "lamp.mtl").write_text("newmtl brass\nKd 0.7 0.1 0.123456\n")
    (tmp_path / "lamp.obj").write_text("mtllib lamp.mtl\nv 0 0 0\nv 1 0 0\nv 0 1 0\nusemtl brass\nf 1 2 3\n")
    assert colours(object_geometry(tmp_path, "lamp.obj")) == {(0.7, 0.1, 0.123456)}


GREY_FILES = [
    ("box.stl", None),  # the STL format carries no colour
    ("box.ply", None),  # trimesh's PLY of a box has no colour properties
    ("lamp.obj", "v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n"),  # an OBJ without mtllib
]


@pytest.mark.parametrize("name, text", GREY_FILES, ids=[g[0] for g in GREY_FILES])
def test_mesh_without_colour_is_grey_diffuse(tmp_path, name, text):
    # source: docs/shot-file.md, [[object]] `material`: grey 0.8 where the file has no colour
    # (rule of thumb); engine/scene_import.py: a diffuse row for files other than glTF
    if text is None:
        trimesh.creation.box().export(str(tmp_path / name))
    else:
        (tmp_path / name).write_text(text)
    geom = object_geometry(tmp_path, name)
    assert {geom.mats[r, M_TYPE] for r in geom.meshes.tri_mat} == {DIFFUSE}
    assert colours(geom) == {(0.8, 0.8, 0.8)}


def test_glb_without_material_gets_the_gltf_default_material(tmp_path):
    # source: glTF 2.0 spec, 3.9.6: a primitive without a material renders with the default
    # material: baseColorFactor 1, metallicFactor 1, roughnessFactor 1
    trimesh.creation.box().export(str(tmp_path / "box.glb"))
    assert pygltflib.GLTF2().load(str(tmp_path / "box.glb")).materials == []  # the file has none
    geom = object_geometry(tmp_path, "box.glb")
    (row,) = {int(r) for r in geom.meshes.tri_mat}
    assert geom.mats[row, M_TYPE] == PBR and geom.mats[row, M_COLOR:M_COLOR + 3].tolist() == [1.0, 1.0, 1.0]
    assert (geom.mats[row, M_METALLIC], geom.mats[row, M_ROUGHNESS]) == (1.0, 1.0)


def assert_one_line_naming(info, name: str, found: str):
    """The error names the object's mesh key and the file, says `found`, on one line."""
    err = info.value
    assert err.key == KEY and name in err.problem and found in err.problem
    assert "\n" not in str(err) and "expected " in err.problem


BAD_MESHES = [
    pytest.param("nan.obj", "v nan 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n", "NaN or infinity", id="nan"),
    pytest.param("inf.obj", "v inf 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n", "NaN or infinity", id="inf"),
    pytest.param("line.obj", "v 0 0 0\nv 1 0 0\nv 2 0 0\nf 1 2 3\n", "degenerate", id="zero area"),
    pytest.param("points.obj", "v 0 0 0\nv 1 0 0\n", "no faces", id="no faces"),
    pytest.param("broken.ply", "not a ply file at all\n", "failed to load", id="not a ply"),
    # an unknown extension is refused when the shot is read, listing the supported ones
    # (tests/engine/test_shot.py); a known extension with unreadable content fails here
    pytest.param("nonsense.ply", "ply\nformat nonsense\n", "failed to load", id="bad ply format"),
    pytest.param("broken.glb", "glTF?", "GLB", id="short glb"),
]


@pytest.mark.parametrize("name, text, found", BAD_MESHES)
def test_bad_mesh_gives_one_line_naming_the_object_and_file(tmp_path, name, text, found):
    # source: docs/shot-file.md "Meshes": a refused mesh names object[<name>].mesh
    (tmp_path / name).write_text(text)
    shot = mesh_shot(tmp_path, name)
    with pytest.raises(AssetError) as info:
        compile_geometry(shot)
    assert_one_line_naming(info, name, found)


def test_point_cloud_has_no_faces(tmp_path):
    # source: trimesh writes a PointCloud as a PLY with vertices only
    trimesh.PointCloud(np.random.default_rng(1).random((5, 3))).export(str(tmp_path / "cloud.ply"))
    shot = mesh_shot(tmp_path, "cloud.ply")
    with pytest.raises(AssetError) as info:
        compile_geometry(shot)
    assert_one_line_naming(info, "cloud.ply", "no faces")


def test_reader_refuses_a_path_leaving_the_root(tmp_path):
    # source: docs/shot-file.md "Paths": a path containing `..` is refused (load_shot refuses it
    # first, tests/engine/test_shot.py; the reader refuses it again for shots built otherwise)
    with pytest.raises(AssetError) as info:
        read_scene_file(tmp_path, "../etc/passwd.obj", "object[x].mesh")
    assert info.value.key == "object[x].mesh" and "no '..'" in info.value.problem


# ---------------------------------------------------------------------------------------------
# environment maps


def write_exr(path, rgb: np.ndarray, names="RGB"):
    channels = {n: np.ascontiguousarray(rgb[..., i]) for i, n in enumerate(names)}
    header = {"compression": OpenEXR.ZIP_COMPRESSION, "type": OpenEXR.scanlineimage}
    OpenEXR.File(dict(header), dict(channels)).write(str(path))


def env_shot(tmp_path):
    return load_shot(write_shot(tmp_path, '[environment]\nmap = "sky.exr"\n'))


@pytest.mark.parametrize("dtype", [np.float16, np.float32])
def test_environment_map_round_trips_through_openexr(tmp_path, dtype):
    # source: OpenEXR library writes the file; HALF and FLOAT are both radiance
    rgb = np.random.default_rng(2).random((4, 8, 3)).astype(dtype)
    write_exr(tmp_path / "sky.exr", rgb)
    shot = env_shot(tmp_path)
    out = load_environment_map(shot.root, shot.environment.map, "environment.map")
    assert out.dtype == np.float64 and out.shape == (4, 8, 3)
    np.testing.assert_array_equal(out, rgb.astype(np.float64))


def test_environment_map_first_row_is_the_top(tmp_path):
    # source: OpenEXR stores rows from the top of the data window (y increases downwards)
    rgb = np.zeros((3, 4, 3), np.float32)
    rgb[0] = 7.0
    write_exr(tmp_path / "sky.exr", rgb)
    shot = env_shot(tmp_path)
    out = load_environment_map(shot.root, "sky.exr", "environment.map")
    assert out[0].min() == 7.0 and out[1:].max() == 0.0


BAD_MAPS = [
    ("negative", np.full((2, 4, 3), -1.0, np.float32), "RGB", ">= 0"),
    ("nan", np.full((2, 4, 3), np.nan, np.float32), "RGB", "NaN or infinity"),
    ("luminance only", np.ones((2, 4, 1), np.float32), "Y", "channels R, G and B"),
]


@pytest.mark.parametrize("label, rgb, names, found", BAD_MAPS, ids=[b[0] for b in BAD_MAPS])
def test_bad_environment_map_names_the_key(tmp_path, label, rgb, names, found):
    # source: docs/shot-file.md, environment.map
    write_exr(tmp_path / "sky.exr", rgb, names)
    shot = env_shot(tmp_path)
    with pytest.raises(AssetError) as info:
        load_environment_map(shot.root, shot.environment.map, "environment.map")
    assert info.value.key == "environment.map" and found in info.value.problem


def test_environment_map_that_is_not_exr_is_unreadable(tmp_path):
    # source: OpenEXR refuses a file without the EXR magic number
    (tmp_path / "sky.exr").write_text("not an image")
    shot = env_shot(tmp_path)
    with pytest.raises(AssetError, match="expected a readable OpenEXR file"):
        load_environment_map(shot.root, "sky.exr", "environment.map")


# ---------------------------------------------------------------------------------------------
# the files a shot uses


def test_files_include_the_obj_mtl_and_its_textures(tmp_path):
    # source: OBJ `mtllib` may name several files; MTL `map_Kd [options] file`
    (tmp_path / "assets").mkdir()
    (tmp_path / "assets" / "a.mtl").write_text("newmtl m\nKd 1 1 1\nmap_Kd -bm 1 tex/wood.png\n")
    (tmp_path / "assets" / "b.mtl").write_text("newmtl n\nKd 1 0 0\n")
    (tmp_path / "assets" / "tex").mkdir()
    (tmp_path / "assets" / "tex" / "wood.png").write_bytes(b"png")
    (tmp_path / "assets" / "lamp.obj").write_text("mtllib a.mtl b.mtl\nv 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n")
    shot = mesh_shot(tmp_path, "assets/lamp.obj")
    assert shot.files() == ["assets/a.mtl", "assets/b.mtl", "assets/lamp.obj", "assets/tex/wood.png"]


def test_files_include_gltf_buffers(tmp_path):
    # source: glTF 2.0 spec, buffers[].uri names external binary files; trimesh writes them
    for name, data in trimesh.Scene(trimesh.creation.box()).export(file_type="gltf").items():
        (tmp_path / name).write_bytes(data)
    shot = mesh_shot(tmp_path, "model.gltf")
    assert shot.files() == ["gltf_buffer_0.bin", "gltf_buffer_1.bin", "model.gltf"]


def test_files_refuse_an_mtl_outside_the_shot_folder(tmp_path):
    # source: docs/shot-file.md "Paths" and "Files a shot uses": what is packed lies in the shot's folder
    (tmp_path / "lamp.obj").write_text("mtllib ../shared.mtl\nv 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n")
    shot = mesh_shot(tmp_path, "lamp.obj")
    with pytest.raises(AssetError) as info:
        shot.files()
    assert info.value.key == "object[lamp].mesh" and "../shared.mtl" in info.value.problem


def test_files_refuse_an_absolute_texture_path(tmp_path):
    # source: docs/shot-file.md "Paths": a shot may only use files inside its own folder
    (tmp_path / "lamp.mtl").write_text("newmtl m\nmap_Kd /etc/wood.png\n")
    (tmp_path / "lamp.obj").write_text("mtllib lamp.mtl\nv 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n")
    with pytest.raises(AssetError, match="/etc/wood.png"):
        mesh_shot(tmp_path, "lamp.obj").files()
