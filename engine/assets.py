"""The files a shot refers to: path checks, the files a mesh or scene file pulls in, and
environment maps (through OpenEXR).

Every path in a shot is relative to the shot file's folder (the shot's `root`) and may not leave
it: a path is refused when it is absolute, uses a backslash, or has a `..` part. The check is on
the text of the path (a symbolic link inside the folder is followed as the system does), which is
what keeps a submitted shot from naming a file elsewhere on the head's disk.

`asset_files` lists a mesh or scene file with every file it references (an OBJ's MTL files and
their texture maps, a glTF's buffers and images), which is what submitting a shot sends. The
meshes themselves are read by scene_import.py (glTF through gltf_read.py, OBJ / PLY / STL
through mesh_read.py, which also uses the MTL statement readers here).
"""

from __future__ import annotations

import json
from urllib.parse import unquote
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


def check_inside(shot_root, path: Path, written: str, key: str) -> None:
    """AssetError when `path` (a file under the shot's folder) is a symbolic link, or lies under
    one, whose target is outside the shot's folder: only files inside the folder are packed
    (checked with the shot's files, `compiler.check_shot_files`; the paths as written are
    checked by `check_relative`)."""
    root = Path(shot_root).resolve()
    try:
        target = Path(path).resolve()
    except (OSError, RuntimeError):  # a loop of links
        raise AssetError(key, f"expected a file inside the shot file's folder, got {_q(written)}, a link "
                              f"that does not resolve") from None
    if not target.is_relative_to(root):
        raise AssetError(key, f"expected a file inside the shot file's folder, got {_q(written)}, a link to "
                              f"{_q(str(target))} outside it (copy the file into the folder instead)")


# --------------------------------------------------------------------------------------------
# the files an asset pulls in, for submitting


def _obj_mtllibs(path: Path) -> list[str]:
    """The names after `mtllib` in an OBJ file (the statement may list several)."""
    names = []
    with open(path, "r", encoding="utf-8", errors="replace") as fh:
        for line in fh:
            words = line.split()
            if words and words[0] == "mtllib":
                names.extend(words[1:])
    return names


def _mtl_statements(path: Path):
    """(keyword lowercased, rest of line) for every statement of an MTL file."""
    with open(path, "r", encoding="utf-8", errors="replace") as fh:
        for line in fh:
            parts = line.strip().split(None, 1)
            if parts and not parts[0].startswith("#"):
                yield parts[0].lower(), (parts[1] if len(parts) > 1 else "")


def _referenced(path: Path) -> list[tuple[str, str]]:
    """(path, file it is written in) of every file the mesh file at `path` reads besides itself;
    both relative to `path`'s folder (an MTL file's maps are relative to its OBJ's folder)."""
    ext = path.suffix.lower()
    refs: list[tuple[str, str]] = []
    if ext == ".obj":
        for mtl in _obj_mtllibs(path):
            refs.append((mtl, path.name))
            mtl_path = path.parent / mtl
            if mtl_path.is_file():
                for word, rest in _mtl_statements(mtl_path):
                    if word in _MTL_MAPS and rest:
                        refs.append((rest.split()[-1], mtl))  # options (-bm 1 ...) come before the file
    elif ext in (".gltf", ".glb"):
        doc = _gltf_json(path)
        if not isinstance(doc, dict):
            return refs  # the reader reports the unreadable file
        items = [item for name in ("buffers", "images")
                 if isinstance(doc.get(name), list) for item in doc[name]]  # else the reader refuses it
        for item in items:
            uri = item.get("uri") if isinstance(item, dict) else None
            if isinstance(uri, str) and not uri.startswith("data:"):
                refs.append((unquote(uri), path.name))  # glTF URIs are percent-encoded (RFC 3986)
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
    except (OSError, ValueError, RecursionError):  # RecursionError: JSON nested too deeply
        return None


def asset_files(shot_root, rel_path: str, key: str) -> list[str]:
    """`rel_path` and every existing file it references (MTL, textures, glTF buffers), as
    shot-relative POSIX paths; a reference that leaves the shot's folder is an AssetError."""
    rel = check_relative(rel_path, key)
    out = [str(rel)]
    if shot_root is None:
        return out
    root = Path(shot_root)
    for ref, written_in in _referenced(root / rel):
        source = str(rel.parent / written_in)
        outside = AssetError(key, f"expected every file {_q(rel_path)} uses to lie inside the shot "
                                  f"file's folder, got a reference to {_q(ref)} in {_q(source)}")
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

