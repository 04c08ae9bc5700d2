"""The files a shot refers to: meshes (through trimesh) and environment maps (through OpenEXR).

Every path in a shot is relative to the shot file's folder (the shot's `root`) and may not leave
it: a path is refused when it is absolute, uses a backslash, or has a `..` part. The check is on
the text of the path (a symbolic link inside the folder is followed as the system does), which is
what keeps a submitted shot from naming a file elsewhere on the head's disk.

Colours are taken as linear: glTF 2.0 defines `baseColorFactor` as linear already, and the MTL
format says nothing about `Kd`, which lampyr also reads as linear.
"""

from __future__ import annotations

import json
from urllib.parse import unquote
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

import numpy as np

from lampyr.errors import AssetError

MESH_EXTENSIONS = (".glb", ".gltf", ".obj", ".ply", ".stl")
MAP_EXTENSIONS = (".exr",)
_MTL_MAPS = ("map_kd", "map_ka", "map_ks", "map_ke", "map_ns", "map_d", "map_bump", "bump", "disp",
             "norm", "map_pr", "map_pm")


def _q(text) -> str:
    """A value as it would be written in TOML (strings in double quotes)."""
    return json.dumps(text) if isinstance(text, str) else repr(text)


@dataclass(frozen=True, eq=False)
class MeshPart:
    """One triangle list of a mesh file, in the file's world space (its node matrices applied).

    vertices: (v, 3) float64; faces: (f, 3) int64 indices into vertices;
    base_color: (3,) float64 linear RGB, or None when the file gives no colour.
    """

    name: str
    vertices: np.ndarray
    faces: np.ndarray
    base_color: np.ndarray | None


def check_relative(rel_path, key: str) -> PurePosixPath:
    """The shot-relative path `rel_path` as a PurePosixPath, refused if it could leave the root."""
    if not isinstance(rel_path, str) or not rel_path.strip():
        raise AssetError(key, f"expected a file path relative to the shot file's folder, got {_q(rel_path)}")
    if "\\" in rel_path:
        raise AssetError(key, f"expected a path with forward slashes (assets/sky.exr), got {_q(rel_path)}")
    rel = PurePosixPath(rel_path)
    if rel.is_absolute() or (rel.parts and rel.parts[0].endswith(":")):
        raise AssetError(key, f"expected a path relative to the shot file's folder, got the absolute path "
                              f"{_q(rel_path)}")
    if ".." in rel.parts:
        raise AssetError(key, f"expected a path inside the shot file's folder (no '..'), got {_q(rel_path)}")
    return rel


def check_asset_path(rel_path, key: str, extensions=MESH_EXTENSIONS) -> PurePosixPath:
    """`check_relative`, and the file's extension is one of `extensions`."""
    rel = check_relative(rel_path, key)
    if rel.suffix.lower() not in extensions:
        raise AssetError(key, f"expected a file ending in {', '.join(extensions)}, got {_q(rel_path)}")
    return rel


def resolve_asset(shot_root, rel_path, key: str, extensions=MESH_EXTENSIONS) -> Path:
    """The existing file `shot_root / rel_path`, after `check_asset_path`."""
    rel = check_asset_path(rel_path, key, extensions)
    if shot_root is None:
        raise AssetError(key, f"expected a shot read from a file (paths are relative to its folder), "
                              f"got a shot without a folder for {_q(rel_path)}")
    path = Path(shot_root) / rel
    if not path.is_file():
        raise AssetError(key, f"expected an existing file (paths are relative to the shot file's folder, "
                              f"{Path(shot_root)}), got {_q(rel_path)}, which is not there")
    return path


# --------------------------------------------------------------------------------------------
# the files an asset pulls in, for bundling


def _obj_mtllibs(path: Path) -> list[str]:
    """The names after `mtllib` in an OBJ file (the statement may list several)."""
    names = []
    with open(path, "r", encoding="utf-8", errors="replace") as fh:
        for line in fh:
            if line.startswith("mtllib"):
                names.extend(line.split()[1:])
    return names


def _mtl_statements(path: Path):
    """(keyword lowercased, rest of line) for every statement of an MTL file."""
    with open(path, "r", encoding="utf-8", errors="replace") as fh:
        for line in fh:
            parts = line.strip().split(None, 1)
            if parts and not parts[0].startswith("#"):
                yield parts[0].lower(), (parts[1] if len(parts) > 1 else "")


