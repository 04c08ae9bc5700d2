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

import math

import numpy as np
from numba import njit

from .scene_data import ALPHA_OPAQUE

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
M_GROUP = 35  # light group of the material's emission (engine/layers.py; 0: ungrouped)
MATERIAL_SIZE = 40

TEXTURE_COLUMNS = (M_TEX_BASE, M_TEX_METALLIC_ROUGHNESS, M_TEX_NORMAL, M_TEX_EMISSIVE, M_TEX_TRANSMISSION,
                   M_TEX_CLEARCOAT, M_TEX_CLEARCOAT_ROUGHNESS, M_TEX_SPECULAR, M_TEX_SPECULAR_COLOR)

DIFFUSE = 0
METAL = 1
GLASS = 2
PLASTIC = 3
PBR = 4


def row_from_spec(spec, texref_index) -> np.ndarray:
    """The PBR row of a `scene_data.MaterialSpec`.

    texref_index(ref: TexRef, srgb: bool) -> int gives the texture-reference row of a texture
    (srgb: its rgb is sRGB-encoded, as glTF says of base colour, emissive and specular colour).
    """
    row = blank_row(PBR)
    row[M_COLOR:M_COLOR + 3] = np.asarray(spec.base_color, np.float64)[:3]
    row[M_ALPHA] = float(np.asarray(spec.base_color, np.float64)[3])
    row[M_ROUGHNESS] = spec.roughness
    row[M_METALLIC] = spec.metallic
    row[M_IOR] = spec.ior
    row[M_EMISSION:M_EMISSION + 3] = np.asarray(spec.emissive, np.float64) * spec.emissive_strength
    row[M_ALPHA_MODE] = spec.alpha_mode
    row[M_ALPHA_CUTOFF] = spec.alpha_cutoff
    row[M_DOUBLE_SIDED] = 1.0 if spec.double_sided else 0.0
    row[M_TRANSMISSION] = spec.transmission
    row[M_THICKNESS] = spec.thickness
    row[M_ATTEN_COLOR:M_ATTEN_COLOR + 3] = spec.attenuation_color
    row[M_ATTEN_DIST] = spec.attenuation_distance
    row[M_CLEARCOAT] = spec.clearcoat
    row[M_CLEARCOAT_ROUGHNESS] = spec.clearcoat_roughness
    row[M_SPECULAR] = spec.specular
    row[M_SPECULAR_COLOR:M_SPECULAR_COLOR + 3] = spec.specular_color
    for column, ref, srgb in (
        (M_TEX_BASE, spec.base_color_tex, True),
        (M_TEX_METALLIC_ROUGHNESS, spec.metallic_roughness_tex, False),
        (M_TEX_NORMAL, spec.normal_tex, False),
        (M_TEX_EMISSIVE, spec.emissive_tex, True),
        (M_TEX_TRANSMISSION, spec.transmission_tex, False),
        (M_TEX_CLEARCOAT, spec.clearcoat_tex, False),
        (M_TEX_CLEARCOAT_ROUGHNESS, spec.clearcoat_roughness_tex, False),
        (M_TEX_SPECULAR, spec.specular_tex, False),
        (M_TEX_SPECULAR_COLOR, spec.specular_color_tex, True),
    ):
        if ref is not None:
            row[column] = texref_index(ref, srgb)
    return row


def blank_row(kind: int) -> np.ndarray:
    """A row of type `kind` whose every column has the value that changes nothing: opaque,
    one-sided off, no textures, no absorption, the specular extension's neutral 1."""
    row = np.zeros(MATERIAL_SIZE, np.float64)
    row[M_TYPE] = kind
    row[M_IOR] = 1.5
    row[M_ALPHA] = 1.0
    row[M_ALPHA_CUTOFF] = 0.5
    row[M_SPECULAR] = 1.0
    row[M_SPECULAR_COLOR:M_SPECULAR_COLOR + 3] = 1.0
    row[M_ATTEN_COLOR:M_ATTEN_COLOR + 3] = 1.0
    row[M_ATTEN_DIST] = math.inf
    row[list(TEXTURE_COLUMNS)] = -1.0
    return row


@njit(cache=True)
def passable(row):
    """True when a ray may pass the material without scattering: a cut-out (MASK), partial
    coverage (BLEND) or a thin-walled transmissive surface (before textures are applied)."""
    if row[M_ALPHA_MODE] != ALPHA_OPAQUE:
        return True
    return row[M_TYPE] == PBR and row[M_TRANSMISSION] > 0.0 and row[M_THICKNESS] <= 0.0


def is_passable(row: np.ndarray) -> bool:
    """`passable` for Python callers."""
    return bool(passable(np.asarray(row, np.float64)))
