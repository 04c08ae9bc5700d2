"""Reads a glTF 2.0 scene (.glb, or .gltf with external files or data URIs) into `SceneData`.

`read_gltf(path, key)` is the one entry point. pygltflib parses the JSON document; accessors,
images and the GLB container are decoded here and in `gltf_accessors.py` / `gltf_materials.py`.
References: glTF 2.0 specification (Khronos, 2021): 3.5 (nodes, TRS and column-major matrices),
3.7 (meshes, primitive modes and their triangle orders, morph targets, skins), 3.10 (cameras),
3.11 (animations, CUBICSPLINE layout); the KHR_lights_punctual README for lights and defaults.

Choices this reader makes (also written in the functions that make them):
* a mesh's primitives are concatenated into one MeshData, `face_material` per triangle;
* triangles whose three indices are not all different (strip restarts) are dropped: zero area;
* when some primitives of a mesh carry NORMAL and others do not, the latter get the flat normals
  the spec asks for ("client implementations MUST calculate flat normals"): their vertices are
  split per triangle. A mesh with no normals at all keeps `normals = None` (flat shading);
* TANGENT is kept only when every primitive of the mesh has it (else None: compute them);
* orthographic cameras are dropped: lampyr renders perspective cameras only, so a node holding
  one gets `camera = -1` and the rest of the scene still loads;
* optional extensions lampyr does not read are listed in `extensions_ignored`; required ones are
  refused.
"""

from __future__ import annotations

import math

import numpy as np

from lampyr.engine.gltf_accessors import GltfFile, index_of, quoted, vector
from lampyr.engine.gltf_materials import MATERIAL_EXTENSIONS, MaterialReader
from lampyr.engine.gltf_meshes import read_mesh
from lampyr.engine.scene_data import (LIGHT_DIRECTIONAL, LIGHT_POINT, LIGHT_SPOT, CameraSpec, Channel,
                                      LightSpec, NodeSpec, SceneData, SkinSpec)

SUPPORTED_EXTENSIONS = frozenset(MATERIAL_EXTENSIONS + ("KHR_lights_punctual", "KHR_mesh_quantization"))
LIGHT_TYPES = {"point": LIGHT_POINT, "spot": LIGHT_SPOT, "directional": LIGHT_DIRECTIONAL}
PATH_WIDTH = {"translation": 3, "rotation": 4, "scale": 3}


def read_gltf(path, key: str, shown: str | None = None) -> SceneData:
    """The default scene of the glTF file at `path` as SceneData.

    key: the shot-file key errors name (`scene`, `object[lamp].mesh`); shown: how errors name
    the file (default: its file name). Every problem is an AssetError of one line naming the
    file and the glTF path (`meshes[0].primitives[1].indices`)."""
    gf = GltfFile(path, key, shown)
    try:
        gf.load()
    except RecursionError:  # JSON nested thousands deep: no glTF property goes so deep
        gf.fail("", "expected a glTF document nested a few levels deep, got nesting too deep to read")
    doc = gf.doc
    ignored = _check_extensions(gf)
    mats = MaterialReader(gf)
    materials = tuple(mats.material(i) for i in range(len(doc.materials or [])))
    cameras, camera_index = _cameras(gf)
    lights = _lights(gf)
    nodes = _nodes(gf, camera_index, len(lights))
    meshes = tuple(read_mesh(gf, i) for i in range(len(doc.meshes or [])))
    return SceneData(path=str(path), nodes=nodes, roots=_roots(gf, nodes), meshes=meshes,
                     materials=materials, images=tuple(mats.images), cameras=cameras, lights=lights,
                     channels=_channels(gf, nodes, meshes), skins=_skins(gf), extensions_ignored=ignored)


# ------------------------------------------------------------------------------------ extensions