def _referenced(path: Path) -> list[str]:
    """Paths (relative to `path`'s folder) that the mesh file at `path` reads besides itself."""
    ext = path.suffix.lower()
    refs: list[str] = []
    if ext == ".obj":
        for mtl in _obj_mtllibs(path):
            refs.append(mtl)
            mtl_path = path.parent / mtl
            if mtl_path.is_file():
                for word, rest in _mtl_statements(mtl_path):
                    if word in _MTL_MAPS and rest:
                        refs.append(rest.split()[-1])  # options (-bm 1 ...) come before the file
    elif ext in (".gltf", ".glb"):
        doc = _gltf_json(path)
        if not isinstance(doc, dict):
            return refs  # the reader reports the unreadable file
        for item in doc.get("buffers", []) + doc.get("images", []):
            uri = item.get("uri") if isinstance(item, dict) else None
            if isinstance(uri, str) and not uri.startswith("data:"):
                refs.append(unquote(uri))  # glTF URIs are percent-encoded (RFC 3986)
    return refs


def _gltf_json(path: Path):
    """The JSON document of a .gltf file, or of a .glb's first chunk (glTF 2.0 spec, section 4.4:
    a 12-byte header, then chunks of length, type and data, the first one JSON); None when it is
    not readable."""
    try:
        if path.suffix.lower() == ".gltf":
            return json.loads(path.read_text(encoding="utf-8"))
        with open(path, "rb") as fh:
            header = fh.read(20)
            if len(header) < 20 or header[:4] != b"glTF":
                return None
            length = int.from_bytes(header[12:16], "little")
            if header[16:20] != b"JSON" or length > 256 * 1024**2:
                return None
            return json.loads(fh.read(length).decode("utf-8"))
    except (OSError, ValueError):
        return None


def asset_files(shot_root, rel_path: str, key: str) -> list[str]:
    """`rel_path` and every existing file it references (MTL, textures, glTF buffers), as
    shot-relative POSIX paths; a reference that leaves the shot's folder is an AssetError."""
    rel = check_relative(rel_path, key)
    out = [str(rel)]
    if shot_root is None:
        return out
    root = Path(shot_root)
    for ref in _referenced(root / rel):
        outside = AssetError(key, f"expected every file {_q(rel_path)} uses to lie inside the shot "
                                  f"file's folder, got a reference to {_q(ref)}")
        written = PurePosixPath(ref.replace("\\", "/"))
        if written.is_absolute() or (written.parts and ":" in written.parts[0]):
            raise outside
        parts: list[str] = []
        for p in (rel.parent / written).parts:  # normalise "a/../b" lexically
            if p == "..":
                if not parts:
                    raise outside
                parts.pop()
            elif p != ".":
                parts.append(p)
        if parts and (root / PurePosixPath(*parts)).is_file():
            out.append(str(PurePosixPath(*parts)))
    return out


# --------------------------------------------------------------------------------------------
# meshes


def _mtl_colors(path: Path) -> dict[str, np.ndarray]:
    """Material name -> Kd (3,) float64 over the OBJ's MTL files (trimesh keeps only uint8)."""
    colors: dict[str, np.ndarray] = {}
    for mtl in _obj_mtllibs(path):
        mtl_path = path.parent / mtl
        if not mtl_path.is_file():
            continue
        name = None
        for word, rest in _mtl_statements(mtl_path):
            if word == "newmtl":
                name = rest.strip()
            elif word == "kd" and name is not None:
                try:
                    colors[name] = np.array([float(x) for x in rest.split()[:3]], np.float64)
                except ValueError:
                    pass
    return colors


def _gltf_colors(path: Path) -> list[tuple[str | None, np.ndarray | None]]:
    """(name, baseColorFactor rgb (3,) float64 or None) per glTF material, read with pygltflib."""
    import pygltflib

    doc = pygltflib.GLTF2().load(str(path))
    out = []
    for m in doc.materials or []:
        pbr = m.pbrMetallicRoughness
        factor = None if pbr is None else pbr.baseColorFactor
        if factor is None and (pbr is None or pbr.baseColorTexture is None):
            factor = [1.0, 1.0, 1.0]  # glTF 2.0 spec: the factor defaults to 1 (white)
        out.append((m.name, None if factor is None else np.array(factor[:3], np.float64)))
    return out


def _base_color(geom, ext: str, mtl: dict, gltf: list) -> np.ndarray | None:
    """The linear base colour of one trimesh geometry, preferring the file's own floats."""
    material = getattr(geom.visual, "material", None)
    if material is None:
        return None
    name = getattr(material, "name", None)
    if ext == ".obj":
        if name in mtl:
            return mtl[name]
        coarse = getattr(material, "diffuse", None)
    else:
        coarse = getattr(material, "baseColorFactor", None)
        if gltf:
            # trimesh rounds the factor to uint8 (round(f * 255)); pick the file's float that
            # has this name and rounds to the same bytes
            match = [c for n, c in gltf if n == name and c is not None and (
                coarse is None or np.all(np.abs(c * 255.0 - np.asarray(coarse[:3], float)) <= 0.5 + 1e-9))]
            if match and all(np.array_equal(match[0], c) for c in match):
                return match[0]
    if coarse is None:
        return None
    return np.asarray(coarse[:3], np.float64) / 255.0


