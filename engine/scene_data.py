"""An imported scene as plain data: what a glTF 2.0 file (or an OBJ / PLY / STL mesh) holds.

This is the contract between the readers (`gltf_read.py`, `mesh_read.py`), the animation
evaluator (`gltf_animation.py`) and the compiler (`compiler.py`), which turns it into the arrays
the kernels read. Nothing here is numba code; every array is numpy, shapes and dtypes stated.

Conventions, all of them the glTF 2.0 specification's unless said otherwise:

* Units are metres and radians; +Y is up; a camera looks down its local -Z with +Y up.
* Quaternions are stored **w, x, y, z** (lampyr's own order, as in `transforms.py`); the glTF
  file stores x, y, z, w and the reader reorders them.
* UV (0, 0) is the first pixel of the image (its top-left corner as the file stores it); v grows
  downwards in the image.
* Colours are linear RGB: factors as the file gives them. Textures keep their 8-bit values; a
  base-colour or emissive texture is sRGB-encoded and decoded at lookup (IEC 61966-2-1).
* Each `source` string is the glTF path of the item (`meshes[3].primitives[0]`) or, for other
  formats, a short description; errors quote it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

# wrap modes (glTF sampler.wrapS / wrapT: 10497 REPEAT, 33071 CLAMP_TO_EDGE, 33648 MIRRORED_REPEAT)
WRAP_REPEAT = 0
WRAP_CLAMP = 1
WRAP_MIRROR = 2
GL_WRAP = {10497: WRAP_REPEAT, 33071: WRAP_CLAMP, 33648: WRAP_MIRROR}

# material.alphaMode
ALPHA_OPAQUE = 0
ALPHA_MASK = 1
ALPHA_BLEND = 2

# light types (KHR_lights_punctual)
LIGHT_POINT = 0
LIGHT_SPOT = 1
LIGHT_DIRECTIONAL = 2

IDENTITY_UV = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]])


@dataclass(frozen=True, eq=False)
class TexRef:
    """A material's use of a texture (glTF textureInfo, with KHR_texture_transform folded in).

    image: index into SceneData.images; texcoord: which UV set (0 or 1);
    wrap_s, wrap_t: WRAP_*; uv_transform: (2, 3) float64, uv' = uv_transform @ [u, v, 1]
    (the extension's T · R · S matrix; identity without it); scale: normalTexture.scale (normal
    maps) or 1.0.
    """

    image: int
    texcoord: int = 0
    wrap_s: int = WRAP_REPEAT
    wrap_t: int = WRAP_REPEAT
    uv_transform: np.ndarray = field(default_factory=lambda: IDENTITY_UV.copy())
    scale: float = 1.0
    source: str = ""


@dataclass(frozen=True, eq=False)
class Image:
    """A decoded texture image: rgba (H, W, 4) uint8, row 0 the image's first (top) row."""

    name: str
    rgba: np.ndarray
    source: str = ""


@dataclass(frozen=True, eq=False)
class MaterialSpec:
    """The glTF metallic-roughness material and the KHR_materials_* extensions lampyr reads.

    Defaults are the specification's. base_color: (4,) linear RGBA factor; emissive: (3,) factor;
    attenuation_color: (3,); specular_color: (3,). Textures are TexRef or None.
    """

    name: str
    base_color: np.ndarray = field(default_factory=lambda: np.ones(4))
    base_color_tex: TexRef | None = None
    metallic: float = 1.0
    roughness: float = 1.0
    metallic_roughness_tex: TexRef | None = None  # B = metallic, G = roughness
    normal_tex: TexRef | None = None
    emissive: np.ndarray = field(default_factory=lambda: np.zeros(3))
    emissive_tex: TexRef | None = None
    emissive_strength: float = 1.0  # KHR_materials_emissive_strength
    alpha_mode: int = ALPHA_OPAQUE
    alpha_cutoff: float = 0.5
    double_sided: bool = False
    ior: float = 1.5  # KHR_materials_ior
    transmission: float = 0.0  # KHR_materials_transmission
    transmission_tex: TexRef | None = None  # R
    thickness: float = 0.0  # KHR_materials_volume; 0 = thin-walled
    attenuation_color: np.ndarray = field(default_factory=lambda: np.ones(3))
    attenuation_distance: float = math.inf
    clearcoat: float = 0.0  # KHR_materials_clearcoat
    clearcoat_tex: TexRef | None = None  # R
    clearcoat_roughness: float = 0.0
    clearcoat_roughness_tex: TexRef | None = None  # G
    specular: float = 1.0  # KHR_materials_specular
    specular_tex: TexRef | None = None  # A
    specular_color: np.ndarray = field(default_factory=lambda: np.ones(3))
    specular_color_tex: TexRef | None = None  # RGB, sRGB-encoded
    source: str = ""


