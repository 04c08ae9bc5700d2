"""glTF 2.0 materials, textures and images -> `MaterialSpec`, `TexRef`, `Image`.

Sources: glTF 2.0 specification (Khronos, 2021) section 3.9 (materials, their defaults), 3.8
(textures, images, samplers); the KHR extensions' own README files for their properties and
defaults: KHR_texture_transform, KHR_materials_emissive_strength, KHR_materials_transmission,
KHR_materials_volume, KHR_materials_ior, KHR_materials_clearcoat, KHR_materials_specular.
The occlusion texture is not read: a path tracer computes occlusion itself.
"""

from __future__ import annotations

import io
import math

import numpy as np

from lampyr.engine.gltf_accessors import GltfFile, quoted
from lampyr.engine.scene_data import (ALPHA_BLEND, ALPHA_MASK, ALPHA_OPAQUE, GL_WRAP, WRAP_REPEAT,
                                      Image, MaterialSpec, TexRef)

MATERIAL_EXTENSIONS = ("KHR_materials_emissive_strength", "KHR_texture_transform",
                       "KHR_materials_transmission", "KHR_materials_volume", "KHR_materials_ior",
                       "KHR_materials_clearcoat", "KHR_materials_specular")
ALPHA_MODES = {"OPAQUE": ALPHA_OPAQUE, "MASK": ALPHA_MASK, "BLEND": ALPHA_BLEND}


def uv_transform_matrix(offset=(0.0, 0.0), rotation: float = 0.0, scale=(1.0, 1.0)) -> np.ndarray:
    """The (2, 3) matrix uv' = M @ [u, v, 1] of KHR_texture_transform: M = T · R · S with
    T = [[1, 0, ox], [0, 1, oy]], R = [[cos r, sin r], [-sin r, cos r]], S = diag(sx, sy).

    R is the extension README's GLSL listing read row by row; it is the reading under which the
    README's own example (offset (0, 1), rotation pi/2, scale 0.5 uses only the image's lower-left
    quadrant) and its prose (the UVs turn counter-clockwise as seen in the image, v downwards)
    both hold."""
    c, s = math.cos(rotation), math.sin(rotation)
    t = np.array([[1.0, 0.0, offset[0]], [0.0, 1.0, offset[1]], [0.0, 0.0, 1.0]])
    r = np.array([[c, s, 0.0], [-s, c, 0.0], [0.0, 0.0, 1.0]])
    sc = np.diag([scale[0], scale[1], 1.0])
    return (t @ r @ sc)[:2]


def decode_image(gf: GltfFile, data: bytes, where: str) -> np.ndarray:
    """PNG or JPEG bytes -> (H, W, 4) uint8 RGBA, row 0 the image's first row (via Pillow)."""
    from PIL import Image as PILImage, UnidentifiedImageError

    try:
        with PILImage.open(io.BytesIO(data)) as img:
            fmt = img.format
            if fmt not in ("PNG", "JPEG"):
                gf.fail(where, f"expected a PNG or JPEG image, got {fmt or 'an unknown format'}")
            img.load()
            if img.mode in ("I;16", "I;16B", "I;16L", "I"):  # 16-bit grey PNG: keep the high byte
                grey = (np.asarray(img, np.int64) >> 8).clip(0, 255).astype(np.uint8)
                img = PILImage.fromarray(grey, "L")
            rgba = np.asarray(img.convert("RGBA"), np.uint8)
    except UnidentifiedImageError:
        gf.fail(where, f"expected a PNG or JPEG image, got {len(data)} bytes that are no image Pillow knows")
    except (OSError, ValueError, SyntaxError) as exc:
        first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
        gf.fail(where, f"expected a PNG or JPEG image, got bytes Pillow cannot decode ({first})")
    return np.ascontiguousarray(rgba)


