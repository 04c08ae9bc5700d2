"""OBJ / PLY / STL files as SceneData: geometry, file normals only, UVs in glTF's convention, MTL.

References: hand-written OBJ, MTL and PLY files whose contents are stated beside each check;
trimesh itself (its loader's geometry, and `trimesh.visual.color.uv_to_color`, trimesh's own
reading of a UV on an image); Pillow's decoding of the texture; the glTF 2.0 specification
(section 3.8.1: UV (0, 0) is the first pixel, v grows downwards; 3.7.2.1: no normals means flat).
"""

from __future__ import annotations

import numpy as np
import PIL.Image
import pytest
import trimesh

from lampyr.engine.mesh_read import read_mesh_file
from lampyr.engine.scene_data import ALPHA_BLEND, ALPHA_OPAQUE, TexRef
from lampyr.engine.textures import TEXREF_SIZE, pack_images, srgb_table, tex_lookup, texref_row
from lampyr.errors import AssetError

KEY = "object[lamp].mesh"

# a 2 x 2 image: the first pixel (top-left as the file stores it) red, then green; bottom row blue, white
TEXELS = np.array([[[255, 0, 0, 255], [0, 255, 0, 255]], [[0, 0, 255, 255], [255, 255, 255, 255]]], np.uint8)

QUAD_OBJ = """mtllib quad.mtl
v 0 0 0
v 1 0 0
v 1 1 0
v 0 1 0
vt 0.25 0.25
vt 0.75 0.25
vt 0.75 0.75
vt 0.25 0.75
vn 0 0 2
usemtl painted
f 1/1/1 2/2/1 3/3/1
f 1/1/1 3/3/1 4/4/1
"""

QUAD_MTL = """newmtl painted
Kd 0.5 0.25 0.125
Ke 1.5 0 0.25
d 0.75
Ni 1.33
map_Kd -s 1 1 1 tex.png
"""


def write(folder, name, text):
    (folder / name).write_text(text, encoding="utf-8")
    return folder / name


@pytest.fixture
def quad(tmp_path):
    PIL.Image.fromarray(TEXELS).save(tmp_path / "tex.png")
    write(tmp_path, "quad.mtl", QUAD_MTL)
    return write(tmp_path, "quad.obj", QUAD_OBJ)


def lookup(sd, ref: TexRef, uv):
    pixels, info = pack_images(sd.images)
    refs = texref_row(ref, False).reshape(1, TEXREF_SIZE)
    return np.array([tex_lookup(pixels, info, refs, srgb_table(), 0, u, v) for u, v in uv])


# -------------------------------------------------------------------------------- UVs


def test_obj_vt_is_flipped_to_gltf_uv(quad):
    # OBJ vt (0.25, 0.25) counts v up from the bottom; glTF counts down from the top: (0.25, 0.75)
    sd = read_mesh_file(quad, KEY)
    np.testing.assert_allclose(sd.meshes[0].uv0, [[0.25, 0.75], [0.75, 0.75], [0.75, 0.25], [0.25, 0.25]])


def test_obj_vertex_near_the_top_left_reads_the_first_pixel(quad):
    # vertex 4 has vt (0.25, 0.75): a quarter in from the image's left and top edges, the centre of
    # the first pixel (red) in any image-viewer's view of the file
    sd = read_mesh_file(quad, KEY)
    colour = lookup(sd, sd.materials[0].base_color_tex, sd.meshes[0].uv0[3:4])[0]
    np.testing.assert_allclose(colour, [1, 0, 0, 1])


def test_obj_uv_texels_agree_with_trimesh(quad):
    # trimesh.visual.color.uv_to_color reads an OBJ-convention UV on the image (its own code)
    sd = read_mesh_file(quad, KEY)
    geom = next(iter(trimesh.load_scene(str(quad), process=False).geometry.values()))
    expected = trimesh.visual.color.uv_to_color(geom.visual.uv, PIL.Image.fromarray(TEXELS)) / 255.0
    np.testing.assert_allclose(lookup(sd, sd.materials[0].base_color_tex, sd.meshes[0].uv0), expected)


def test_ply_texture_coordinates_are_flipped_too(tmp_path):
    ply = write(tmp_path, "t.ply", "ply\nformat ascii 1.0\nelement vertex 3\nproperty float x\nproperty float y\n"
                "property float z\nproperty float s\nproperty float t\nelement face 1\n"
                "property list uchar int vertex_indices\nend_header\n0 0 0 0 0\n1 0 0 1 0\n0 1 0 0 0.8\n3 0 1 2\n")
    np.testing.assert_allclose(read_mesh_file(ply, KEY).meshes[0].uv0, [[0, 1], [1, 1], [0, 0.2]], atol=1e-7)


# ----------------------------------------------------------------------------- normals