def _check_extensions(gf: GltfFile) -> tuple:
    """Refuse unsupported required extensions; the unsupported optional ones, sorted."""
    required = gf.doc.extensionsRequired or []
    missing = [name for name in required if name not in SUPPORTED_EXTENSIONS]
    if missing:
        gf.fail("extensionsRequired", f"expected only extensions lampyr reads ({', '.join(sorted(SUPPORTED_EXTENSIONS))}), "
                                      f"got {', '.join(missing)}, which lampyr does not support")
    return tuple(sorted({n for n in gf.doc.extensionsUsed or [] if n not in SUPPORTED_EXTENSIONS}))


# ------------------------------------------------------------------------------------ nodes


def _nodes(gf: GltfFile, camera_index: dict, n_lights: int) -> tuple:
    """Every node of the file (NodeSpec), parents filled in, hierarchy checked to be a forest."""
    doc = gf.doc
    raw = doc.nodes or []
    n = len(raw)
    parent = [-1] * n
    for i, node in enumerate(raw):
        for c in node.children or []:
            c = index_of(gf, c, n, f"nodes[{i}].children", "node")
            if parent[c] != -1 or c == i:
                gf.fail(f"nodes[{i}].children", f"expected each node to have one parent, got nodes[{c}] "
                                                f"as a child of nodes[{parent[c] if c != i else i}] too")
            parent[c] = i
    out = []
    for i, node in enumerate(raw):
        where = f"nodes[{i}]"
        matrix = None
        if node.matrix is not None:
            # spec 3.5.3: matrices are stored column-major; the 16 numbers are the columns in turn
            matrix = vector(gf, node.matrix, 16, where + ".matrix", None).reshape(4, 4).T.copy()
        xyzw = vector(gf, node.rotation, 4, where + ".rotation", [0.0, 0.0, 0.0, 1.0])
        norm = float(np.linalg.norm(xyzw))
        if norm == 0.0:
            gf.fail(where + ".rotation", f"expected a unit quaternion, got {quoted(node.rotation)}")
        light = (node.extensions or {}).get("KHR_lights_punctual")
        mesh = index_of(gf, node.mesh, len(doc.meshes or []), where + ".mesh", "mesh")
        camera = index_of(gf, node.camera, len(doc.cameras or []), where + ".camera", "camera")
        raw_weights = gf.tree["nodes"][i].get("weights")  # pygltflib's Node has no weights field
        weights = None
        if raw_weights is not None:
            if not isinstance(raw_weights, list):
                gf.fail(where + ".weights", f"expected a list of morph weights, got {quoted(raw_weights)}")
            weights = vector(gf, raw_weights, len(raw_weights), where + ".weights", None)
        out.append(NodeSpec(
            name=node.name if node.name is not None else f"node{i}",
            parent=parent[i], children=tuple(node.children or ()),
            translation=vector(gf, node.translation, 3, where + ".translation", [0.0, 0.0, 0.0]),
            rotation=xyzw[[3, 0, 1, 2]] / norm,  # file x, y, z, w -> lampyr w, x, y, z
            scale=vector(gf, node.scale, 3, where + ".scale", [1.0, 1.0, 1.0]),
            matrix=matrix, mesh=mesh, camera=camera_index.get(camera, -1),
            light=index_of(gf, light.get("light") if isinstance(light, dict) else None, n_lights,
                         where + ".extensions.KHR_lights_punctual.light", "light"),
            skin=index_of(gf, node.skin, len(doc.skins or []), where + ".skin", "skin"),
            weights=weights, source=where))
    _check_acyclic(gf, out)
    return tuple(out)


def _check_acyclic(gf: GltfFile, nodes: list) -> None:
    """Every node must be reachable from a parentless node (else the children form a loop)."""
    seen = set()
    stack = [i for i, nd in enumerate(nodes) if nd.parent == -1]
    while stack:
        i = stack.pop()
        seen.add(i)
        stack.extend(nodes[i].children)
    if len(seen) != len(nodes):
        first = min(set(range(len(nodes))) - seen)
        gf.fail(f"nodes[{first}].children", "expected a node hierarchy without loops, got a loop through this node")


