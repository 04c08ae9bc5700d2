"""A shot's files as one scene: its glTF scene file, its objects' mesh files and its own
materials, gathered into the tables the compiler hands to the kernels.

* The scene file (`scene = "assets/shot.glb"`) keeps its node hierarchy and instancing: each
  glTF mesh is stored once in its object space, and every node that uses it becomes an instance
  placed, frame by frame, by the node's world matrix. A node whose world matrix cannot be written
  as translation × rotation × per-axis scale (a shear from a non-uniformly scaled parent) gets
  its own copy of the mesh with the matrix applied, when it is not animated.
* An object's `mesh = "x.glb"` (or .obj, .ply, .stl) is flattened at the file's time 0: every
  node's mesh with its world matrix applied, placed by the object's own transform.
* Materials: the shot's `[[material]]` rows first (objects name them), then each file's
  materials; a file material whose name equals a shot material's is replaced by the shot's.
  A file mesh without a material gets the glTF default material (glTF files) or a mid grey
  diffuse (other formats).
* Textures are packed once per image (textures.py); every texture reference a material uses
  becomes one row of the reference table.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from lampyr.errors import AssetError

from .assets import resolve_asset
from .bsdf import DIFFUSE, GLASS, METAL, PLASTIC, material_row
from .gltf_animation import decompose_trs, world_matrices
from .material_table import M_DOUBLE_SIDED, M_GROUP, M_METALLIC, M_TEX_NORMAL, M_TRANSMISSION, PBR, row_from_spec
from .mattes import GLTF_DEFAULT, GREY_DEFAULT
from .mesh_table import MeshTableBuilder
from .scene_data import MaterialSpec, SceneData
from .skinning import SPACE_WORLD, deformed_vertices, is_deforming
from .tangents import vertex_tangents
from .textures import TEXREF_SIZE, TR_TEXCOORD, pack_images, shared_textures, texref_row

MATERIAL_TYPES = {"diffuse": DIFFUSE, "metal": METAL, "glass": GLASS, "plastic": PLASTIC, "pbr": PBR}
DEFAULT_GREY = (0.8, 0.8, 0.8)  # rule of thumb: a mid-light grey for meshes without a colour
GLTF_EXTENSIONS = (".glb", ".gltf")
SCENE_MESH_EXTENSIONS = (".glb", ".gltf", ".obj", ".ply", ".stl")
# Vertex coordinates are clamped to +-MAX_COORD scene units: the kernels store vertices as
# float32 (IEEE 754 binary32 ends at 3.4e38), and room is left for placements and bounds.
MAX_COORD = 1e30


def read_scene_file(root, rel_path: str, key: str) -> SceneData:
    """The SceneData of a shot-relative glTF, OBJ, PLY or STL file; errors are AssetError naming key."""
    path = resolve_asset(root, rel_path, key, SCENE_MESH_EXTENSIONS)
    if path.suffix.lower() in GLTF_EXTENSIONS:
        from .gltf_read import read_gltf

        return read_gltf(path, key)
    from .mesh_read import read_mesh_file

    return read_mesh_file(path, key, root)


def check_has_area(sd: SceneData, rel_path: str, key: str) -> None:
    """AssetError unless some triangle of the file has non-zero area: the sine of the angle
    between two of its edges above 1e-12, far above float64 rounding (a file of only degenerate
    triangles shows nothing). Edges are scaled to at most 1 first, so that huge but finite
    coordinates (1e308) cannot overflow the products."""
    for mesh in sd.meshes:
        p = np.asarray(mesh.positions, np.float64)
        f = np.asarray(mesh.faces, np.int64).reshape(-1, 3)
        if len(f) == 0 or len(p) == 0:
            continue
        big = float(np.abs(p).max())
        if not 0.0 < big < np.inf:
            continue
        with np.errstate(under="ignore"):  # tiny coordinates next to huge ones may flush to 0
            tri = (p / big)[f]  # coordinates in [-1, 1]: edges at most 2 long
            e1 = tri[:, 1] - tri[:, 0]
            e2 = tri[:, 2] - tri[:, 0]
            n1 = np.abs(e1).max(axis=1)
            n2 = np.abs(e2).max(axis=1)
            ok = (n1 > 0.0) & (n2 > 0.0)
            if not ok.any():
                continue
            u1 = e1[ok] / n1[ok, None]  # each edge's largest component is now +-1
            u2 = e2[ok] / n2[ok, None]
            sine = (np.linalg.norm(np.cross(u1, u2), axis=1)
                    / (np.linalg.norm(u1, axis=1) * np.linalg.norm(u2, axis=1)))
        if float(sine.max()) > 1e-12:
            return
    raise AssetError(key, f"expected a mesh with at least one triangle of non-zero area, got {rel_path!r}, "
                          f"whose triangles are all degenerate")


def shot_material_row(m) -> np.ndarray:
    """The table row of a shot's `[[material]]`."""
    kind = MATERIAL_TYPES[m.type]
    if kind != PBR:
        return material_row(kind, m.color, m.roughness, m.ior, m.emission)
    row = material_row(DIFFUSE, m.color, m.roughness, m.ior, m.emission)  # checks the values
    row[0] = PBR
    row[M_DOUBLE_SIDED] = 1.0  # a shot's materials are seen from both sides, as the legacy types are
    row[M_METALLIC] = m.metallic
    row[M_TRANSMISSION] = m.transmission
    return row