@dataclass(frozen=True, eq=False)
class MeshData:
    """One glTF mesh (all its primitives, concatenated), in the mesh's own object space.

    positions: (V, 3) float64; faces: (F, 3) int64 into the vertices, counter-clockwise = front;
    face_material: (F,) int64 index into SceneData.materials, -1 for the spec's default material;
    normals: (V, 3) float64 unit or None (then shading is flat, as the spec asks);
    uv0, uv1: (V, 2) float64 or None; tangents: (V, 4) float64 (xyz unit, w = ±1 handedness)
    or None; joints: (V, 4) int64 and weights (V, 4) float64 (skins) or None;
    morph_positions, morph_normals: (K, V, 3) float64 displacements or None;
    morph_weights: (K,) float64 default weights (mesh.weights) or an empty array.
    """

    name: str
    positions: np.ndarray
    faces: np.ndarray
    face_material: np.ndarray
    normals: np.ndarray | None = None
    uv0: np.ndarray | None = None
    uv1: np.ndarray | None = None
    tangents: np.ndarray | None = None
    joints: np.ndarray | None = None
    weights: np.ndarray | None = None
    morph_positions: np.ndarray | None = None
    morph_normals: np.ndarray | None = None
    morph_weights: np.ndarray = field(default_factory=lambda: np.zeros(0))
    source: str = ""


@dataclass(frozen=True, eq=False)
class CameraSpec:
    """A perspective camera: yfov in radians; aspect None when the file gives none."""

    name: str
    yfov: float
    znear: float = 0.01
    aspect: float | None = None
    source: str = ""


@dataclass(frozen=True, eq=False)
class LightSpec:
    """A KHR_lights_punctual light. color (3,) linear; intensity as the file gives it (candela
    for point and spot, lux for directional: lampyr reads it in the shot's radiance units, see
    docs/shot-file.md); cone angles in radians; range None when infinite.
    The light shines down its node's local -Z (spot, directional)."""

    name: str
    type: int
    color: np.ndarray
    intensity: float = 1.0
    range: float | None = None
    inner_cone: float = 0.0
    outer_cone: float = math.pi / 4.0
    source: str = ""


@dataclass(frozen=True, eq=False)
class NodeSpec:
    """A node at rest. parent: index or -1; translation (3,), rotation (4,) w-x-y-z, scale (3,);
    matrix: (4, 4) float64 when the file gives a matrix instead of TRS (such a node is not
    animated); mesh, camera, light, skin: indices or -1; weights: (K,) morph weights or None."""

    name: str
    parent: int = -1
    children: tuple = ()
    translation: np.ndarray = field(default_factory=lambda: np.zeros(3))
    rotation: np.ndarray = field(default_factory=lambda: np.array([1.0, 0.0, 0.0, 0.0]))
    scale: np.ndarray = field(default_factory=lambda: np.ones(3))
    matrix: np.ndarray | None = None
    mesh: int = -1
    camera: int = -1
    light: int = -1
    skin: int = -1
    weights: np.ndarray | None = None
    source: str = ""


@dataclass(frozen=True, eq=False)
class Channel:
    """One animation channel with its sampler. path: "translation" | "rotation" | "scale" |
    "weights"; interpolation: "LINEAR" | "STEP" | "CUBICSPLINE"; times: (K,) float64 seconds,
    increasing; values: (K, n) float64, or (K, 3, n) for CUBICSPLINE as (in-tangent, value,
    out-tangent); rotations w-x-y-z."""

    node: int
    path: str
    interpolation: str
    times: np.ndarray
    values: np.ndarray
    source: str = ""


@dataclass(frozen=True, eq=False)
class SkinSpec:
    """joints: (J,) int64 node indices; inverse_bind: (J, 4, 4) float64; skeleton: node or -1."""

    joints: np.ndarray
    inverse_bind: np.ndarray
    skeleton: int = -1
    source: str = ""


@dataclass(frozen=True, eq=False)
class SceneData:
    """Everything lampyr renders from one scene file.

    roots: node indices of the scene shown (the file's default scene, else scene 0); channels:
    every channel of every animation (all animations play together, from time 0);
    extensions_ignored: optional extensions the file uses that lampyr does not read (a warning,
    not an error).
    """

    path: str
    nodes: tuple = ()
    roots: tuple = ()
    meshes: tuple = ()
    materials: tuple = ()
    images: tuple = ()
    cameras: tuple = ()
    lights: tuple = ()
    channels: tuple = ()
    skins: tuple = ()
    extensions_ignored: tuple = ()
