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


def _primitive(gf: GltfFile, m: int, j: int, prim) -> dict:
    """One primitive as vertex arrays and its triangles (F, 3) into them."""
    where = f"meshes[{m}].primitives[{j}]"
    mode = prim.mode if prim.mode is not None else 4
    if mode not in (4, 5, 6):
        gf.fail(where + ".mode", f"expected a triangle mode (4 TRIANGLES, 5 TRIANGLE_STRIP, 6 TRIANGLE_FAN), "
                                 f"got {quoted(mode)} ({MODE_NAMES.get(mode, 'unknown')}); lampyr renders surfaces only")
    attrs = {k: v for k, v in vars(prim.attributes).items() if v is not None} if prim.attributes else {}
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
    out = {"faces": faces[keep], "POSITION": pos, "mode": mode}
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
    targets = []
    for t, target in enumerate(prim.targets or []):
        tw = f"{where}.targets[{t}]"
        targets.append({name: _attribute(gf, target, name, tw, count, 3) for name in ("POSITION", "NORMAL")})
    out["targets"] = targets
    return out


def _flat(prim: dict) -> dict:
    """The primitive with its vertices split per triangle and flat (face) normals, for a mesh
    whose other primitives have normals (spec 3.7.2.1: no normals => flat normals)."""
    order = prim["faces"].reshape(-1)
    out = {k: (v[order] if isinstance(v, np.ndarray) and k != "faces" else v) for k, v in prim.items()}
    out["targets"] = [{k: (v[order] if v is not None else None) for k, v in t.items()} for t in prim["targets"]]
    tri = prim["POSITION"][prim["faces"]]
    n = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    length = np.linalg.norm(n, axis=1, keepdims=True)
    n = np.divide(n, length, out=np.zeros_like(n), where=length > 0)
    out["NORMAL"] = np.repeat(n, 3, axis=0)
    out["faces"] = np.arange(len(order), dtype=np.int64).reshape(-1, 3)
    return out


def read_mesh(gf: GltfFile, m: int) -> MeshData:
    """meshes[m]: its primitives concatenated into one MeshData (see the module's choices)."""
    mesh = gf.doc.meshes[m]
    where = f"meshes[{m}]"
    n_mat = len(gf.doc.materials or [])
    prims = [_primitive(gf, m, j, p) for j, p in enumerate(mesh.primitives or [])]
    if not prims:
        gf.fail(where + ".primitives", "expected at least one primitive, got none")
    n_targets = len(prims[0]["targets"])
    for j, p in enumerate(prims):
        if len(p["targets"]) != n_targets:
            gf.fail(f"{where}.primitives[{j}].targets", f"expected {n_targets} morph targets like primitives[0], "
                                                        f"got {len(p['targets'])}")
    if any(p.get("NORMAL") is not None for p in prims):
        prims = [p if p.get("NORMAL") is not None else _flat(p) for p in prims]

    def joined(name, width, fill=0.0, need_all=False):
        have = [p.get(name) is not None for p in prims]
        if not any(have) or (need_all and not all(have)):
            return None
        parts = [p[name] if p.get(name) is not None else np.full((len(p["POSITION"]), width), fill) for p in prims]
        return np.concatenate(parts).astype(np.int64 if name == "JOINTS_0" else np.float64)

    faces, mat, base = [], [], 0
    for j, (p, raw) in enumerate(zip(prims, mesh.primitives)):
        faces.append(p["faces"] + base)
        material = index_of(gf, raw.material, n_mat, f"{where}.primitives[{j}].material", "material")
        mat.append(np.full(len(p["faces"]), material, np.int64))
        base += len(p["POSITION"])
    weights = joined("WEIGHTS_0", 4)
    if weights is not None:  # a primitive without skin weights follows joint 0 (JOINTS_0 filled with 0)
        for j, p in enumerate(prims):
            if p.get("WEIGHTS_0") is None:
                start = sum(len(q["POSITION"]) for q in prims[:j])
                weights[start:start + len(p["POSITION"]), 0] = 1.0
    morph_pos = morph_nrm = None
    if n_targets:
        def stack(name):
            if not any(t[name] is not None for p in prims for t in p["targets"]):
                return None
            return np.stack([np.concatenate([p["targets"][k][name] if p["targets"][k][name] is not None
                                             else np.zeros((len(p["POSITION"]), 3)) for p in prims])
                             for k in range(n_targets)])
        morph_pos, morph_nrm = stack("POSITION"), stack("NORMAL")
    default_weights = np.zeros(n_targets)
    if mesh.weights is not None:
        default_weights = vector(gf, mesh.weights, n_targets, where + ".weights", None)
    return MeshData(
        name=mesh.name if mesh.name is not None else f"mesh{m}",
        positions=np.concatenate([p["POSITION"] for p in prims]), faces=np.concatenate(faces),
        face_material=np.concatenate(mat), normals=joined("NORMAL", 3),
        uv0=joined("TEXCOORD_0", 2), uv1=joined("TEXCOORD_1", 2), tangents=joined("TANGENT", 4, need_all=True),
        joints=joined("JOINTS_0", 4), weights=weights, morph_positions=morph_pos, morph_normals=morph_nrm,
        morph_weights=default_weights, source=where)


