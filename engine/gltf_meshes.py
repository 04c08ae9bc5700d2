"""glTF 2.0 meshes -> `MeshData`: primitives decoded, turned into triangle lists, concatenated.

Source: glTF 2.0 specification (Khronos, 2021) section 3.7.2 (primitives: modes and their
triangle orders, attributes, flat normals when NORMAL is absent, morph targets). The choices this
module makes are listed in `gltf_read.py`'s docstring.
"""

from __future__ import annotations

import numpy as np

from lampyr.engine.gltf_accessors import GltfFile, index_of, quoted, vector
from lampyr.engine.scene_data import MeshData

MODE_NAMES = {0: "POINTS", 1: "LINES", 2: "LINE_LOOP", 3: "LINE_STRIP", 4: "TRIANGLES",
              5: "TRIANGLE_STRIP", 6: "TRIANGLE_FAN"}


def triangle_list(indices: np.ndarray, mode: int) -> np.ndarray:
    """Vertex indices (N,) of a TRIANGLES / TRIANGLE_STRIP / TRIANGLE_FAN primitive -> (F, 3).

    Spec 3.7.2.1: strip triangle i is (v[i], v[i + 1 + i % 2], v[i + 2 - i % 2]); fan triangle i
    is (v[i + 1], v[i + 2], v[0]); both keep the first triangle's winding."""
    v = np.asarray(indices, np.int64)
    if mode == 4:
        return v[: len(v) - len(v) % 3].reshape(-1, 3)
    n = max(len(v) - 2, 0)
    i = np.arange(n)
    if mode == 5:
        return np.stack([v[i], v[i + 1 + i % 2], v[i + 2 - i % 2]], axis=1)
    return np.stack([v[i + 1], v[i + 2], np.zeros(n, np.int64) + (v[0] if n else 0)], axis=1)


def _attribute(gf: GltfFile, attrs: dict, name: str, where: str, count: int, width: int):
    """Attribute `name` as float64 (count, width) or None when the primitive lacks it."""
    index = attrs.get(name)
    if index is None:
        return None
    awhere = f"{where}.{name}"
    arr = gf.accessor(index, awhere)
    if arr.ndim != 2 or arr.shape[1] != width:
        gf.fail(awhere, f"expected VEC{width} elements, got accessors[{index}] of type "
                        f"{gf.doc.accessors[index].type}")
    if len(arr) != count:
        gf.fail(awhere, f"expected {count} elements (the POSITION count), got {len(arr)}")
    if arr.dtype.kind == "f" and not np.all(np.isfinite(arr)):
        gf.fail(awhere, "expected finite numbers, got NaN or infinity")
    return arr


def _check_mode(gf: GltfFile, prim, where: str) -> int:
    mode = prim.mode if prim.mode is not None else 4
    if mode not in (4, 5, 6):
        gf.fail(where + ".mode", f"expected a triangle mode (4 TRIANGLES, 5 TRIANGLE_STRIP, 6 TRIANGLE_FAN), "
                                 f"got {quoted(mode)} ({MODE_NAMES.get(mode, 'unknown')}); lampyr renders surfaces only")
    return mode


