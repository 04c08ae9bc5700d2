"""Helpers for the glTF reader's tests: write a file with examples/gltf_builder.py and check it
with the Khronos glTF-Validator (0 errors) before any test reads it."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from examples.gltf_builder import GltfBuilder
from tests.gltf_validator import assert_valid, validate

# a unit quad in the z = 0 plane, counter-clockwise seen from +z (front), two triangles
QUAD_POSITIONS = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [1.0, 1.0, 0.0], [0.0, 1.0, 0.0]])
QUAD_NORMALS = np.tile([0.0, 0.0, 1.0], (4, 1))
QUAD_UVS = np.array([[0.0, 1.0], [1.0, 1.0], [1.0, 0.0], [0.0, 0.0]])
QUAD_FACES = np.array([[0, 1, 2], [0, 2, 3]])


def save_valid(builder: GltfBuilder, path, **kw) -> Path:
    """Write `builder` to `path` and fail unless the Khronos validator reports 0 errors."""
    path = builder.save(path, **kw)
    assert_valid(path)
    return path


def quad_scene(**material) -> GltfBuilder:
    """One quad mesh with one material (keyword arguments of add_material) on one node."""
    b = GltfBuilder()
    mat = b.add_material("quad material", **material)
    mesh = b.add_mesh([b.primitive(QUAD_POSITIONS, QUAD_NORMALS, QUAD_UVS, indices=QUAD_FACES, material=mat)],
                      name="quad")
    b.add_node("quad node", mesh=mesh)
    return b


def rewrite_json(path: Path, change) -> Path:
    """Apply `change(doc)` to the JSON of a .gltf file in place (for broken-file tests)."""
    doc = json.loads(path.read_text())
    change(doc)
    path.write_text(json.dumps(doc))
    return path


def validator_pointers(path) -> list[str]:
    """JSON pointers of the validator's errors on `path` (to check a broken file is broken)."""
    report = validate(path)
    return [m.get("pointer", "") for m in report["issues"]["messages"] if m["severity"] == 0]