@dataclass(frozen=True, eq=False)
class Part:
    """One instance to place per frame: a sphere or a mesh of the mesh table.

    material: row for the whole instance, or -1 for the triangles' own; obj: the shot object
    that places it (its keys), or -1; node: the scene node that places it (its world matrix), or
    -1; neither: placed where it is (identity). box: (2, 3) object-space bounds. name: what its
    object ID matte calls it (mattes.py): the shot object's name or the scene node's.
    """

    kind: int
    mesh: int
    material: int
    box: np.ndarray
    sphere: tuple = (0.0, 0.0, 0.0, 0.0)
    obj: int = -1
    node: int = -1
    name: str = ""


@dataclass(eq=False)
class Assembly:
    """What `assemble` gathers: the tables and the instance list (see compiler.Geometry)."""

    meshes: object  # MeshTable
    parts: list
    mats: np.ndarray
    texrefs: np.ndarray
    tex_pixels: np.ndarray
    tex_info: np.ndarray
    scene: SceneData | None
    deforming: list = field(default_factory=list)  # (node, material rows (F,)) rebuilt per frame
    mat_names: tuple = ()  # the name of each row of mats (ID mattes, mattes.py)


class _Tables:
    """Materials, images and texture references as they are gathered."""

    def __init__(self, shot):
        self.rows = [shot_material_row(m) for m in shot.materials]
        self.names = [m.name for m in shot.materials]  # one per row (ID mattes, mattes.py)
        for row, m in zip(self.rows, shot.materials):
            row[M_GROUP] = shot.group_index(m.group)  # the light group of its emission
        self.shot = shot
        self.by_name = {m.name: i for i, m in enumerate(shot.materials)}
        self.images: list = []
        self.texrefs: list = []
        self._grey = None
        self._gltf_default = None

    def file_materials(self, sd: SceneData, gltf: bool) -> np.ndarray:
        """Rows of a file's materials, (len(materials) + 1,) int64, the last for 'no material'."""
        image_base = len(self.images)
        self.images.extend(sd.images)

        def ref_row(ref, srgb):
            row = texref_row(ref, srgb)
            row[0] = ref.image + image_base  # the image's row in the packed table
            self.texrefs.append(row)
            return len(self.texrefs) - 1

        out = []
        for spec in sd.materials:
            if spec.name in self.by_name:
                out.append(self.by_name[spec.name])  # the shot's material of that name replaces it
                continue
            self.rows.append(row_from_spec(spec, ref_row))
            self.names.append(spec.name)
            self.rows[-1][M_GROUP] = self.shot.group_index(self.shot.scene_groups.get(spec.name))
            out.append(len(self.rows) - 1)
        out.append(self.default_row(gltf))
        return np.array(out, np.int64)

    def default_row(self, gltf: bool) -> int:
        if gltf:
            if self._gltf_default is None:  # glTF 2.0 spec, 3.9.6: the default material
                self.rows.append(row_from_spec(MaterialSpec("default"), None))
                self.names.append(GLTF_DEFAULT)
                self._gltf_default = len(self.rows) - 1
            return self._gltf_default
        if self._grey is None:
            self.rows.append(material_row(DIFFUSE, DEFAULT_GREY))
            self.names.append(GREY_DEFAULT)
            self._grey = len(self.rows) - 1
        return self._grey


_FILE = object()  # "as the file gives it"


