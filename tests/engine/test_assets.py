"""Meshes and environment maps: loaded with the reference libraries, errors naming the key path.

Meshes are written by trimesh and colours patched with pygltflib; EXR files are written with the
OpenEXR library. Expected geometry is trimesh's own (`trimesh.creation.box`, `Scene.to_mesh`).
"""

from __future__ import annotations

import numpy as np
import OpenEXR
import pygltflib
import pytest
import trimesh

from lampyr.engine.assets import MeshPart, load_environment_map, load_mesh
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


def write_shot(tmp_path, text: str):
    """Write `SHOT` plus `text` as tmp_path/shot.toml and return its path."""
    path = tmp_path / "shot.toml"
    path.write_text(SHOT + text, encoding="utf-8")
    return path


def mesh_shot(tmp_path, mesh: str):
    return load_shot(write_shot(tmp_path, f'[[object]]\nname = "lamp"\nmesh = "{mesh}"\n'))


def load_object_mesh(tmp_path, mesh: str) -> list[MeshPart]:
    shot = mesh_shot(tmp_path, mesh)
    return load_mesh(shot.root, shot.objects[0].mesh, "object[lamp].mesh")


def triangles(parts) -> list:
    """Every triangle as a sorted tuple of rounded corner tuples, sorted: a vertex-order-free key."""
    tris = []
    for p in parts:
        for tri in np.round(p.vertices[p.faces], 9):
            tris.append(tuple(sorted(map(tuple, tri.tolist()))))
    return sorted(tris)


def signed_volume(part: MeshPart) -> float:
    # divergence theorem: V = Σ v0 · (v1 × v2) / 6 over a closed, outward-wound surface
    v = part.vertices[part.faces]
    return float(np.einsum("ij,ij->i", v[:, 0], np.cross(v[:, 1], v[:, 2])).sum() / 6.0)


def write_glb(path, color=None, matrix=None, instances=1):
    """A unit box in a GLB, at `matrix` (4, 4), optionally with a float baseColorFactor."""
    box = trimesh.creation.box()
    box.visual = trimesh.visual.TextureVisuals(
        material=trimesh.visual.material.PBRMaterial(name="paint", baseColorFactor=[0.5, 0.5, 0.5, 1.0]))
    scene = trimesh.Scene()
    for i in range(instances):
        scene.add_geometry(box, node_name=f"lid{i}", geom_name="box",
                           transform=np.eye(4) if matrix is None else matrix)
    scene.export(str(path))
    if color is not None:  # trimesh writes the factor rounded to 8 bits; put the exact floats in
        doc = pygltflib.GLTF2().load(str(path))
        doc.materials[0].pbrMetallicRoughness.baseColorFactor = list(color) + [1.0]
        doc.save(str(path))
    return scene


# ---------------------------------------------------------------------------------------------
# meshes


@pytest.mark.parametrize("ext", ["obj", "ply", "glb"])
def test_mesh_loads_with_its_vertex_and_face_counts(tmp_path, ext):
    # source: trimesh.creation.box: 8 corners, 12 triangles; trimesh writes the file
    trimesh.creation.box().export(str(tmp_path / f"box.{ext}"))
    parts = load_object_mesh(tmp_path, f"box.{ext}")
    assert sum(len(p.vertices) for p in parts) == 8 and sum(len(p.faces) for p in parts) == 12


def test_stl_stores_three_vertices_per_facet(tmp_path):
    # source: the STL format lists each facet's own three vertices (from memory); 12 facets, 36
    trimesh.creation.box().export(str(tmp_path / "box.stl"))
    (part,) = load_object_mesh(tmp_path, "box.stl")
    assert part.faces.shape == (12, 3) and part.vertices.shape == (36, 3)
    assert len(np.unique(part.vertices, axis=0)) == 8


@pytest.mark.parametrize("ext", ["obj", "ply", "stl", "glb"])
def test_mesh_triangles_are_the_written_ones(tmp_path, ext):
    # source: trimesh.creation.box().triangles is the reference geometry
    box = trimesh.creation.box()
    box.export(str(tmp_path / f"box.{ext}"))
    parts = load_object_mesh(tmp_path, f"box.{ext}")
    ref = MeshPart("ref", np.asarray(box.vertices, float), np.asarray(box.faces, np.int64), None)
    assert triangles(parts) == triangles([ref])


@pytest.mark.parametrize("ext", ["obj", "ply", "stl", "glb"])
def test_mesh_arrays_have_the_documented_dtypes(tmp_path, ext):
    # source: docs/shot-file.md (MeshPart: vertices float64, faces int64)
    trimesh.creation.box().export(str(tmp_path / f"box.{ext}"))
    part = load_object_mesh(tmp_path, f"box.{ext}")[0]
    assert part.vertices.dtype == np.float64 and part.faces.dtype == np.int64


def test_glb_node_transform_gives_world_vertices(tmp_path):
    # source: trimesh Scene.to_mesh() applies the node graph; the matrix is ours
    matrix = trimesh.transformations.compose_matrix(angles=[0.3, -0.5, 1.1], translate=[1, 2, -3])
    write_glb(tmp_path / "lid.glb", matrix=matrix)
    (part,) = load_object_mesh(tmp_path, "lid.glb")
    ref = trimesh.load_scene(str(tmp_path / "lid.glb"), process=False).to_mesh()
    expected = MeshPart("ref", np.asarray(ref.vertices), np.asarray(ref.faces), None)
    assert triangles([part]) == triangles([expected])
    box = trimesh.creation.box()
    np.testing.assert_allclose(np.sort(part.vertices, axis=0),
                               np.sort(box.vertices @ matrix[:3, :3].T + matrix[:3, 3], axis=0), atol=1e-6)


