"""glTF 2.0 mesh deformation: morph targets, then skinning, at one time.

Follows the glTF 2.0 specification (Khronos, 2021):

* Morph targets (section 3.7.2.2): position = base + Σ_k w_k · Δposition_k, and the same sum
  for normals, which are then renormalised.
* Skins (section 3.7.3): linear blend skinning with four (joint, weight) pairs per vertex,
  skin matrix = Σ_i w_i · jointMatrix_i, applied after the morph targets. lampyr uses the
  spec's joint matrix jointMatrix_j = world(joint_j) · inverseBindMatrix_j, which puts the
  skinned vertices straight into world space: the spec says the transform of the skinned mesh
  node itself is ignored (only the joints' transforms place the mesh). The older form
  inverse(world(mesh node)) · world(joint_j) · inverseBindMatrix_j gives the same points after
  the mesh node's world matrix is applied again, but fails when that matrix is singular.
  Weights are used as the file gives them (the spec requires them to sum to 1).
* Normals go through the inverse-transpose of the skin matrix's 3x3 part, computed as its
  cofactor matrix times the sign of its determinant (a positive multiple of the
  inverse-transpose, defined even when the matrix is singular), and are renormalised.

Results are float64 arrays; shapes are stated per function.
"""

from __future__ import annotations

import numpy as np

from lampyr.errors import AssetError
from .gltf_animation import channels_by_target, morph_weights, world_matrices
from .scene_data import SceneData

SPACE_WORLD = "world"  # skinned: positions are world positions, ignore the node's transform
SPACE_OBJECT = "object"  # morph only (or rigid): positions are in the node's object space


def _morph_count(mesh) -> int:
    for arr in (mesh.morph_positions, mesh.morph_normals):
        if arr is not None:
            return int(arr.shape[0])
    return 0


def _is_skinned(scene: SceneData, node: int) -> bool:
    spec = scene.nodes[node]
    if spec.mesh < 0 or spec.skin < 0:
        return False
    mesh = scene.meshes[spec.mesh]
    return mesh.joints is not None and mesh.weights is not None and len(scene.skins[spec.skin].joints) > 0


def is_deforming(scene: SceneData, node: int) -> bool:
    """True when `node`'s mesh must be drawn from `deformed_vertices` rather than its rest positions.

    That is: the node has a skin with at least one joint and its mesh has JOINTS_0/WEIGHTS_0; or
    the mesh has morph targets and some weight is non-zero at some time. For the weights, the
    node's "weights" channel decides when it has one (a channel whose every stored number,
    tangents included, is zero keeps the weights at zero at all times), else the rest weights
    (node, then mesh). A True result does not promise the shape changes over time: a skin whose
    joints never move, or constant non-zero morph weights, deform the mesh the same in every frame.
    """
    spec = scene.nodes[node]
    if spec.mesh < 0:
        return False
    if _is_skinned(scene, node):
        return True
    if _morph_count(scene.meshes[spec.mesh]) == 0:
        return False
    channel = channels_by_target(scene).get((node, "weights"))
    if channel is not None:
        return bool(np.any(np.asarray(channel.values) != 0.0))
    return bool(np.any(morph_weights(scene, node, 0.0) != 0.0))


def joint_matrices(scene: SceneData, skin: int, worlds: np.ndarray) -> np.ndarray:
    """(J, 4, 4) float64 jointMatrix_j = world(joint_j) · inverseBindMatrix_j (glTF 2.0 section 3.7.3).

    worlds: (N, 4, 4) world matrices of every node at the time wanted (`world_matrices`).
    """
    spec = scene.skins[skin]
    return worlds[np.asarray(spec.joints, np.int64)] @ np.asarray(spec.inverse_bind, np.float64)