def _mesh_arrays(mesh, mat_rows: np.ndarray, rows: list, texrefs: list, positions=None, normals=None,
                 tangents=_FILE):
    """(positions, faces, tri_mat, normals, uv0, uv1, tangents) of a MeshData for the builder.

    positions / normals / tangents replace the file's (a placed or deformed mesh); tangents are
    computed (tangents.py) when a normal-mapped material needs them and there are none, from the
    UV set its normal texture reads (texrefs: the texture-reference rows so far)."""
    positions = mesh.positions if positions is None else positions
    # huge but finite coordinates are clamped: the kernels keep vertices as float32 (see MAX_COORD)
    positions = np.clip(np.asarray(positions, np.float64), -MAX_COORD, MAX_COORD)
    normals = mesh.normals if normals is None else normals
    tangents = mesh.tangents if tangents is _FILE else tangents
    faces = np.asarray(mesh.faces, np.int64)
    tri_mat = mat_rows[np.asarray(mesh.face_material, np.int64)]  # -1 indexes the default row
    if tangents is None and normals is not None:
        mapped = [int(rows[int(m)][M_TEX_NORMAL]) for m in np.unique(tri_mat) if rows[int(m)][M_TEX_NORMAL] >= 0]
        if mapped:
            second = texrefs[mapped[0]][TR_TEXCOORD] >= 1.0
            uv = mesh.uv1 if second and mesh.uv1 is not None else mesh.uv0
            uv = mesh.uv1 if uv is None else uv
            if uv is not None:
                tangents = vertex_tangents(positions, normals, uv, faces)
    return positions, faces, tri_mat, normals, mesh.uv0, mesh.uv1, tangents


def _placed(mesh, matrix: np.ndarray):
    """(positions, normals, tangents, mirrored) of a mesh under a (4, 4) matrix: points by the
    matrix, normals by its inverse transpose, tangent directions by its 3×3 part with their
    handedness flipped under a mirror (negative determinant)."""
    a = matrix[:3, :3]
    mirrored = bool(np.linalg.det(a) < 0.0)
    positions = np.asarray(mesh.positions, np.float64) @ a.T + matrix[:3, 3]
    normals = tangents = None
    if mesh.normals is not None:
        normals = _unit_rows(np.asarray(mesh.normals, np.float64) @ np.linalg.inv(a))  # (A^-T n) as rows
    if mesh.tangents is not None:
        t = np.asarray(mesh.tangents, np.float64)
        tangents = np.concatenate([_unit_rows(t[:, :3] @ a.T), t[:, 3:4] * (-1.0 if mirrored else 1.0)], axis=1)
    return positions, normals, tangents, mirrored


def _unit_rows(v: np.ndarray) -> np.ndarray:
    length = np.linalg.norm(v, axis=1, keepdims=True)
    return v / np.where(length > 0, length, 1.0)


def _reversed(arrays: tuple) -> tuple:
    """Builder arrays with every face's winding reversed (outward stays outward under a mirror)."""
    return (arrays[0], arrays[1][:, ::-1].copy()) + arrays[2:]