def test_obj_vn_is_kept_and_normalised(quad):
    # the file's only normal is (0, 0, 2): every vertex gets it, at unit length
    np.testing.assert_allclose(read_mesh_file(quad, KEY).meshes[0].normals, np.tile([0, 0, 1.0], (4, 1)))


def test_obj_without_vn_stays_flat(tmp_path):
    obj = write(tmp_path, "flat.obj", "v 0 0 0\nv 1 0 0\nv 0 1 0\nv 0 0 1\nf 1 3 2\nf 1 2 4\nf 1 4 3\nf 2 3 4\n")
    mesh = read_mesh_file(obj, KEY).meshes[0]
    assert mesh.normals is None and mesh.uv0 is None


def test_stl_is_flat(tmp_path):
    trimesh.creation.box().export(tmp_path / "box.stl")
    assert read_mesh_file(tmp_path / "box.stl", KEY).meshes[0].normals is None


@pytest.mark.parametrize("with_normals", [True, False])
def test_ply_normals_only_when_the_file_has_them(tmp_path, with_normals):
    props = "property float nx\nproperty float ny\nproperty float nz\n" if with_normals else ""
    rows = ["0 0 0", "1 0 0", "0 1 0"]
    if with_normals:
        rows = [r + " 0 0.6 0.8" for r in rows]
    ply = write(tmp_path, "n.ply", "ply\nformat ascii 1.0\nelement vertex 3\nproperty float x\nproperty float y\n"
                f"property float z\n{props}element face 1\nproperty list uchar int vertex_indices\nend_header\n"
                + "\n".join(rows) + "\n3 0 1 2\n")
    normals = read_mesh_file(ply, KEY).meshes[0].normals
    if with_normals:
        np.testing.assert_allclose(normals, np.tile([0, 0.6, 0.8], (3, 1)), atol=1e-7)
    else:
        assert normals is None


def test_obj_face_varying_normals_keep_a_cube_faceted(tmp_path):
    # a cube written with one vn per face on shared v: each corner keeps its face's normal
    box = trimesh.creation.box()
    lines = [f"v {x} {y} {z}" for x, y, z in box.vertices]
    lines += [f"vn {x} {y} {z}" for x, y, z in box.face_normals]
    lines += [f"f {a + 1}//{i + 1} {b + 1}//{i + 1} {c + 1}//{i + 1}" for i, (a, b, c) in enumerate(box.faces)]
    mesh = read_mesh_file(write(tmp_path, "cube.obj", "\n".join(lines) + "\n"), KEY).meshes[0]
    tri_n = mesh.normals[mesh.faces]  # (F, 3 corners, 3)
    tri = mesh.positions[mesh.faces]
    geometric = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    geometric /= np.linalg.norm(geometric, axis=1, keepdims=True)
    np.testing.assert_allclose(tri_n, np.repeat(geometric[:, None], 3, axis=1), atol=1e-12)


# --------------------------------------------------------------------------- geometry


@pytest.mark.parametrize("name", ["quad.obj", "box.stl", "box.ply"])
def test_geometry_is_trimesh_s(quad, name):
    folder = quad.parent
    if name != "quad.obj":
        trimesh.creation.box().export(folder / name)
    sd = read_mesh_file(folder / name, KEY)
    ref = trimesh.load_scene(str(folder / name), process=False)
    assert len(sd.meshes) == len(ref.geometry) and len(sd.nodes) == len(ref.graph.nodes_geometry)
    for mesh in sd.meshes:
        geom = ref.geometry[mesh.name]
        np.testing.assert_array_equal(mesh.positions, geom.vertices)
        np.testing.assert_array_equal(mesh.faces, geom.faces)
        assert mesh.positions.dtype == np.float64 and mesh.faces.dtype == np.int64


def test_nodes_are_roots_at_rest(quad):
    sd = read_mesh_file(quad, KEY)
    assert sd.roots == tuple(range(len(sd.nodes)))
    assert all(n.matrix is None and n.parent == -1 and n.mesh >= 0 for n in sd.nodes)


# --------------------------------------------------------------------------------- MTL


def test_mtl_floats_are_read_exactly(quad):
    m = read_mesh_file(quad, KEY).materials[0]
    # from QUAD_MTL: Kd 0.5 0.25 0.125, d 0.75, Ke 1.5 0 0.25, Ni 1.33 (all exact in binary but 1.33)
    assert list(m.base_color) == [0.5, 0.25, 0.125, 0.75]
    assert list(m.emissive) == [1.5, 0.0, 0.25]
    assert m.ior == 1.33 and m.alpha_mode == ALPHA_BLEND
    assert m.metallic == 0.0 and m.name == "painted"


def test_map_kd_is_the_image_pillow_decodes(quad):
    sd = read_mesh_file(quad, KEY)
    ref = sd.materials[0].base_color_tex
    assert ref is not None and sd.meshes[0].face_material.tolist() == [0, 0]
    np.testing.assert_array_equal(sd.images[ref.image].rgba, np.asarray(PIL.Image.open(quad.parent / "tex.png")))


