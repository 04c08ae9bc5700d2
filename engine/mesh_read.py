"""OBJ, PLY and STL files as a `SceneData`, so the compiler sees one kind of scene.

The geometry comes through trimesh (`load_scene(..., process=False)`: vertices neither merged nor
reordered); the OBJ's MTL files are read here, for their floats (trimesh keeps colours as
uint8 and the emission only as text).

* One node per node of trimesh's scene graph, with its world matrix; one mesh per trimesh
  geometry (an OBJ gives one per material), kept once however many nodes use it.
* Vertex normals only where the file has them (OBJ `vn`, PLY nx/ny/nz): trimesh would invent
  smooth ones on request, so they are taken from what its loader stored, before anything asks.
  A mesh without them is shaded flat, as glTF 2.0 section 3.7.2.1 asks.
* UVs from OBJ `vt` (PLY s/t): those formats count v upwards from the image's bottom, glTF
  downwards from its top, so v' = 1 - v.
* MTL, per material: Kd -> linear base colour (the MTL format names no colour space), map_Kd
  -> base-colour texture (sRGB), Ke -> emission, map_Ke -> emissive texture (sRGB), d (or
  1 - Tr) -> alpha (BLEND below 1), Ni -> index of refraction. Ks, Ns and illum have no
  counterpart in the metallic-roughness model and are not read: an OBJ material is a dielectric
  (metallic 0) of roughness 1, seen from both sides (OBJ has no notion of a back face). A
  material without Kd is white under a map_Kd, else 0.8 grey (rule of thumb). Options before a
  map's file name (-s, -o, -bm ...) are skipped; the file is the last word, as
  `assets.asset_files` lists it, relative to the OBJ's folder.

Errors are one-line `AssetError`s naming the key, the file and the place in it.
"""

from __future__ import annotations

import io
from pathlib import Path, PurePosixPath

import numpy as np

from lampyr.errors import AssetError

from .assets import _mtl_statements, _obj_mtllibs, _q
from .scene_data import ALPHA_BLEND, ALPHA_OPAQUE, Image, MaterialSpec, MeshData, NodeSpec, SceneData, TexRef

MESH_FILE_EXTENSIONS = (".obj", ".ply", ".stl")
DEFAULT_KD = 0.8  # an MTL material without Kd nor map_Kd (rule of thumb: a light grey)


# --------------------------------------------------------------------------------------------
# MTL


def _floats(rest: str, n: int):
    """The first n numbers of a statement, or None when they are not numbers."""
    try:
        values = [float(x) for x in rest.split()[:n]]
    except ValueError:
        return None
    if len(values) == 1 and n == 3:
        values = values * 3  # "Kd 0.5" is grey
    return values if len(values) == n and all(np.isfinite(values)) else None


def read_mtl(obj_path: Path) -> dict[str, dict]:
    """Material name -> {"kd", "ke", "map_kd", "map_ke", "d", "ni", "mtl"} over the OBJ's MTL files
    (later files and later statements win); numbers as float64 arrays, maps as the written text."""
    out: dict[str, dict] = {}
    for mtl in _obj_mtllibs(obj_path):
        mtl_path = obj_path.parent / mtl
        if not mtl_path.is_file():
            continue
        entry = None
        for word, rest in _mtl_statements(mtl_path):
            if word == "newmtl":
                entry = out.setdefault(rest.strip(), {"mtl": mtl})
            elif entry is None:
                continue
            elif word in ("kd", "ke"):
                values = _floats(rest, 3)
                if values is not None:
                    entry[word] = np.array(values, np.float64)
            elif word in ("d", "tr", "ni"):
                values = _floats(rest, 1)
                if values is not None:
                    entry["d" if word == "tr" else word] = 1.0 - values[0] if word == "tr" else values[0]
            elif word in ("map_kd", "map_ke") and rest.strip():
                entry[word] = rest.split()[-1]  # options (-s 1 1 1 ...) come before the file
    return out


