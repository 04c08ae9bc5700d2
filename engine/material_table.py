"""The material table: one `(MATERIAL_SIZE,) float64` row per material, its named columns, and
the rows made from a shot's `[[material]]` or a glTF material.

A row holds factors and texture references. At a hit the integrator *resolves* the row into a
scratch row of the same layout (textures looked up and multiplied in, `textures.py`), and the
BSDF (`bsdf.py`, `pbr.py`) reads only the resolved values; the texture columns are then unused.

Columns (the legacy types DIFFUSE, METAL, GLASS, PLASTIC read only 0-8):

  M_TYPE            DIFFUSE 0, METAL 1, GLASS 2, PLASTIC 3, PBR 4 (glTF metallic-roughness)
  M_COLOR..+3       base colour factor, linear RGB (legacy: albedo / F0 / tint)
  M_ROUGHNESS       perceptual roughness; GGX alpha = roughness²
  M_IOR             index of refraction (KHR_materials_ior; glass; plastic's coat)
  M_EMISSION..+3    emitted radiance: emissive factor × KHR_materials_emissive_strength
  M_METALLIC        metalness in [0, 1]
  M_ALPHA           base colour factor's alpha
  M_ALPHA_MODE      ALPHA_OPAQUE, ALPHA_MASK, ALPHA_BLEND (scene_data.py)
  M_ALPHA_CUTOFF    MASK threshold
  M_DOUBLE_SIDED    1.0 when both faces are seen (glTF doubleSided)
  M_TRANSMISSION    KHR_materials_transmission factor
  M_THICKNESS       KHR_materials_volume thickness factor; 0 = thin-walled
  M_ATTEN_COLOR..+3 volume attenuation colour
  M_ATTEN_DIST      volume attenuation distance (inf: no absorption)
  M_CLEARCOAT, M_CLEARCOAT_ROUGHNESS   KHR_materials_clearcoat factors
  M_SPECULAR, M_SPECULAR_COLOR..+3     KHR_materials_specular factors
  M_TEX_*           row of the texture-reference table (`textures.py`), -1.0 for none
"""

from __future__ import annotations

M_TYPE = 0
M_COLOR = 1
M_ROUGHNESS = 4
M_IOR = 5
M_EMISSION = 6
M_METALLIC = 9
M_ALPHA = 10
M_ALPHA_MODE = 11
M_ALPHA_CUTOFF = 12
M_DOUBLE_SIDED = 13
M_TRANSMISSION = 14
M_THICKNESS = 15
M_ATTEN_COLOR = 16
M_ATTEN_DIST = 19
M_CLEARCOAT = 20
M_CLEARCOAT_ROUGHNESS = 21
M_SPECULAR = 22
M_SPECULAR_COLOR = 23
M_TEX_BASE = 26
M_TEX_METALLIC_ROUGHNESS = 27
M_TEX_NORMAL = 28
M_TEX_EMISSIVE = 29
M_TEX_TRANSMISSION = 30
M_TEX_CLEARCOAT = 31
M_TEX_CLEARCOAT_ROUGHNESS = 32
M_TEX_SPECULAR = 33
M_TEX_SPECULAR_COLOR = 34
M_GROUP = 35  # light group of the material's emission (reserved for the layers issue)
MATERIAL_SIZE = 40

TEXTURE_COLUMNS = (M_TEX_BASE, M_TEX_METALLIC_ROUGHNESS, M_TEX_NORMAL, M_TEX_EMISSIVE, M_TEX_TRANSMISSION,
                   M_TEX_CLEARCOAT, M_TEX_CLEARCOAT_ROUGHNESS, M_TEX_SPECULAR, M_TEX_SPECULAR_COLOR)

DIFFUSE = 0
METAL = 1
GLASS = 2
PLASTIC = 3
PBR = 4
