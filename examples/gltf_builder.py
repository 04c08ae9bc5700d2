"""A small glTF 2.0 writer for the tests and the demo generator.

Build a document step by step, then `save("x.glb")` or `save("x.gltf")`:

    b = GltfBuilder()
    mat = b.add_material("stone", base_color=(0.8, 0.8, 0.8, 1.0), roughness=0.9)
    mesh = b.add_mesh([b.primitive(positions, normals=normals, uv0=uvs, indices=faces, material=mat)])
    b.add_node("floor", mesh=mesh, translation=(0, -1, 0))
    b.save(folder / "floor.glb")

Conventions are the file's own (this writes glTF, it does not translate from lampyr):

* rotations are quaternions in glTF order **x, y, z, w**;
* matrices are given as ordinary (4, 4) numpy arrays (row i, column j; translation in the last
  column) and written column-major, as the glTF spec (section 5.25, node.matrix) stores them;
* UV (0, 0) is the first pixel of an image; an image array's row 0 is its top row.

Every array goes into one binary buffer (the GLB chunk, or for .gltf a `.bin` file beside it or a
data URI). The root nodes of the single scene are the nodes that no other node lists as a child,
unless `add_scene` is called. Extensions named in materials, textures and lights are added to
`extensionsUsed` when saving; `require_extension` also lists one in `extensionsRequired`.

The document is kept as plain JSON and the GLB container written here (spec 4.4): a round trip
through pygltflib's classes would drop `node.weights` (its Node has no such field) and would add
an empty buffer to a file without binary data, which the validator rejects. `load_document`
reads a written file back with pygltflib, for the tests.
"""

from __future__ import annotations

import base64
import io
import json
import math
import struct
from pathlib import Path

import numpy as np
import pygltflib

# componentType codes (glTF 2.0 spec, section 3.6.2.2)
BYTE, UNSIGNED_BYTE, SHORT, UNSIGNED_SHORT, UNSIGNED_INT, FLOAT = 5120, 5121, 5122, 5123, 5125, 5126
_NUMPY = {BYTE: np.int8, UNSIGNED_BYTE: np.uint8, SHORT: np.int16, UNSIGNED_SHORT: np.uint16,
          UNSIGNED_INT: np.uint32, FLOAT: np.float32}
_TYPE_OF_WIDTH = {1: "SCALAR", 2: "VEC2", 3: "VEC3", 4: "VEC4", 16: "MAT4"}

# primitive modes (section 3.7.2.1)
POINTS, LINES, LINE_LOOP, LINE_STRIP, TRIANGLES, TRIANGLE_STRIP, TRIANGLE_FAN = range(7)

# sampler wrap and filter codes (section 3.8.4)
REPEAT, CLAMP_TO_EDGE, MIRRORED_REPEAT = 10497, 33071, 33648
NEAREST, LINEAR_FILTER = 9728, 9729

ARRAY_BUFFER, ELEMENT_ARRAY_BUFFER = 34962, 34963


def png_bytes(rgba) -> bytes:
    """PNG file bytes of an (H, W, 1|3|4) or (H, W) uint8 array (row 0 = top), via Pillow."""
    from PIL import Image

    arr = np.ascontiguousarray(np.asarray(rgba, np.uint8))
    if arr.ndim == 3 and arr.shape[2] == 1:
        arr = arr[:, :, 0]
    out = io.BytesIO()
    Image.fromarray(arr).save(out, format="PNG")
    return out.getvalue()


def jpeg_bytes(rgb, quality: int = 95) -> bytes:
    """JPEG file bytes of an (H, W, 3) uint8 array, via Pillow."""
    from PIL import Image

    out = io.BytesIO()
    Image.fromarray(np.ascontiguousarray(np.asarray(rgb, np.uint8)[:, :, :3])).save(out, format="JPEG",
                                                                                     quality=quality)
    return out.getvalue()


def column_major(matrix) -> list[float]:
    """A (4, 4) matrix as the 16 numbers glTF stores (column by column)."""
    return [float(x) for x in np.asarray(matrix, np.float64).reshape(4, 4).T.ravel()]