def _vertices(gf: GltfFile, attrs: dict, targets: list, where: str) -> dict:
    """The vertex arrays of a primitive (POSITION (V, 3), NORMAL unit, TEXCOORD_n, TANGENT,
    JOINTS_0, WEIGHTS_0, and `targets`: one {"POSITION", "NORMAL"} dict per morph target)."""
    aw = where + ".attributes"
    if "POSITION" not in attrs:
        gf.fail(aw, "expected a POSITION attribute, got none")
    pos = gf.accessor(attrs["POSITION"], aw + ".POSITION").astype(np.float64)
    if pos.ndim != 2 or pos.shape[1] != 3:
        gf.fail(aw + ".POSITION", "expected VEC3 positions, got another type")
    if not np.all(np.isfinite(pos)):
        bad = int(np.flatnonzero(~np.all(np.isfinite(pos), axis=1))[0])
        gf.fail(aw + ".POSITION", f"expected finite positions, got NaN or infinity at vertex {bad}")
    count = len(pos)
    out = {"POSITION": pos}
    normals = _attribute(gf, attrs, "NORMAL", aw, count, 3)
    if normals is not None:
        length = np.linalg.norm(normals, axis=1, keepdims=True)
        out["NORMAL"] = np.divide(normals, length, out=np.zeros_like(normals), where=length > 0)
    for name, width in (("TEXCOORD_0", 2), ("TEXCOORD_1", 2), ("TANGENT", 4), ("WEIGHTS_0", 4)):
        out[name] = _attribute(gf, attrs, name, aw, count, width)
    if attrs.get("JOINTS_0") is not None:
        joints = gf.accessor(attrs["JOINTS_0"], aw + ".JOINTS_0", normalize=False)
        if joints.shape != (count, 4) or joints.dtype.kind != "i":
            gf.fail(aw + ".JOINTS_0", f"expected {count} VEC4 unsigned integer joint indices, got another shape or type")
        out["JOINTS_0"] = joints
    out["targets"] = [{name: _attribute(gf, target, name, f"{where}.targets[{t}]", count, 3)
                       for name in ("POSITION", "NORMAL")} for t, target in enumerate(targets)]
    return out


def _faces(gf: GltfFile, prim, mode: int, count: int, where: str) -> np.ndarray:
    """The primitive's triangles (F, 3) into its `count` vertices, degenerate ones dropped."""
    if prim.indices is not None:
        idx = gf.accessor(prim.indices, where + ".indices", normalize=False)
        if idx.ndim != 1 or idx.dtype.kind != "i":
            gf.fail(where + ".indices", "expected SCALAR integer indices, got another type")
        if len(idx) and (idx.min() < 0 or idx.max() >= count):
            gf.fail(where + ".indices", f"expected indices below the vertex count {count}, got {int(idx.max())}")
    else:
        idx = np.arange(count, dtype=np.int64)
    if mode == 4 and len(idx) % 3:
        gf.fail(where + (".indices" if prim.indices is not None else ".attributes.POSITION"),
                f"expected a multiple of 3 vertices for TRIANGLES, got {len(idx)}")
    faces = triangle_list(idx, mode)
    keep = (faces[:, 0] != faces[:, 1]) & (faces[:, 1] != faces[:, 2]) & (faces[:, 2] != faces[:, 0])
    return faces[keep]


def _flat(block: dict, faces: np.ndarray) -> tuple[dict, np.ndarray]:
    """Vertices split per triangle with flat (face) normals, for a primitive without NORMAL in a
    mesh whose other primitives have them (spec 3.7.2.1: no normals => flat normals)."""
    order = faces.reshape(-1)
    out = {k: (v[order] if isinstance(v, np.ndarray) else v) for k, v in block.items() if k != "targets"}
    out["targets"] = [{k: (v[order] if v is not None else None) for k, v in t.items()} for t in block["targets"]]
    tri = block["POSITION"][faces]
    n = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    length = np.linalg.norm(n, axis=1, keepdims=True)
    n = np.divide(n, length, out=np.zeros_like(n), where=length > 0)
    out["NORMAL"] = np.repeat(n, 3, axis=0)
    return out, np.arange(len(order), dtype=np.int64).reshape(-1, 3)