def load_mesh(shot_root, rel_path: str, key: str) -> list[MeshPart]:
    """Every triangle part of the mesh file `shot_root / rel_path` in the file's world space.

    A scene (glTF/GLB, multi-material OBJ) is flattened through its node graph: each instance of
    a geometry becomes its own part with the node's world matrix applied (faces reversed under a
    mirroring matrix, so outward stays outward). Errors are AssetError naming `key`.
    """
    import trimesh

    path = resolve_asset(shot_root, rel_path, key)
    ext = path.suffix.lower()
    try:
        scene = trimesh.load_scene(str(path), process=False)
        mtl = _mtl_colors(path) if ext == ".obj" else {}
        gltf = _gltf_colors(path) if ext in (".glb", ".gltf") else []
    except Exception as exc:  # trimesh raises many kinds; the person needs one line
        first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
        raise AssetError(key, f"expected a readable {ext[1:].upper()} mesh ({', '.join(MESH_EXTENSIONS)}), "
                              f"got {_q(rel_path)}, which failed to load: {first}") from None

    parts: list[MeshPart] = []
    for node in sorted(scene.graph.nodes_geometry):  # a fixed order: part indices feed the sampler
        matrix, geom_name = scene.graph[node]
        geom = scene.geometry[geom_name]
        faces = getattr(geom, "faces", None)
        if faces is None or len(faces) == 0:
            continue  # point clouds and paths carry nothing to render
        vertices = np.asarray(geom.vertices, np.float64)
        faces = np.asarray(faces, np.int64)
        if not np.all(np.isfinite(vertices)):
            raise AssetError(key, f"expected finite vertex positions, got NaN or infinity in {_q(rel_path)}"
                                  f" (part {_q(geom_name)})")
        if faces.min() < 0 or faces.max() >= len(vertices):
            raise AssetError(key, f"expected face indices below the vertex count {len(vertices)}, got "
                                  f"indices {faces.min()}..{faces.max()} in {_q(rel_path)} (part {_q(geom_name)})")
        m = np.asarray(matrix, np.float64)
        world = vertices @ m[:3, :3].T + m[:3, 3]
        if np.linalg.det(m[:3, :3]) < 0.0:
            faces = faces[:, ::-1].copy()
        parts.append(MeshPart(str(node), world, faces, _base_color(geom, ext, mtl, gltf)))

    if not parts:
        raise AssetError(key, f"expected a mesh with triangle faces, got {_q(rel_path)} with no faces")
    if not any(_has_area(p) for p in parts):
        raise AssetError(key, f"expected a mesh with at least one triangle of non-zero area, got "
                              f"{_q(rel_path)}, whose triangles are all degenerate")
    return parts


def _has_area(part: MeshPart) -> bool:
    tri = part.vertices[part.faces]
    cross = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    extent = float(np.ptp(part.vertices, axis=0).max()) if len(part.vertices) else 0.0
    # an area below float64 rounding of the mesh's size squared counts as zero
    return extent > 0.0 and float(np.linalg.norm(cross, axis=1).max()) > 1e-12 * extent * extent


# --------------------------------------------------------------------------------------------
# environment maps


def load_environment_map(shot_root, rel_path: str, key: str) -> np.ndarray:
    """Latitude-longitude radiance map `(h, w, 3) float64` from an EXR's R, G, B channels.

    Row 0 is the top of the image (straight up, +y). HALF and FLOAT channels are accepted; every
    value must be finite and >= 0 (radiance).
    """
    import OpenEXR

    path = resolve_asset(shot_root, rel_path, key, MAP_EXTENSIONS)
    try:
        with OpenEXR.File(str(path), separate_channels=True) as exr:
            channels = {name: np.array(ch.pixels) for name, ch in exr.channels().items()}
    except Exception as exc:
        first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
        raise AssetError(key, f"expected a readable OpenEXR file, got {_q(rel_path)}, which failed to load: "
                              f"{first}") from None
    missing = [c for c in "RGB" if c not in channels]
    if missing:
        raise AssetError(key, f"expected channels R, G and B, got {', '.join(sorted(channels)) or 'none'} "
                              f"in {_q(rel_path)}")
    for c in "RGB":
        if channels[c].dtype.kind != "f" or channels[c].ndim != 2:
            raise AssetError(key, f"expected HALF or FLOAT channels, got {channels[c].dtype} in channel {c}"
                                  f" of {_q(rel_path)}")
    rgb = np.stack([channels[c].astype(np.float64) for c in "RGB"], axis=-1)
    if not np.all(np.isfinite(rgb)):
        raise AssetError(key, f"expected finite radiance, got NaN or infinity in {_q(rel_path)}")
    if rgb.min() < 0.0:
        raise AssetError(key, f"expected radiance >= 0, got {float(rgb.min()):g} in {_q(rel_path)}")
    return np.ascontiguousarray(rgb)