def texture_transform(offset=(0.0, 0.0), rotation=0.0, scale=(1.0, 1.0), texcoord=None) -> dict:
    """A KHR_texture_transform block (for `tex(..., transform=...)`)."""
    block = {"offset": [float(x) for x in offset], "rotation": float(rotation),
             "scale": [float(x) for x in scale]}
    if texcoord is not None:
        block["texCoord"] = int(texcoord)
    return block


def tex(texture: int, texcoord: int = 0, transform: dict | None = None, scale: float | None = None) -> dict:
    """A textureInfo: texture index, UV set, optional KHR_texture_transform block, and for a
    normalTexture its `scale`."""
    info = {"index": int(texture)}
    if texcoord:
        info["texCoord"] = int(texcoord)
    if scale is not None:
        info["scale"] = float(scale)
    if transform is not None:
        info["extensions"] = {"KHR_texture_transform": transform}
    return info


class GltfBuilder:
    """A glTF document being written; every `add_*` returns the new item's index."""

    def __init__(self, generator: str = "lampyr examples/gltf_builder.py"):
        self.doc: dict = {"asset": {"version": "2.0", "generator": generator}}
        self.blob = bytearray()
        self.lights: list[dict] = []
        self.external_images: dict[str, bytes] = {}  # uri -> file bytes written beside the .gltf
        self.required: set[str] = set()
        self.used: set[str] = set()
        self.scene_roots: list[int] | None = None

    # -------------------------------------------------------------------------------- raw data

    def _list(self, name: str) -> list:
        return self.doc.setdefault(name, [])

    def add_buffer_view(self, data: bytes, target: int | None = None, stride: int | None = None) -> int:
        """A bufferView over `data`, appended to the binary buffer at a 4-byte boundary."""
        self.blob.extend(b"\0" * (-len(self.blob) % 4))
        view = {"buffer": 0, "byteOffset": len(self.blob), "byteLength": len(data)}
        if target is not None:
            view["target"] = target
        if stride is not None:
            view["byteStride"] = int(stride)
        self.blob.extend(data)
        views = self._list("bufferViews")
        views.append(view)
        return len(views) - 1

    def add_accessor(self, array, component_type: int | None = None, type: str | None = None,
                     normalized: bool = False, target: int | None = None, min_max: bool = False,
                     stride: int | None = None) -> int:
        """An accessor over a new bufferView holding `array` (shape (n,) or (n, k), or (n, 4, 4)
        for MAT4, given row-major and written column-major).

        component_type defaults to FLOAT for floats and UNSIGNED_INT for integers; `type`
        defaults from the width; `stride` (bytes) pads each element to that many bytes.
        """
        arr = np.asarray(array)
        if arr.ndim == 3:  # MAT4 given as (n, 4, 4) row-major matrices
            arr = np.transpose(arr, (0, 2, 1)).reshape(len(arr), 16)
        if component_type is None:
            component_type = FLOAT if arr.dtype.kind == "f" else UNSIGNED_INT
        width = 1 if arr.ndim == 1 else arr.shape[1]
        type = type or _TYPE_OF_WIDTH[width]
        data = np.ascontiguousarray(arr.reshape(len(arr), width).astype(_NUMPY[component_type]))
        raw = data.tobytes()
        if stride is not None and stride != data.itemsize * width:
            elem = data.itemsize * width
            padded = bytearray(stride * len(data))
            for i in range(len(data)):
                padded[i * stride:i * stride + elem] = raw[i * elem:(i + 1) * elem]
            raw = bytes(padded)
        acc = {"bufferView": self.add_buffer_view(raw, target, stride), "componentType": component_type,
               "count": int(len(arr)), "type": type}
        if normalized:
            acc["normalized"] = True
        if min_max:
            flat = data.reshape(len(data), width)
            cast = float if component_type == FLOAT else int
            acc["min"] = [cast(x) for x in flat.min(axis=0)]
            acc["max"] = [cast(x) for x in flat.max(axis=0)]
        accs = self._list("accessors")
        accs.append(acc)
        return len(accs) - 1

    # -------------------------------------------------------------------------------- meshes

    def primitive(self, positions, normals=None, uv0=None, uv1=None, tangents=None, indices=None,
                  material: int | None = None, mode: int = TRIANGLES, joints=None, weights=None,
                  targets=None, uv_component: int = FLOAT) -> dict:
        """One mesh primitive: positions (V, 3); normals (V, 3); uv0 / uv1 (V, 2) (uv_component
        UNSIGNED_BYTE or UNSIGNED_SHORT writes them normalized); tangents (V, 4); indices (N,)
        or (F, 3) (UNSIGNED_SHORT when they fit, else UNSIGNED_INT); joints (V, 4) (UNSIGNED_BYTE
        or UNSIGNED_SHORT); weights (V, 4); targets: list of dicts {"POSITION": (V, 3),
        "NORMAL": (V, 3)} of displacements (morph targets)."""
        attrs = {"POSITION": self.add_accessor(np.asarray(positions, np.float64), FLOAT, "VEC3",
                                               target=ARRAY_BUFFER, min_max=True)}
        if normals is not None:
            attrs["NORMAL"] = self.add_accessor(normals, FLOAT, "VEC3", target=ARRAY_BUFFER)
        for name, uv in (("TEXCOORD_0", uv0), ("TEXCOORD_1", uv1)):
            if uv is None:
                continue
            uv = np.asarray(uv, np.float64)
            if uv_component == FLOAT:
                attrs[name] = self.add_accessor(uv, FLOAT, "VEC2", target=ARRAY_BUFFER)
            else:
                top = float(np.iinfo(_NUMPY[uv_component]).max)
                stride = 4 if uv_component == UNSIGNED_BYTE else None  # vertex attributes align to 4
                attrs[name] = self.add_accessor(np.round(np.clip(uv, 0, 1) * top), uv_component, "VEC2",
                                                normalized=True, target=ARRAY_BUFFER, stride=stride)
        if tangents is not None:
            attrs["TANGENT"] = self.add_accessor(tangents, FLOAT, "VEC4", target=ARRAY_BUFFER)
        if joints is not None:
            joints = np.asarray(joints)
            ctype = UNSIGNED_BYTE if joints.max() < 256 else UNSIGNED_SHORT
            attrs["JOINTS_0"] = self.add_accessor(joints, ctype, "VEC4", target=ARRAY_BUFFER)
        if weights is not None:
            attrs["WEIGHTS_0"] = self.add_accessor(weights, FLOAT, "VEC4", target=ARRAY_BUFFER)
        prim: dict = {"attributes": attrs}
        if indices is not None:
            idx = np.asarray(indices).reshape(-1)
            ctype = UNSIGNED_SHORT if idx.max(initial=0) < 65535 else UNSIGNED_INT
            prim["indices"] = self.add_accessor(idx, ctype, "SCALAR", target=ELEMENT_ARRAY_BUFFER)
        if material is not None:
            prim["material"] = int(material)
        if mode != TRIANGLES:
            prim["mode"] = int(mode)
        if targets:
            prim["targets"] = []
            for t in targets:
                entry = {}
                for name, arr in t.items():
                    entry[name] = self.add_accessor(arr, FLOAT, "VEC3", target=ARRAY_BUFFER,
                                                    min_max=(name == "POSITION"))
                prim["targets"].append(entry)
        return prim

    def add_mesh(self, primitives, name: str | None = None, weights=None) -> int:
        """A mesh of the given `primitive(...)` dicts; weights: default morph weights."""
        mesh: dict = {"primitives": list(primitives)}
        if name is not None:
            mesh["name"] = name
        if weights is not None:
            mesh["weights"] = [float(w) for w in weights]
        meshes = self._list("meshes")
        meshes.append(mesh)
        return len(meshes) - 1

    # -------------------------------------------------------------------------------- materials

    def add_material(self, name: str | None = None, base_color=None, metallic=None, roughness=None,
                     base_color_tex: dict | None = None, metallic_roughness_tex: dict | None = None,
                     normal_tex: dict | None = None, emissive=None, emissive_tex: dict | None = None,
                     alpha_mode: str | None = None, alpha_cutoff: float | None = None,
                     double_sided: bool = False, extensions: dict | None = None,
                     occlusion_tex: dict | None = None) -> int:
        """A material; arguments left None stay out of the file (the spec's defaults apply).
        Textures are `tex(...)` dicts; `extensions` maps extension names (KHR_materials_ior,
        KHR_materials_transmission, ...) to their JSON blocks, written as given."""
        mat: dict = {}
        if name is not None:
            mat["name"] = name
        pbr: dict = {}
        if base_color is not None:
            pbr["baseColorFactor"] = [float(x) for x in base_color]
        if metallic is not None:
            pbr["metallicFactor"] = float(metallic)
        if roughness is not None:
            pbr["roughnessFactor"] = float(roughness)
        if base_color_tex is not None:
            pbr["baseColorTexture"] = base_color_tex
        if metallic_roughness_tex is not None:
            pbr["metallicRoughnessTexture"] = metallic_roughness_tex
        if pbr:
            mat["pbrMetallicRoughness"] = pbr
        if normal_tex is not None:
            mat["normalTexture"] = normal_tex
        if occlusion_tex is not None:
            mat["occlusionTexture"] = occlusion_tex
        if emissive is not None:
            mat["emissiveFactor"] = [float(x) for x in emissive]
        if emissive_tex is not None:
            mat["emissiveTexture"] = emissive_tex
        if alpha_mode is not None:
            mat["alphaMode"] = alpha_mode
        if alpha_cutoff is not None:
            mat["alphaCutoff"] = float(alpha_cutoff)
        if double_sided:
            mat["doubleSided"] = True
        if extensions:
            mat["extensions"] = dict(extensions)
        mats = self._list("materials")
        mats.append(mat)
        return len(mats) - 1

    # -------------------------------------------------------------------------------- textures

    def add_image(self, pixels=None, data: bytes | None = None, mime: str = "image/png",
                  store: str = "buffer", uri: str | None = None, name: str | None = None) -> int:
        """An image from `pixels` ((H, W, 3|4) uint8, encoded as PNG, or JPEG when mime says so) or
        from ready file bytes `data`. store: "buffer" (a bufferView), "data" (a data URI) or
        "file" (written beside the .gltf as `uri`, percent-encoded in the JSON)."""
        if data is None:
            data = jpeg_bytes(pixels) if mime == "image/jpeg" else png_bytes(pixels)
        image: dict = {}
        if name is not None:
            image["name"] = name
        if store == "buffer":
            image["bufferView"] = self.add_buffer_view(data)
            image["mimeType"] = mime
        elif store == "data":
            image["uri"] = f"data:{mime};base64," + base64.b64encode(data).decode("ascii")
        elif store == "file":
            from urllib.parse import quote

            if uri is None:
                uri = f"image{len(self._list('images'))}" + (".jpg" if mime == "image/jpeg" else ".png")
            self.external_images[uri] = data
            image["uri"] = quote(uri)
        else:
            raise ValueError(f"store must be buffer, data or file, got {store!r}")
        images = self._list("images")
        images.append(image)
        return len(images) - 1

    def add_sampler(self, wrap_s: int | None = None, wrap_t: int | None = None,
                    mag_filter: int | None = LINEAR_FILTER, min_filter: int | None = None) -> int:
        """A sampler (wrap modes REPEAT, CLAMP_TO_EDGE, MIRRORED_REPEAT; None = the default)."""
        sampler = {}
        for key, value in (("wrapS", wrap_s), ("wrapT", wrap_t), ("magFilter", mag_filter),
                           ("minFilter", min_filter)):
            if value is not None:
                sampler[key] = int(value)
        samplers = self._list("samplers")
        samplers.append(sampler)
        return len(samplers) - 1

    def add_texture(self, image: int, sampler: int | None = None, name: str | None = None) -> int:
        texture: dict = {"source": int(image)}
        if sampler is not None:
            texture["sampler"] = int(sampler)
        if name is not None:
            texture["name"] = name
        textures = self._list("textures")
        textures.append(texture)
        return len(textures) - 1

    # -------------------------------------------------------------------------------- nodes

    def add_node(self, name: str | None = None, mesh: int | None = None, camera: int | None = None,
                 light: int | None = None, skin: int | None = None, translation=None, rotation=None,
                 scale=None, matrix=None, children=(), weights=None) -> int:
        """A node: TRS (rotation x, y, z, w) or `matrix` ((4, 4) row-major, written column-major);
        children: node indices (may be added later with `add_child`)."""
        node: dict = {}
        if name is not None:
            node["name"] = name
        for key, value in (("mesh", mesh), ("camera", camera), ("skin", skin)):
            if value is not None:
                node[key] = int(value)
        if light is not None:
            node["extensions"] = {"KHR_lights_punctual": {"light": int(light)}}
        if matrix is not None:
            node["matrix"] = column_major(matrix)
        for key, value in (("translation", translation), ("rotation", rotation), ("scale", scale)):
            if value is not None:
                node[key] = [float(x) for x in value]
        if len(children):
            node["children"] = [int(c) for c in children]
        if weights is not None:
            node["weights"] = [float(w) for w in weights]
        nodes = self._list("nodes")
        nodes.append(node)
        return len(nodes) - 1

    def add_child(self, parent: int, child: int) -> None:
        self.doc["nodes"][parent].setdefault("children", []).append(int(child))

    def add_scene(self, roots, name: str | None = None, default: bool = True) -> int:
        """A scene of the given root nodes (without any call, one scene of all parentless nodes)."""
        scene: dict = {"nodes": [int(r) for r in roots]}
        if name is not None:
            scene["name"] = name
        scenes = self._list("scenes")
        scenes.append(scene)
        if default:
            self.doc["scene"] = len(scenes) - 1
        return len(scenes) - 1

    def add_camera(self, yfov: float, znear: float = 0.01, zfar: float | None = None,
                   aspect: float | None = None, name: str | None = None) -> int:
        """A perspective camera (yfov in radians)."""
        persp = {"yfov": float(yfov), "znear": float(znear)}
        if zfar is not None:
            persp["zfar"] = float(zfar)
        if aspect is not None:
            persp["aspectRatio"] = float(aspect)
        cam: dict = {"type": "perspective", "perspective": persp}
        if name is not None:
            cam["name"] = name
        cams = self._list("cameras")
        cams.append(cam)
        return len(cams) - 1

    def add_light(self, type: str, color=None, intensity: float | None = None, range: float | None = None,
                  inner_cone: float | None = None, outer_cone: float | None = None,
                  name: str | None = None) -> int:
        """A KHR_lights_punctual light: type "point", "spot" or "directional"."""
        light: dict = {"type": type}
        if name is not None:
            light["name"] = name
        if color is not None:
            light["color"] = [float(x) for x in color]
        if intensity is not None:
            light["intensity"] = float(intensity)
        if range is not None:
            light["range"] = float(range)
        if type == "spot":
            spot = {}
            if inner_cone is not None:
                spot["innerConeAngle"] = float(inner_cone)
            if outer_cone is not None:
                spot["outerConeAngle"] = float(outer_cone)
            light["spot"] = spot
        self.lights.append(light)
        self.used.add("KHR_lights_punctual")
        return len(self.lights) - 1

    # -------------------------------------------------------------------------------- animation

    def add_animation(self, channels, name: str | None = None) -> int:
        """An animation; channels: (node, path, times (K,), values, interpolation) tuples.
        values: (K, n) for LINEAR / STEP (rotations x, y, z, w); for CUBICSPLINE (K, 3, n) as
        (in-tangent, value, out-tangent) per key; for "weights" (K, targets)."""
        anim: dict = {"channels": [], "samplers": []}
        if name is not None:
            anim["name"] = name
        for node, path, times, values, interpolation in channels:
            times = np.asarray(times, np.float64)
            values = np.asarray(values, np.float64)
            width = values.shape[-1]
            flat = values.reshape(-1, width)
            out_type = "SCALAR" if path == "weights" else _TYPE_OF_WIDTH[width]
            if path == "weights":
                flat = flat.reshape(-1, 1)
            sampler = {"input": self.add_accessor(times, FLOAT, "SCALAR", min_max=True),
                       "output": self.add_accessor(flat, FLOAT, out_type)}
            if interpolation != "LINEAR":
                sampler["interpolation"] = interpolation
            anim["samplers"].append(sampler)
            anim["channels"].append({"sampler": len(anim["samplers"]) - 1,
                                     "target": {"node": int(node), "path": path}})
        anims = self._list("animations")
        anims.append(anim)
        return len(anims) - 1

    def add_skin(self, joints, inverse_bind=None, skeleton: int | None = None, name: str | None = None) -> int:
        """A skin: joints (node indices); inverse_bind (J, 4, 4) row-major matrices or None."""
        skin: dict = {"joints": [int(j) for j in joints]}
        if inverse_bind is not None:
            skin["inverseBindMatrices"] = self.add_accessor(np.asarray(inverse_bind, np.float64), FLOAT, "MAT4")
        if skeleton is not None:
            skin["skeleton"] = int(skeleton)
        if name is not None:
            skin["name"] = name
        skins = self._list("skins")
        skins.append(skin)
        return len(skins) - 1

    # -------------------------------------------------------------------------------- writing

    def require_extension(self, name: str) -> None:
        """List `name` in extensionsUsed and extensionsRequired."""
        self.required.add(name)
        self.used.add(name)

    def use_extension(self, name: str) -> None:
        self.used.add(name)

    def _extensions_in(self, item) -> set[str]:
        found: set[str] = set()
        if isinstance(item, dict):
            for key, value in item.items():
                if key == "extensions" and isinstance(value, dict):
                    found.update(value)
                found |= self._extensions_in(value)
        elif isinstance(item, list):
            for value in item:
                found |= self._extensions_in(value)
        return found

    def document(self, buffer_uri: str | None = None) -> dict:
        """The JSON document as a dict (buffer_uri for a .gltf; None for a GLB's chunk)."""
        doc = json.loads(json.dumps(self.doc))
        if self.lights:
            doc.setdefault("extensions", {})["KHR_lights_punctual"] = {"lights": self.lights}
        if "scenes" not in doc and "nodes" in doc:
            children = {c for n in doc["nodes"] for c in n.get("children", [])}
            doc["scenes"] = [{"nodes": [i for i in range(len(doc["nodes"])) if i not in children]}]
            doc["scene"] = 0
        if self.blob:
            buf = {"byteLength": len(self.blob)}
            if buffer_uri is not None:
                buf["uri"] = buffer_uri
            doc["buffers"] = [buf]
        used = sorted(self.used | self._extensions_in(doc))
        if used:
            doc["extensionsUsed"] = used
        if self.required:
            doc["extensionsRequired"] = sorted(self.required)
        return doc

    def save(self, path, buffer: str = "file") -> Path:
        """Write a .glb (one binary chunk) or .gltf (buffer: "file" = a .bin beside it named after
        the .gltf, "data" = a data URI). External images go beside the file. Returns the path."""
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        blob = bytes(self.blob) + b"\0" * (-len(self.blob) % 4)
        if path.suffix.lower() == ".glb":
            path.write_bytes(glb_bytes(self.document(), blob))
        else:
            uri = None
            if self.blob and buffer == "file":
                uri = path.stem + ".bin"
                (path.parent / uri).write_bytes(blob)
            elif self.blob:
                uri = "data:application/octet-stream;base64," + base64.b64encode(blob).decode("ascii")
            path.write_text(json.dumps(self.document(uri), indent=1), encoding="utf-8")
        for uri, data in self.external_images.items():  # uri as written, before percent-encoding
            target = path.parent / uri
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_bytes(data)
        return path