def _blocks(gf: GltfFile, m: int, mesh) -> list[tuple[dict, np.ndarray, int]]:
    """(vertex block, faces into it, material or -1) per primitive. Primitives that use the same
    accessors share one block object (an exporter may give every primitive of a mesh the same
    vertex accessors and only different indices), so those vertices are decoded and stored once."""
    n_mat = len(gf.doc.materials or [])
    shared: dict = {}
    out = []
    for j, prim in enumerate(mesh.primitives or []):
        where = f"meshes[{m}].primitives[{j}]"
        mode = _check_mode(gf, prim, where)
        attrs = {k: v for k, v in vars(prim.attributes).items() if v is not None} if prim.attributes else {}
        targets = [{k: v for k, v in t.items() if v is not None} for t in prim.targets or []]
        key = (tuple(sorted(attrs.items())), tuple(tuple(sorted(t.items())) for t in targets))
        if key not in shared:
            shared[key] = _vertices(gf, attrs, targets, where)
        block = shared[key]
        faces = _faces(gf, prim, mode, len(block["POSITION"]), where)
        out.append((block, faces, index_of(gf, prim.material, n_mat, where + ".material", "material")))
    return out


def read_mesh(gf: GltfFile, m: int) -> MeshData:
    """meshes[m]: its primitives concatenated into one MeshData (see the module's choices)."""
    mesh = gf.doc.meshes[m]
    where = f"meshes[{m}]"
    prims = _blocks(gf, m, mesh)
    if not prims:
        gf.fail(where + ".primitives", "expected at least one primitive, got none")
    n_targets = len(prims[0][0]["targets"])
    for j, (block, _, _) in enumerate(prims):
        if len(block["targets"]) != n_targets:
            gf.fail(f"{where}.primitives[{j}].targets", f"expected {n_targets} morph targets like primitives[0], "
                                                        f"got {len(block['targets'])}")
    if any(b.get("NORMAL") is not None for b, _, _ in prims):
        prims = [(b, f, mat) if b.get("NORMAL") is not None else (*_flat(b, f), mat) for b, f, mat in prims]
    blocks, base = [], {}  # distinct blocks in order of first use, and each one's first vertex
    for b, _, _ in prims:
        if id(b) not in base:
            base[id(b)] = sum(len(x["POSITION"]) for x in blocks)
            blocks.append(b)

    def joined(name, width, fill=0.0, need_all=False):
        have = [b.get(name) is not None for b in blocks]
        if not any(have) or (need_all and not all(have)):
            return None
        parts = [b[name] if b.get(name) is not None else np.full((len(b["POSITION"]), width), fill) for b in blocks]
        return np.concatenate(parts).astype(np.int64 if name == "JOINTS_0" else np.float64)

    weights = joined("WEIGHTS_0", 4)
    if weights is not None:  # a primitive without skin weights follows joint 0 (JOINTS_0 filled with 0)
        for b in blocks:
            if b.get("WEIGHTS_0") is None:
                weights[base[id(b)]:base[id(b)] + len(b["POSITION"]), 0] = 1.0
    morph_pos = morph_nrm = None
    if n_targets:
        def stack(name):
            if not any(t[name] is not None for b in blocks for t in b["targets"]):
                return None
            return np.stack([np.concatenate([b["targets"][k][name] if b["targets"][k][name] is not None
                                             else np.zeros((len(b["POSITION"]), 3)) for b in blocks])
                             for k in range(n_targets)])
        morph_pos, morph_nrm = stack("POSITION"), stack("NORMAL")
    default_weights = np.zeros(n_targets)
    if mesh.weights is not None:
        default_weights = vector(gf, mesh.weights, n_targets, where + ".weights", None)
    return MeshData(
        name=mesh.name if mesh.name is not None else f"mesh{m}",
        positions=np.concatenate([b["POSITION"] for b in blocks]),
        faces=np.concatenate([f + base[id(b)] for b, f, _ in prims]),
        face_material=np.concatenate([np.full(len(f), mat, np.int64) for _, f, mat in prims]),
        normals=joined("NORMAL", 3), uv0=joined("TEXCOORD_0", 2), uv1=joined("TEXCOORD_1", 2),
        tangents=joined("TANGENT", 4, need_all=True), joints=joined("JOINTS_0", 4), weights=weights,
        morph_positions=morph_pos, morph_normals=morph_nrm, morph_weights=default_weights, source=where)