def assemble(shot, scene: SceneData | None, object_files: dict, texture_file=None) -> Assembly:
    """Gather the shot's objects, its scene file and its mesh files into the scene's tables.

    scene: the shot's scene file read (or None); object_files: object index -> SceneData of its
    mesh file; texture_file: a path naming this scene's content, where the packed texels are kept
    and mapped from (textures.shared_textures), so the processes of one machine share one copy.
    The Assembly's scene holds no images (they are packed).
    """
    from .scene import KIND_MESH, KIND_SPHERE

    tables = _Tables(shot)
    builder = MeshTableBuilder()
    parts: list[Part] = []
    deforming: list = []

    for oi, obj in enumerate(shot.objects):
        if obj.sphere is not None:
            (cx, cy, cz), r = obj.sphere.center, obj.sphere.radius
            box = np.array([[cx - r, cy - r, cz - r], [cx + r, cy + r, cz + r]], float)
            parts.append(Part(KIND_SPHERE, -1, tables.by_name[obj.material], box, (cx, cy, cz, r), obj=oi,
                              name=obj.name))
            continue
        sd = object_files[oi]
        gltf = Path(sd.path).suffix.lower() in GLTF_EXTENSIONS
        mat_rows = tables.file_materials(sd, gltf)
        override = tables.by_name[obj.material] if obj.material is not None else -1
        worlds = world_matrices(sd, 0.0) if sd.nodes else np.zeros((0, 4, 4))
        for node in _mesh_nodes(sd):
            mesh = sd.meshes[sd.nodes[node].mesh]
            if len(mesh.faces) == 0:
                continue
            if is_deforming(sd, node):  # a skin or morph targets: the pose at the file's time 0
                pos, nrm, space = deformed_vertices(sd, node, 0.0, worlds)
                if space != SPACE_WORLD:
                    posed = replace(mesh, positions=pos, normals=nrm, tangents=None)
                    pos, nrm, _, _ = _placed(posed, worlds[node])
                arrays = _mesh_arrays(mesh, mat_rows, tables.rows, tables.texrefs, pos, nrm, None)
            else:
                pos, nrm, tan, mirrored = _placed(mesh, worlds[node])
                arrays = _mesh_arrays(mesh, mat_rows, tables.rows, tables.texrefs, pos, nrm, tan)
                if mirrored:
                    arrays = _reversed(arrays)
            m = builder.add(*arrays)
            parts.append(Part(KIND_MESH, m, override, _box(arrays[0]), obj=oi, name=obj.name))

    if scene is not None:
        mat_rows = tables.file_materials(scene, True)
        rest = world_matrices(scene, 0.0)
        mesh_index: dict[int, int] = {}
        animated = {c.node for c in scene.channels}
        for node in _mesh_nodes(scene):
            spec = scene.nodes[node]
            mesh = scene.meshes[spec.mesh]
            if len(mesh.faces) == 0:
                continue
            if is_deforming(scene, node):
                deforming.append((node, mat_rows))
                continue
            _, _, _, exact = decompose_trs(rest[node])
            if not exact and not _moves(scene, node, animated):
                pos, nrm, tan, mirrored = _placed(mesh, rest[node])
                arrays = _mesh_arrays(mesh, mat_rows, tables.rows, tables.texrefs, pos, nrm, tan)
                m = builder.add(*(_reversed(arrays) if mirrored else arrays))
                parts.append(Part(KIND_MESH, m, -1, _box(arrays[0]), name=spec.name))  # placed where it is
                continue
            if spec.mesh not in mesh_index:
                arrays = _mesh_arrays(mesh, mat_rows, tables.rows, tables.texrefs)
                mesh_index[spec.mesh] = builder.add(*arrays)
            m = mesh_index[spec.mesh]
            parts.append(Part(KIND_MESH, m, -1, _box(mesh.positions), node=node, name=spec.name))

    if texture_file is None:
        tex_pixels, tex_info = pack_images(tables.images)
    else:
        tex_pixels, tex_info = shared_textures(texture_file, lambda: pack_images(tables.images))
    tables.images.clear()
    if scene is not None:
        scene = replace(scene, images=())  # the texels live on in tex_pixels only

    texrefs = np.array(tables.texrefs, np.float64).reshape(-1, TEXREF_SIZE) if tables.texrefs \
        else np.zeros((1, TEXREF_SIZE))
    return Assembly(
        meshes=builder, parts=parts, mats=np.ascontiguousarray(np.array(tables.rows, np.float64)),
        texrefs=np.ascontiguousarray(texrefs), tex_pixels=tex_pixels, tex_info=tex_info, scene=scene,
        deforming=deforming, mat_names=tuple(tables.names),
    )


def shown_nodes(sd: SceneData) -> list[int]:
    """Nodes of the shown scene (its roots and their descendants), in index order."""
    seen, stack = set(), list(sd.roots)
    while stack:
        n = stack.pop()
        if n in seen:
            continue
        seen.add(n)
        stack.extend(sd.nodes[n].children)
    return sorted(seen)


def _mesh_nodes(sd: SceneData) -> list[int]:
    """Nodes of the shown scene that carry a mesh, in index order."""
    return [n for n in shown_nodes(sd) if sd.nodes[n].mesh >= 0]


def sheared_moving_nodes(sd: SceneData) -> list[int]:
    """Mesh nodes whose world matrix has a shear and that move: rendered with the nearest
    rotation and scale (a static sheared node gets a baked copy instead)."""
    rest = world_matrices(sd, 0.0)
    animated = {c.node for c in sd.channels}
    return [n for n in _mesh_nodes(sd) if _moves(sd, n, animated) and not decompose_trs(rest[n])[3]]


def _moves(sd: SceneData, node: int, animated: set) -> bool:
    """True when the node or one of its ancestors is animated."""
    while node >= 0:
        if node in animated:
            return True
        node = sd.nodes[node].parent
    return False


def _box(positions) -> np.ndarray:
    p = np.asarray(positions, np.float64)
    return np.array([p.min(axis=0), p.max(axis=0)])


__all__ = ["Assembly", "Part", "assemble", "read_scene_file", "shot_material_row", "AssetError"]