def _roots(gf: GltfFile, nodes: tuple) -> tuple:
    """Root nodes of the default scene (`scene`, else scenes[0]; no scenes: every parentless node)."""
    doc = gf.doc
    scenes = doc.scenes or []
    if not scenes:
        return tuple(i for i, nd in enumerate(nodes) if nd.parent == -1)
    s = doc.scene if doc.scene is not None else 0
    s = index_of(gf, s, len(scenes), "scene", "scene")
    roots = []
    for k, r in enumerate(scenes[s].nodes or []):
        r = index_of(gf, r, len(nodes), f"scenes[{s}].nodes[{k}]", "node")
        if nodes[r].parent != -1:
            gf.fail(f"scenes[{s}].nodes[{k}]", f"expected a root node, got nodes[{r}], a child of "
                                               f"nodes[{nodes[r].parent}]")
        roots.append(r)
    return tuple(roots)


# ------------------------------------------------------------------------------------ cameras, lights


def _cameras(gf: GltfFile) -> tuple[tuple, dict]:
    """Perspective cameras, and glTF camera index -> index among them (orthographic dropped)."""
    out, index = [], {}
    for i, cam in enumerate(gf.doc.cameras or []):
        where = f"cameras[{i}]"
        if cam.type == "orthographic":
            continue  # lampyr renders perspective cameras only; see the module's notes
        if cam.type != "perspective" or cam.perspective is None:
            gf.fail(where + ".type", f"expected perspective or orthographic, got {quoted(cam.type)}")
        p = cam.perspective
        yfov = p.yfov
        if not isinstance(yfov, (int, float)) or not 0.0 < yfov < math.pi:
            gf.fail(where + ".perspective.yfov", f"expected an angle in radians between 0 and pi, got {quoted(yfov)}")
        znear = p.znear if isinstance(p.znear, (int, float)) and p.znear > 0 else 0.01
        aspect = float(p.aspectRatio) if isinstance(p.aspectRatio, (int, float)) and p.aspectRatio > 0 else None
        index[i] = len(out)
        out.append(CameraSpec(name=cam.name if cam.name is not None else f"camera{i}", yfov=float(yfov),
                              znear=float(znear), aspect=aspect, source=where))
    return tuple(out), index


def _lights(gf: GltfFile) -> tuple:
    """KHR_lights_punctual lights with the extension's defaults (intensity 1, white, cone 0..pi/4)."""
    block = (gf.doc.extensions or {}).get("KHR_lights_punctual") or {}
    out = []
    for i, light in enumerate(block.get("lights") or []):
        where = f"extensions.KHR_lights_punctual.lights[{i}]"
        if not isinstance(light, dict) or light.get("type") not in LIGHT_TYPES:
            kind = light.get("type") if isinstance(light, dict) else light
            gf.fail(where + ".type", f"expected point, spot or directional, got {quoted(kind)}")
        intensity = light.get("intensity", 1.0)
        if isinstance(intensity, bool) or not isinstance(intensity, (int, float)) or intensity < 0:
            gf.fail(where + ".intensity", f"expected a number >= 0, got {quoted(intensity)}")
        rng = light.get("range")
        spot = light.get("spot") or {}
        inner = float(spot.get("innerConeAngle", 0.0))
        outer = float(spot.get("outerConeAngle", math.pi / 4.0))
        if light["type"] == "spot" and not 0.0 <= inner < outer <= math.pi / 2.0:
            gf.fail(where + ".spot", f"expected 0 <= innerConeAngle < outerConeAngle <= pi/2, got {inner:g} "
                                     f"and {outer:g}")
        out.append(LightSpec(name=light.get("name") or f"light{i}", type=LIGHT_TYPES[light["type"]],
                             color=vector(gf, light.get("color"), 3, where + ".color", [1.0, 1.0, 1.0]),
                             intensity=float(intensity), range=float(rng) if rng is not None else None,
                             inner_cone=inner, outer_cone=outer, source=where))
    return tuple(out)


# ------------------------------------------------------------------------------------ animation, skins