def test_glb_instances_become_separate_parts(tmp_path):
    # source: glTF 2.0 spec: several nodes may reference one mesh (instancing)
    write_glb(tmp_path / "two.glb", instances=2)
    assert len(load_object_mesh(tmp_path, "two.glb")) == 2


def test_glb_base_color_is_the_files_float(tmp_path):
    # source: glTF 2.0 spec, pbrMetallicRoughness.baseColorFactor (linear); written with pygltflib
    write_glb(tmp_path / "paint.glb", color=(0.25, 0.5, 0.123456))
    (part,) = load_object_mesh(tmp_path, "paint.glb")
    assert part.base_color.tolist() == [0.25, 0.5, 0.123456]


def test_mirroring_node_keeps_faces_outward(tmp_path):
    # source: divergence theorem; trimesh's box has volume +1 when wound outward
    write_glb(tmp_path / "mirror.glb", matrix=np.diag([-1.0, 1.0, 1.0, 1.0]))
    (part,) = load_object_mesh(tmp_path, "mirror.glb")
    assert signed_volume(part) == pytest.approx(1.0, abs=1e-9)


def test_obj_colour_is_the_mtl_kd_float(tmp_path):
    # source: MTL format, `Kd r g b` diffuse reflectance (read as linear)
    (tmp_path / "lamp.mtl").write_text("newmtl brass\nKd 0.7 0.1 0.123456\n")
    (tmp_path / "lamp.obj").write_text("mtllib lamp.mtl\nv 0 0 0\nv 1 0 0\nv 0 1 0\nusemtl brass\nf 1 2 3\n")
    (part,) = load_object_mesh(tmp_path, "lamp.obj")
    assert part.base_color.tolist() == [0.7, 0.1, 0.123456]


def test_mesh_without_colour_has_none(tmp_path):
    # source: the STL format carries no colour
    trimesh.creation.box().export(str(tmp_path / "box.stl"))
    assert load_object_mesh(tmp_path, "box.stl")[0].base_color is None


BAD_MESHES = [
    ("nan.obj", "v nan 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n", "NaN or infinity"),
    ("inf.obj", "v inf 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n", "NaN or infinity"),
    ("line.obj", "v 0 0 0\nv 1 0 0\nv 2 0 0\nf 1 2 3\n", "all degenerate"),
    ("points.obj", "v 0 0 0\nv 1 0 0\n", "no faces"),
    ("broken.ply", "not a ply file at all\n", "failed to load"),
    ("broken.glb", "glTF?", "failed to load"),
]


@pytest.mark.parametrize("name, text, found", BAD_MESHES, ids=[b[0] for b in BAD_MESHES])
def test_bad_mesh_gives_one_line_naming_the_object(tmp_path, name, text, found):
    # source: docs/shot-file.md, mesh errors
    (tmp_path / name).write_text(text)
    with pytest.raises(AssetError) as info:
        load_object_mesh(tmp_path, name)
    assert info.value.key == "object[lamp].mesh" and found in info.value.problem
    assert "\n" not in str(info.value) and info.value.problem.startswith("expected ")


def test_unreadable_format_lists_the_supported_extensions(tmp_path):
    # source: docs/shot-file.md: OBJ, PLY, STL, glTF/GLB
    (tmp_path / "x.ply").write_text("ply\nformat nonsense\n")
    with pytest.raises(AssetError, match=r"\.glb, \.gltf, \.obj, \.ply, \.stl"):
        load_object_mesh(tmp_path, "x.ply")


def test_point_cloud_has_no_faces(tmp_path):
    # source: trimesh writes a PointCloud as a PLY with vertices only
    trimesh.PointCloud(np.random.default_rng(1).random((5, 3))).export(str(tmp_path / "cloud.ply"))
    with pytest.raises(AssetError, match="no faces"):
        load_object_mesh(tmp_path, "cloud.ply")


def test_load_mesh_refuses_a_path_leaving_the_root(tmp_path):
    # source: DESIGN.md invariant 5 (never serve a path outside the farm's folders)
    with pytest.raises(AssetError) as info:
        load_mesh(tmp_path, "../etc/passwd.obj", "object[x].mesh")
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
    # source: DESIGN.md: submitting packs every file, which must lie in the shot's folder
    (tmp_path / "lamp.obj").write_text("mtllib ../shared.mtl\nv 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n")
    shot = mesh_shot(tmp_path, "lamp.obj")
    with pytest.raises(AssetError) as info:
        shot.files()
    assert info.value.key == "object[lamp].mesh" and "../shared.mtl" in info.value.problem


def test_files_refuse_an_absolute_texture_path(tmp_path):
    # source: DESIGN.md: a shot may only use files in its own folder
    (tmp_path / "lamp.mtl").write_text("newmtl m\nmap_Kd /etc/wood.png\n")
    (tmp_path / "lamp.obj").write_text("mtllib lamp.mtl\nv 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n")
    with pytest.raises(AssetError, match="/etc/wood.png"):
        mesh_shot(tmp_path, "lamp.obj").files()