def _read_image(file: Path, key: str, where: str) -> np.ndarray:
    """(H, W, 4) uint8 RGBA of a PNG / JPEG / ... read with Pillow."""
    import PIL.Image

    try:
        with PIL.Image.open(file) as im:
            rgba = np.array(im.convert("RGBA"), dtype=np.uint8)
    except Exception as exc:  # Pillow raises many kinds
        first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
        raise AssetError(key, f"expected a readable image for {where}, got {_q(file.name)}, which failed to "
                              f"load: {first}") from None
    return np.ascontiguousarray(rgba)


class _Images:
    """Images read once per file, in first-use order."""

    def __init__(self, obj_path: Path, key: str, root: Path | None):
        self.obj_path, self.key, self.root = obj_path, key, root
        self.images: list[Image] = []
        self.index: dict[Path, int] = {}

    def ref(self, written: str, where: str) -> TexRef:
        rel = PurePosixPath(written.replace("\\", "/"))
        file = self.obj_path.parent / rel
        if self.root is not None:
            inside = Path(self.root).resolve()
            if rel.is_absolute() or not file.resolve().is_relative_to(inside):
                raise AssetError(self.key, f"expected {where} to name a file inside the shot file's folder, "
                                           f"got {_q(written)}")
        if not file.is_file():
            raise AssetError(self.key, f"expected {where} to name an existing image (relative to the folder of "
                                       f"{_q(self.obj_path.name)}), got {_q(written)}, which is not there")
        real = file.resolve()
        if real not in self.index:
            self.index[real] = len(self.images)
            self.images.append(Image(rel.name, _read_image(file, self.key, where), source=where))
        return TexRef(self.index[real], source=where)


def _material(name: str, entry: dict, images: _Images) -> MaterialSpec:
    where = f"{entry['mtl']}: newmtl {name}"
    base_tex = images.ref(entry["map_kd"], f"{where}: map_Kd") if "map_kd" in entry else None
    emissive_tex = images.ref(entry["map_ke"], f"{where}: map_Ke") if "map_ke" in entry else None
    kd = entry.get("kd", np.ones(3) if base_tex is not None else np.full(3, DEFAULT_KD))
    ke = entry.get("ke", np.ones(3) if emissive_tex is not None else np.zeros(3))
    alpha = float(np.clip(entry.get("d", 1.0), 0.0, 1.0))
    ior = entry.get("ni", 1.5)
    return MaterialSpec(
        name=name, base_color=np.array([*kd, alpha], np.float64), base_color_tex=base_tex,
        metallic=0.0, roughness=1.0, emissive=np.asarray(ke, np.float64).copy(), emissive_tex=emissive_tex,
        alpha_mode=ALPHA_BLEND if alpha < 1.0 else ALPHA_OPAQUE, double_sided=True,
        ior=float(ior) if ior >= 1.0 else 1.5, source=where,
    )


# --------------------------------------------------------------------------------------------
# geometry


def _file_normals(geom):
    """(V, 3) normals the file gave (trimesh stores them in its cache when loading), or None."""
    cache = getattr(getattr(geom, "_cache", None), "cache", None)
    normals = cache.get("vertex_normals") if isinstance(cache, dict) else None
    if normals is None:
        return None
    normals = np.array(normals, np.float64)
    return normals if normals.shape == (len(geom.vertices), 3) else None