def skin_matrices(mesh, joint_mats: np.ndarray) -> np.ndarray:
    """(V, 3, 4) float64 per-vertex skin matrices Σ_{i<4} weights[v, i] · joint_mats[joints[v, i]]
    (the bottom row, always (0, 0, 0, Σ w), is left out)."""
    joints = np.asarray(mesh.joints, np.int64)
    weights = np.asarray(mesh.weights, np.float64)
    top = joint_mats[:, :3, :]
    blend = np.zeros((joints.shape[0], 3, 4))
    for i in range(joints.shape[1]):
        blend += weights[:, i, None, None] * top[joints[:, i]]
    return blend


def _unit(v: np.ndarray, fallback: np.ndarray) -> np.ndarray:
    """Rows of v scaled to length 1; a zero-length row takes the fallback row."""
    length = np.linalg.norm(v, axis=1, keepdims=True)
    ok = length[:, 0] > 0.0
    out = fallback.copy()
    out[ok] = v[ok] / length[ok]
    return out


def morphed_vertices(scene: SceneData, node: int, t: float):
    """(positions (V, 3), normals (V, 3) or None) of `node`'s mesh after its morph targets at time t,
    in the mesh's object space (glTF 2.0 section 3.7.2.2)."""
    spec = scene.nodes[node]
    mesh = scene.meshes[spec.mesh]
    positions = np.array(mesh.positions, np.float64)
    normals = None if mesh.normals is None else np.array(mesh.normals, np.float64)
    count = _morph_count(mesh)
    if count == 0:
        return positions, normals
    w = morph_weights(scene, node, t)
    if w.shape != (count,):
        raise AssetError(
            spec.source or f"nodes[{node}]",
            f"has {w.size} morph weights but its mesh {mesh.source or mesh.name!r} has {count} morph targets;"
            " the counts must match",
            scene.path,
        )
    if mesh.morph_positions is not None:
        positions += np.tensordot(w, mesh.morph_positions, axes=1)
    if normals is not None and mesh.morph_normals is not None:
        normals = _unit(normals + np.tensordot(w, mesh.morph_normals, axes=1), normals)
    return positions, normals


def deformed_vertices(scene: SceneData, node: int, t: float, worlds: np.ndarray | None = None):
    """(positions (V, 3) float64, normals (V, 3) float64 or None, space) of `node`'s mesh at time t.

    Morph targets first, then the skin (the spec's order). space is SPACE_WORLD when the node is
    skinned (the points are world positions: do not apply the node's transform) and SPACE_OBJECT
    otherwise (the node's object space: place them with the node's world matrix).
    worlds: (N, 4, 4) `world_matrices(scene, t)` when the caller has them already.
    """
    positions, normals = morphed_vertices(scene, node, t)
    if not _is_skinned(scene, node):
        return positions, normals, SPACE_OBJECT
    spec = scene.nodes[node]
    mesh = scene.meshes[spec.mesh]
    skin = scene.skins[spec.skin]
    joints = np.asarray(mesh.joints)
    if joints.size and (joints.min() < 0 or joints.max() >= len(skin.joints)):
        raise AssetError(
            f"{mesh.source or mesh.name}.attributes.JOINTS_0",
            f"joint index {int(joints.max())} is outside skin {skin.source or spec.skin!r}, which has "
            f"{len(skin.joints)} joints",
            scene.path,
        )
    worlds = world_matrices(scene, t) if worlds is None else worlds
    blend = skin_matrices(mesh, joint_matrices(scene, spec.skin, worlds))
    linear = blend[:, :, :3]
    positions = np.einsum("vij,vj->vi", linear, positions) + blend[:, :, 3]
    if normals is not None:
        c0, c1, c2 = linear[:, :, 0], linear[:, :, 1], linear[:, :, 2]
        cof = np.stack([np.cross(c1, c2), np.cross(c2, c0), np.cross(c0, c1)], axis=2)  # det · A^-T
        sign = np.where(np.einsum("vi,vi->v", c0, np.cross(c1, c2)) < 0.0, -1.0, 1.0)
        normals = _unit(sign[:, None] * np.einsum("vij,vj->vi", cof, normals), normals)
    return positions, normals, SPACE_WORLD