def glb_bytes(document: dict, blob: bytes) -> bytes:
    """A GLB container (spec 4.4): 12-byte header, JSON chunk padded with spaces, and a BIN
    chunk padded with zeros when `blob` is not empty (a GLB without buffer data has no BIN chunk)."""
    text = json.dumps(document, separators=(",", ":")).encode("utf-8")
    text += b" " * (-len(text) % 4)
    out = struct.pack("<II", len(text), 0x4E4F534A) + text  # "JSON"
    if blob:
        blob = bytes(blob) + b"\0" * (-len(blob) % 4)
        out += struct.pack("<II", len(blob), 0x004E4942) + blob  # "BIN\0"
    return struct.pack("<III", 0x46546C67, 2, 12 + len(out)) + out  # "glTF", version 2, length


def load_document(path) -> "pygltflib.GLTF2":
    """A written .glb / .gltf file parsed by pygltflib (an independent reader)."""
    return pygltflib.GLTF2().load(str(path))


def quat_xyzw(axis, angle: float) -> list[float]:
    """The glTF rotation (x, y, z, w) of `angle` radians about `axis`."""
    a = np.asarray(axis, np.float64)
    a = a / np.linalg.norm(a)
    s = math.sin(angle / 2.0)
    return [float(a[0] * s), float(a[1] * s), float(a[2] * s), math.cos(angle / 2.0)]