def _unit_normals(normals: np.ndarray, positions: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """Normals scaled to unit length; a zero or non-finite one is replaced by the area-weighted
    normal of the triangles around its vertex."""
    length = np.linalg.norm(normals, axis=1)
    bad = ~np.isfinite(length) | (length <= 1e-20)
    out = normals / np.where(bad, 1.0, length)[:, None]
    if np.any(bad):
        tri = positions[faces]
        area_n = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
        acc = np.zeros_like(positions)
        for k in range(3):
            np.add.at(acc, faces[:, k], area_n)
        acc_len = np.linalg.norm(acc, axis=1)
        fix = bad & (acc_len > 0)
        out[fix] = acc[fix] / acc_len[fix, None]
        out[bad & ~fix] = (0.0, 0.0, 1.0)
    return out


def _file_uvs(geom):
    """(V, 2) float64 UVs in glTF's convention (v' = 1 - v), or None."""
    uv = getattr(getattr(geom, "visual", None), "uv", None)
    if uv is None:
        return None
    uv = np.array(uv, np.float64)
    if uv.shape != (len(geom.vertices), 2):
        return None
    uv[:, 1] = 1.0 - uv[:, 1]  # OBJ / PLY count v up from the bottom row; glTF down from the top
    return uv


def _obj_text(path: Path) -> str:
    """An OBJ file's text: UTF-8 when it is, else Latin-1 (every byte is a character there, so a
    comment or name written in an older 8-bit encoding never stops the read)."""
    raw = path.read_bytes()
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        return raw.decode("latin-1")


def read_mesh_file(path, key: str, root=None) -> SceneData:
    """The `SceneData` of the OBJ, PLY or STL file at `path` (an existing file).

    root: when given, the shot's folder, outside of which no texture may lie. Errors are
    AssetError naming `key`.
    """
    import trimesh

    path = Path(path)
    ext = path.suffix.lower()
    if ext not in MESH_FILE_EXTENSIONS:
        raise AssetError(key, f"expected a file ending in {', '.join(MESH_FILE_EXTENSIONS)}, got {_q(path.name)}")
    try:
        if ext == ".obj":  # text: read here, so that any bytes decode (see _obj_text)
            scene = trimesh.load_scene(io.BytesIO(_obj_text(path).encode("utf-8")), file_type="obj",
                                       resolver=trimesh.resolvers.FilePathResolver(str(path)),
                                       process=False)
        else:
            scene = trimesh.load_scene(str(path), process=False)
    except RecursionError:
        raise AssetError(key, f"expected a readable {ext[1:].upper()} mesh, got {_q(path.name)}, which is "
                              f"nested too deeply to read") from None
    except Exception as exc:  # trimesh raises many kinds; the person needs one line
        first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
        raise AssetError(key, f"expected a readable {ext[1:].upper()} mesh, got {_q(path.name)}, which failed "
                              f"to load: {first}") from None
    mtl = read_mtl(path) if ext == ".obj" else {}
    images = _Images(path, key, None if root is None else Path(root))

    materials: list[MaterialSpec] = []
    material_index: dict[str, int] = {}
    meshes: list[MeshData] = []
    mesh_index: dict[str, int] = {}
    nodes: list[NodeSpec] = []
    for node in sorted(scene.graph.nodes_geometry):  # a fixed order
        matrix, geom_name = scene.graph[node]
        geom = scene.geometry[geom_name]
        faces = getattr(geom, "faces", None)
        if faces is None or len(faces) == 0:
            continue  # point clouds and paths carry nothing to render
        if geom_name not in mesh_index:
            where = f"{_q(path.name)} (part {_q(geom_name)})"
            positions = np.array(geom.vertices, np.float64)
            faces = np.array(faces, np.int64)
            if not np.all(np.isfinite(positions)):
                raise AssetError(key, f"expected finite vertex positions, got NaN or infinity in {where}")
            if faces.min() < 0 or faces.max() >= len(positions):
                raise AssetError(key, f"expected face indices below the vertex count {len(positions)}, got "
                                      f"indices {faces.min()}..{faces.max()} in {where}")
            normals = _file_normals(geom)
            if normals is not None:
                normals = _unit_normals(normals, positions, faces)
            mat_name = getattr(getattr(geom.visual, "material", None), "name", None)
            mat = -1
            if mat_name in mtl:
                if mat_name not in material_index:
                    material_index[mat_name] = len(materials)
                    materials.append(_material(mat_name, mtl[mat_name], images))
                mat = material_index[mat_name]
            mesh_index[geom_name] = len(meshes)
            meshes.append(MeshData(
                name=str(geom_name), positions=positions, faces=faces,
                face_material=np.full(len(faces), mat, np.int64), normals=normals, uv0=_file_uvs(geom),
                source=f"{path.name}: {geom_name}",
            ))
        m = np.array(matrix, np.float64)
        nodes.append(NodeSpec(name=str(node), matrix=None if np.array_equal(m, np.eye(4)) else m,
                              mesh=mesh_index[geom_name], source=f"{path.name}: {node}"))

    if not nodes:
        raise AssetError(key, f"expected a mesh with triangle faces, got {_q(path.name)} with no faces")
    return SceneData(path=str(path), nodes=tuple(nodes), roots=tuple(range(len(nodes))), meshes=tuple(meshes),
                     materials=tuple(materials), images=tuple(images.images))