class MaterialReader:
    """Reads the materials of one glTF file; images are decoded once, on first use."""

    def __init__(self, gf: GltfFile):
        self.gf = gf
        self.images: list[Image] = []
        self._image_index: dict[int, int] = {}  # glTF image index -> index into self.images

    # ------------------------------------------------------------------------------ images

    def image(self, index, where: str) -> int:
        """Index into `self.images` of glTF images[index], decoded on first use."""
        if index in self._image_index:
            return self._image_index[index]
        gf = self.gf
        images = gf.doc.images or []
        if not isinstance(index, int) or not 0 <= index < len(images):
            gf.fail(where, f"expected an image index below {len(images)}, got {quoted(index)}")
        img = images[index]
        iwhere = f"images[{index}]"
        if img.uri is not None:
            data, _ = gf.read_uri(img.uri, iwhere + ".uri")
            rgba = decode_image(gf, data, iwhere + ".uri")
        elif img.bufferView is not None:
            view, _ = gf.view_bytes(img.bufferView, iwhere + ".bufferView")
            rgba = decode_image(gf, bytes(view), iwhere + ".bufferView")
        else:
            gf.fail(iwhere, "expected a uri or a bufferView, got neither")
        self.images.append(Image(name=img.name or f"image{index}", rgba=rgba, source=iwhere))
        self._image_index[index] = len(self.images) - 1
        return self._image_index[index]

    # ------------------------------------------------------------------------------ textures

    def tex_ref(self, info, where: str, scale: float = 1.0) -> TexRef | None:
        """A textureInfo (pygltflib object or dict) -> TexRef, KHR_texture_transform folded in."""
        if info is None:
            return None
        gf = self.gf
        get = info.get if isinstance(info, dict) else (lambda k, d=None: getattr(info, k, d))
        index = get("index")
        textures = gf.doc.textures or []
        if not isinstance(index, int) or not 0 <= index < len(textures):
            gf.fail(where + ".index", f"expected a texture index below {len(textures)}, got {quoted(index)}")
        texture = textures[index]
        twhere = f"textures[{index}]"
        if texture.source is None:
            others = ", ".join(sorted(texture.extensions or {})) or "no image"
            gf.fail(twhere + ".source", f"expected a PNG or JPEG image, got {others} (lampyr reads PNG and JPEG)")
        image = self.image(texture.source, twhere + ".source")
        wrap_s = wrap_t = WRAP_REPEAT
        if texture.sampler is not None:
            samplers = gf.doc.samplers or []
            if not isinstance(texture.sampler, int) or not 0 <= texture.sampler < len(samplers):
                gf.fail(twhere + ".sampler", f"expected a sampler index below {len(samplers)}, got "
                                             f"{quoted(texture.sampler)}")
            sampler = samplers[texture.sampler]
            swhere = f"samplers[{texture.sampler}]"
            for name in ("wrapS", "wrapT"):
                value = getattr(sampler, name)
                if value is not None and value not in GL_WRAP:
                    gf.fail(f"{swhere}.{name}", f"expected 10497, 33071 or 33648, got {quoted(value)}")
            wrap_s = GL_WRAP.get(sampler.wrapS, WRAP_REPEAT)
            wrap_t = GL_WRAP.get(sampler.wrapT, WRAP_REPEAT)
        texcoord = get("texCoord") or 0
        matrix = uv_transform_matrix()
        ext = (get("extensions") or {}).get("KHR_texture_transform")
        if ext is not None:
            xwhere = where + ".extensions.KHR_texture_transform"
            offset = _floats(gf, ext.get("offset", [0.0, 0.0]), 2, xwhere + ".offset")
            rotation = _float(gf, ext.get("rotation", 0.0), xwhere + ".rotation")
            scl = _floats(gf, ext.get("scale", [1.0, 1.0]), 2, xwhere + ".scale")
            matrix = uv_transform_matrix(offset, rotation, scl)
            if ext.get("texCoord") is not None:
                texcoord = ext["texCoord"]  # the extension's texCoord overrides the textureInfo's
        if texcoord not in (0, 1):
            gf.fail(where + ".texCoord", f"expected UV set 0 or 1 (TEXCOORD_0, TEXCOORD_1), got {quoted(texcoord)}")
        return TexRef(image=image, texcoord=int(texcoord), wrap_s=wrap_s, wrap_t=wrap_t,
                      uv_transform=matrix, scale=float(scale), source=where)

    # ------------------------------------------------------------------------------ materials

    def material(self, index: int) -> MaterialSpec:
        """materials[index] -> MaterialSpec, with the spec's and the extensions' defaults."""
        gf = self.gf
        m = gf.doc.materials[index]
        where = f"materials[{index}]"
        args: dict = {"name": m.name if m.name is not None else f"material{index}", "source": where}
        pbr = m.pbrMetallicRoughness
        if pbr is not None:
            pw = where + ".pbrMetallicRoughness"
            if pbr.baseColorFactor is not None:
                args["base_color"] = np.array(_floats(gf, pbr.baseColorFactor, 4, pw + ".baseColorFactor"))
            if pbr.metallicFactor is not None:
                args["metallic"] = _float(gf, pbr.metallicFactor, pw + ".metallicFactor")
            if pbr.roughnessFactor is not None:
                args["roughness"] = _float(gf, pbr.roughnessFactor, pw + ".roughnessFactor")
            args["base_color_tex"] = self.tex_ref(pbr.baseColorTexture, pw + ".baseColorTexture")
            args["metallic_roughness_tex"] = self.tex_ref(pbr.metallicRoughnessTexture,
                                                          pw + ".metallicRoughnessTexture")
        if m.normalTexture is not None:
            nscale = m.normalTexture.scale if m.normalTexture.scale is not None else 1.0
            args["normal_tex"] = self.tex_ref(m.normalTexture, where + ".normalTexture",
                                              _float(gf, nscale, where + ".normalTexture.scale"))
        if m.emissiveFactor is not None:
            args["emissive"] = np.array(_floats(gf, m.emissiveFactor, 3, where + ".emissiveFactor"))
        args["emissive_tex"] = self.tex_ref(m.emissiveTexture, where + ".emissiveTexture")
        mode = m.alphaMode if m.alphaMode is not None else "OPAQUE"
        if mode not in ALPHA_MODES:
            gf.fail(where + ".alphaMode", f"expected OPAQUE, MASK or BLEND, got {quoted(mode)}")
        args["alpha_mode"] = ALPHA_MODES[mode]
        if m.alphaCutoff is not None:
            args["alpha_cutoff"] = _float(gf, m.alphaCutoff, where + ".alphaCutoff")
        args["double_sided"] = bool(m.doubleSided)
        self._extensions(m.extensions or {}, where + ".extensions", args)
        return MaterialSpec(**args)

    def _extensions(self, ext: dict, where: str, args: dict) -> None:
        """The KHR_materials_* blocks lampyr reads, into MaterialSpec arguments."""
        gf = self.gf

        def block(name):
            value = ext.get(name)
            if value is not None and not isinstance(value, dict):
                gf.fail(f"{where}.{name}", f"expected a JSON object, got {quoted(value)}")
            return value

        def num(b, name, key, arg):
            if key in b:
                args[arg] = _float(gf, b[key], f"{where}.{name}.{key}")

        if (b := block("KHR_materials_emissive_strength")) is not None:
            num(b, "KHR_materials_emissive_strength", "emissiveStrength", "emissive_strength")
        if (b := block("KHR_materials_ior")) is not None:
            num(b, "KHR_materials_ior", "ior", "ior")
        if (b := block("KHR_materials_transmission")) is not None:
            name = "KHR_materials_transmission"
            num(b, name, "transmissionFactor", "transmission")
            args["transmission_tex"] = self.tex_ref(b.get("transmissionTexture"), f"{where}.{name}.transmissionTexture")
        if (b := block("KHR_materials_volume")) is not None:
            name = "KHR_materials_volume"
            num(b, name, "thicknessFactor", "thickness")
            num(b, name, "attenuationDistance", "attenuation_distance")
            if "attenuationColor" in b:
                args["attenuation_color"] = np.array(_floats(gf, b["attenuationColor"], 3,
                                                             f"{where}.{name}.attenuationColor"))
        if (b := block("KHR_materials_clearcoat")) is not None:
            name = "KHR_materials_clearcoat"
            num(b, name, "clearcoatFactor", "clearcoat")
            num(b, name, "clearcoatRoughnessFactor", "clearcoat_roughness")
            args["clearcoat_tex"] = self.tex_ref(b.get("clearcoatTexture"), f"{where}.{name}.clearcoatTexture")
            args["clearcoat_roughness_tex"] = self.tex_ref(b.get("clearcoatRoughnessTexture"),
                                                           f"{where}.{name}.clearcoatRoughnessTexture")
        if (b := block("KHR_materials_specular")) is not None:
            name = "KHR_materials_specular"
            num(b, name, "specularFactor", "specular")
            if "specularColorFactor" in b:
                args["specular_color"] = np.array(_floats(gf, b["specularColorFactor"], 3,
                                                          f"{where}.{name}.specularColorFactor"))
            args["specular_tex"] = self.tex_ref(b.get("specularTexture"), f"{where}.{name}.specularTexture")
            args["specular_color_tex"] = self.tex_ref(b.get("specularColorTexture"),
                                                      f"{where}.{name}.specularColorTexture")


def _float(gf: GltfFile, value, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        gf.fail(where, f"expected a finite number, got {quoted(value)}")
    return float(value)


def _floats(gf: GltfFile, value, n: int, where: str) -> list[float]:
    if not isinstance(value, (list, tuple)) or len(value) != n:
        gf.fail(where, f"expected {n} numbers, got {quoted(value)}")
    return [_float(gf, v, f"{where}[{i}]") for i, v in enumerate(value)]