def test_map_ke_and_defaults(tmp_path):
    PIL.Image.fromarray(TEXELS).save(tmp_path / "glow.png")
    write(tmp_path, "m.mtl", "newmtl a\nmap_Ke glow.png\nnewmtl b\nKd 0 1 0\nusemtl x\n")
    obj = write(tmp_path, "m.obj", "mtllib m.mtl\nv 0 0 0\nv 1 0 0\nv 0 1 0\nv 1 1 0\nusemtl a\nf 1 2 3\n"
                "usemtl b\nf 2 4 3\n")
    sd = read_mesh_file(obj, KEY)
    by_name = {m.name: m for m in sd.materials}
    a, b = by_name["a"], by_name["b"]
    assert a.emissive_tex is not None and list(a.emissive) == [1, 1, 1]  # factor 1 under a map (factor × texture)
    assert list(a.base_color) == [0.8, 0.8, 0.8, 1.0] and a.alpha_mode == ALPHA_OPAQUE  # no Kd: grey (rule of thumb)
    assert list(b.base_color) == [0, 1, 0, 1] and b.emissive_tex is None and list(b.emissive) == [0, 0, 0]
    mats = {sd.meshes[n.mesh].name: sd.meshes[n.mesh].face_material for n in sd.nodes}
    assert {sd.materials[int(fm[0])].name for fm in mats.values()} == {"a", "b"}


def test_obj_without_mtl_uses_the_default_material(tmp_path):
    obj = write(tmp_path, "p.obj", "v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n")
    sd = read_mesh_file(obj, KEY)
    assert sd.materials == () and sd.meshes[0].face_material.tolist() == [-1]


def test_one_image_per_file(tmp_path):
    PIL.Image.fromarray(TEXELS).save(tmp_path / "tex.png")
    write(tmp_path, "m.mtl", "newmtl a\nmap_Kd tex.png\nnewmtl b\nmap_Kd tex.png\n")
    obj = write(tmp_path, "m.obj", "mtllib m.mtl\nv 0 0 0\nv 1 0 0\nv 0 1 0\nv 1 1 0\nvt 0 0\nusemtl a\n"
                "f 1/1 2/1 3/1\nusemtl b\nf 2/1 4/1 3/1\n")
    sd = read_mesh_file(obj, KEY)
    assert len(sd.images) == 1 and len(sd.materials) == 2


# ------------------------------------------------------------------------------ errors


def one_line(err) -> str:
    text = str(err.value)
    assert "\n" not in text and text.startswith(KEY)
    return text


def test_missing_texture_names_the_statement(quad):
    (quad.parent / "tex.png").unlink()
    with pytest.raises(AssetError) as err:
        read_mesh_file(quad, KEY)
    text = one_line(err)
    assert "quad.mtl: newmtl painted: map_Kd" in text and '"tex.png"' in text


def test_undecodable_texture(quad):
    (quad.parent / "tex.png").write_bytes(b"not a png")
    with pytest.raises(AssetError) as err:
        read_mesh_file(quad, KEY)
    assert "readable image" in one_line(err)


def test_texture_outside_the_root_is_refused(tmp_path):
    inner = tmp_path / "shot"
    inner.mkdir()
    PIL.Image.fromarray(TEXELS).save(tmp_path / "secret.png")
    write(inner, "m.mtl", "newmtl a\nmap_Kd ../secret.png\n")
    obj = write(inner, "m.obj", "mtllib m.mtl\nv 0 0 0\nv 1 0 0\nv 0 1 0\nusemtl a\nf 1 2 3\n")
    with pytest.raises(AssetError) as err:
        read_mesh_file(obj, KEY, root=inner)
    assert "inside the shot file's folder" in one_line(err)
    assert read_mesh_file(obj, KEY).images[0].rgba.shape == (2, 2, 4)  # without a root it is read


@pytest.mark.parametrize("text, expected", [
    ("v 0 0 0\nv 1 0 0\nv 0 1 0\n", "no faces"),
    ("v 0 0 nan\nv 1 0 0\nv 0 1 0\nf 1 2 3\n", "finite vertex positions"),
])
def test_unusable_geometry(tmp_path, text, expected):
    with pytest.raises(AssetError) as err:
        read_mesh_file(write(tmp_path, "bad.obj", text), KEY)
    assert expected in one_line(err)


def test_unreadable_file(tmp_path):
    (tmp_path / "bad.stl").write_bytes(b"solid x\nfacet normal 0 0 1\n outer loop\n vertex 0 0")
    with pytest.raises(AssetError) as err:
        read_mesh_file(tmp_path / "bad.stl", KEY)
    one_line(err)
