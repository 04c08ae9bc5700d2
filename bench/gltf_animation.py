"""glTF animation benchmark: per-frame cost of node transforms and mesh deformation.

    python bench/gltf_animation.py [--small]

Prints milliseconds per call (best of 5, process CPU time) of
  1. world_matrices for a random node tree of N nodes, each with animated translation (LINEAR)
     and rotation (CUBICSPLINE) channels of 50 keys;
  2. deformed_vertices for a skinned mesh (V vertices, 4 influences, 64 joints), with normals;
  3. deformed_vertices for a morphing mesh (V vertices, 8 targets with normals).
These run once per frame (twice with deformation blur) on the Python side of the compiler.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from tables import print_table  # noqa: E402  (bench/ is run as scripts, not a package)

from lampyr.engine.gltf_animation import world_matrices  # noqa: E402
from lampyr.engine.scene_data import Channel, MeshData, NodeSpec, SceneData, SkinSpec  # noqa: E402
from lampyr.engine.skinning import deformed_vertices  # noqa: E402


def best_ms(fn, repeats=5):
    best = float("inf")
    for _ in range(repeats):
        start = time.process_time()
        fn()
        best = min(best, time.process_time() - start)
    return 1000.0 * best


def unit_quats(rng, n):
    q = rng.normal(size=(n, 4))
    return q / np.linalg.norm(q, axis=1, keepdims=True)


def tree_scene(rng, n_nodes, n_keys=50):
    nodes, channels = [], []
    times = np.linspace(0.0, 4.0, n_keys)
    for i in range(n_nodes):
        parent = -1 if i == 0 else int(rng.integers(0, i))
        nodes.append(NodeSpec(f"n{i}", parent=parent, translation=rng.normal(size=3)))
        channels.append(Channel(i, "translation", "LINEAR", times, rng.normal(size=(n_keys, 3))))
        cubic = 0.1 * rng.normal(size=(n_keys, 3, 4))
        cubic[:, 1] = unit_quats(rng, n_keys)
        channels.append(Channel(i, "rotation", "CUBICSPLINE", times, cubic))
    return SceneData("bench.gltf", nodes=tuple(nodes), roots=(0,), channels=tuple(channels))


def skinned_scene(rng, n_verts, n_joints=64):
    positions = rng.normal(size=(n_verts, 3))
    normals = positions / np.linalg.norm(positions, axis=1, keepdims=True)
    joints = rng.integers(0, n_joints, size=(n_verts, 4))
    weights = rng.random((n_verts, 4))
    weights /= weights.sum(axis=1, keepdims=True)
    mesh = MeshData("skin", positions, np.zeros((0, 3), np.int64), np.zeros(0, np.int64), normals=normals,
                    joints=joints, weights=weights)
    nodes = [NodeSpec("mesh", mesh=0, skin=0)]
    times = np.array([0.0, 1.0])
    channels = []
    for j in range(n_joints):
        nodes.append(NodeSpec(f"j{j}", parent=-1 if j == 0 else 1 + int(rng.integers(0, j)), translation=rng.normal(size=3)))
        channels.append(Channel(1 + j, "rotation", "LINEAR", times, unit_quats(rng, 2)))
    skin = SkinSpec(np.arange(1, n_joints + 1), np.tile(np.eye(4), (n_joints, 1, 1)))
    return SceneData("bench.gltf", nodes=tuple(nodes), meshes=(mesh,), channels=tuple(channels), skins=(skin,))


def morph_scene(rng, n_verts, n_targets=8):
    positions = rng.normal(size=(n_verts, 3))
    normals = positions / np.linalg.norm(positions, axis=1, keepdims=True)
    mesh = MeshData("morph", positions, np.zeros((0, 3), np.int64), np.zeros(0, np.int64), normals=normals,
                    morph_positions=0.1 * rng.normal(size=(n_targets, n_verts, 3)),
                    morph_normals=0.1 * rng.normal(size=(n_targets, n_verts, 3)), morph_weights=np.zeros(n_targets))
    channel = Channel(0, "weights", "LINEAR", np.array([0.0, 1.0]), rng.random((2, n_targets)))
    return SceneData("bench.gltf", nodes=(NodeSpec("m", mesh=0),), meshes=(mesh,), channels=(channel,))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--small", action="store_true", help="smaller sizes for a quick look")
    args = parser.parse_args()
    rng = np.random.default_rng(1)
    node_counts = (100, 1000) if args.small else (100, 1000, 5000)
    vert_counts = (10_000, 50_000) if args.small else (10_000, 100_000, 300_000)

    rows = []
    for n in node_counts:
        scene = tree_scene(rng, n)
        rows.append([n, f"{best_ms(lambda: world_matrices(scene, 1.37)):.1f}"])
    print_table("world_matrices (animated T LINEAR + R CUBICSPLINE on every node)", ["nodes", "ms/frame"], rows)

    rows = []
    for v in vert_counts:
        skinned = skinned_scene(rng, v)
        morph = morph_scene(rng, v)
        rows.append([v, f"{best_ms(lambda: deformed_vertices(skinned, 0, 0.4)):.1f}",
                     f"{best_ms(lambda: deformed_vertices(morph, 0, 0.4)):.1f}"])
    print_table("deformed_vertices with normals", ["vertices", "skin 64 joints ms", "morph 8 targets ms"], rows)


if __name__ == "__main__":
    main()