def _channels(gf: GltfFile, nodes: tuple, meshes: tuple) -> tuple:
    """Every channel of every animation, values reshaped and rotations reordered to w, x, y, z."""
    out = []
    for a, anim in enumerate(gf.doc.animations or []):
        samplers = anim.samplers or []
        for c, ch in enumerate(anim.channels or []):
            where = f"animations[{a}].channels[{c}]"
            target = ch.target
            if target is None or target.node is None:
                continue  # spec 3.11: a channel may target something an extension defines
            node = index_of(gf, target.node, len(nodes), where + ".target.node", "node")
            path = target.path
            if path not in ("translation", "rotation", "scale", "weights"):
                gf.fail(where + ".target.path", f"expected translation, rotation, scale or weights, got {quoted(path)}")
            s = index_of(gf, ch.sampler, len(samplers), where + ".sampler", "sampler")
            sw = f"animations[{a}].samplers[{s}]"
            sampler = samplers[s]
            interp = sampler.interpolation or "LINEAR"
            if interp not in ("LINEAR", "STEP", "CUBICSPLINE"):
                gf.fail(sw + ".interpolation", f"expected LINEAR, STEP or CUBICSPLINE, got {quoted(interp)}")
            times = gf.accessor(sampler.input, sw + ".input")
            if times.ndim != 1 or times.dtype.kind != "f" or len(times) == 0:
                gf.fail(sw + ".input", "expected one or more SCALAR FLOAT key times, got another type")
            if not np.all(np.isfinite(times)) or np.any(np.diff(times) <= 0) or times[0] < 0:
                gf.fail(sw + ".input", "expected strictly increasing key times >= 0, got others")
            values = gf.accessor(sampler.output, sw + ".output")
            if path == "weights":
                mesh = nodes[node].mesh
                width = len(meshes[mesh].morph_weights) if mesh >= 0 else 0
            else:
                width = PATH_WIDTH[path]
            per_key = 3 if interp == "CUBICSPLINE" else 1
            flat = values.reshape(-1).astype(np.float64)
            if width == 0 or flat.size != len(times) * per_key * width:
                gf.fail(sw + ".output", f"expected {len(times)} keys x {per_key} x {width} numbers for "
                                        f"{path} of nodes[{node}], got {flat.size}")
            vals = flat.reshape(len(times), per_key, width) if per_key == 3 else flat.reshape(len(times), width)
            if path == "rotation":
                vals = vals[..., [3, 0, 1, 2]]  # x, y, z, w -> w, x, y, z
            out.append(Channel(node=node, path=path, interpolation=interp, times=times.astype(np.float64),
                               values=np.ascontiguousarray(vals), source=where))
    return tuple(out)


def _skins(gf: GltfFile) -> tuple:
    """skins -> SkinSpec; inverse bind matrices default to identity (spec 3.7.3)."""
    out = []
    n_nodes = len(gf.doc.nodes or [])
    for k, skin in enumerate(gf.doc.skins or []):
        where = f"skins[{k}]"
        joints = np.array([index_of(gf, j, n_nodes, f"{where}.joints[{i}]", "node")
                           for i, j in enumerate(skin.joints or [])], np.int64)
        if len(joints) == 0:
            gf.fail(where + ".joints", "expected at least one joint, got none")
        if skin.inverseBindMatrices is None:
            inv = np.tile(np.eye(4), (len(joints), 1, 1))
        else:
            inv = gf.accessor(skin.inverseBindMatrices, where + ".inverseBindMatrices")
            if inv.shape != (len(joints), 4, 4):
                gf.fail(where + ".inverseBindMatrices", f"expected {len(joints)} MAT4 matrices, got shape "
                                                        f"{inv.shape}")
        out.append(SkinSpec(joints=joints, inverse_bind=inv.astype(np.float64),
                            skeleton=index_of(gf, skin.skeleton, n_nodes, where + ".skeleton", "node"),
                            source=where))
    return tuple(out)
