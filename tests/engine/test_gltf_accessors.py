"""Accessor decoding (engine/gltf_accessors.py) against the glTF 2.0 specification, section 3.6
(componentType, type, byteOffset, byteStride, column padding, sparse) and 3.11 (normalized
integers), with expected values written by hand from those sections. Files pass the Khronos
glTF-Validator first; interleaved vertices are also read back with trimesh (an independent reader).
"""

from __future__ import annotations

import numpy as np
import pytest
import trimesh

from examples.gltf_builder import (ARRAY_BUFFER, BYTE, FLOAT, SHORT, UNSIGNED_BYTE, UNSIGNED_INT,
                                   UNSIGNED_SHORT, GltfBuilder)
from lampyr.engine.gltf_accessors import GltfFile
from lampyr.engine.gltf_read import read_gltf
from tests.engine.gltf_files import QUAD_FACES, QUAD_NORMALS, QUAD_POSITIONS, save_valid


def _decode(tmp_path, build):
    """Write a file whose accessor `build(b)` returns, validate it, decode that accessor."""
    b = GltfBuilder()
    index = build(b)
    gf = GltfFile(save_valid(b, tmp_path / "acc.glb"), "scene")
    gf.load()
    return gf.accessor(index, "test")


@pytest.mark.parametrize("component, raw, expected", [
    # spec 3.11: unsigned f = c / (2^n - 1); signed f = max(c / (2^(n-1) - 1), -1)
    (UNSIGNED_BYTE, [0, 51, 255], [0.0, 0.2, 1.0]),
    (UNSIGNED_SHORT, [0, 13107, 65535], [0.0, 0.2, 1.0]),
    (BYTE, [-128, -127, 0, 127], [-1.0, -1.0, 0.0, 1.0]),
    (SHORT, [-32768, -32767, 16384, 32767], [-1.0, -1.0, 16384 / 32767, 1.0]),
])
def test_normalized_integers(tmp_path, component, raw, expected):
    got = _decode(tmp_path, lambda b: b.add_accessor(np.array(raw), component, "SCALAR", normalized=True))
    np.testing.assert_allclose(got, expected, rtol=1e-15)
    assert got.dtype == np.float64


@pytest.mark.parametrize("component", [UNSIGNED_BYTE, UNSIGNED_SHORT, UNSIGNED_INT])
def test_plain_integers_stay_integers(tmp_path, component):
    got = _decode(tmp_path, lambda b: b.add_accessor(np.array([3, 0, 200]), component, "SCALAR"))
    assert got.dtype == np.int64
    np.testing.assert_array_equal(got, [3, 0, 200])


def test_vec3_floats_keep_their_shape(tmp_path):
    data = np.arange(12, dtype=float).reshape(4, 3)
    np.testing.assert_array_equal(_decode(tmp_path, lambda b: b.add_accessor(data, FLOAT, "VEC3")), data)


def test_mat4_is_read_column_major(tmp_path):
    # spec 3.6.2.4 / 3.5.3: matrices are stored column by column; translation in numbers 12..14
    m = np.arange(16, dtype=float).reshape(4, 4)

    def build(b):
        index = b.add_accessor(m[None], FLOAT, "MAT4")
        stored = np.frombuffer(bytes(b.blob), np.float32, 16, b.doc["bufferViews"][-1]["byteOffset"])
        np.testing.assert_array_equal(stored, m.T.ravel())  # the writer stored the columns in turn
        return index

    np.testing.assert_array_equal(_decode(tmp_path, build)[0], m)


def test_mat2_of_bytes_has_padded_columns(tmp_path):
    # spec 3.6.2.4: "each column of a MAT2 of 1-byte components starts on a 4-byte boundary":
    # element bytes c00 c10 _ _ c01 c11 _ _ (hand-written)
    raw = bytes([1, 2, 0, 0, 3, 4, 0, 0, 5, 6, 0, 0, 7, 8, 0, 0])

    def build(b):
        b.doc.setdefault("accessors", []).append(
            {"bufferView": b.add_buffer_view(raw), "componentType": UNSIGNED_BYTE, "count": 2, "type": "MAT2"})
        return len(b.doc["accessors"]) - 1

    got = _decode(tmp_path, build)
    np.testing.assert_array_equal(got, [[[1, 3], [2, 4]], [[5, 7], [6, 8]]])


def _interleaved(b):
    """A quad whose positions and normals share one bufferView, 24 bytes per vertex."""
    data = np.concatenate([QUAD_POSITIONS, QUAD_NORMALS], axis=1).astype(np.float32).tobytes()
    view = b.add_buffer_view(data, ARRAY_BUFFER, stride=24)
    accs = b.doc.setdefault("accessors", [])
    accs.append({"bufferView": view, "byteOffset": 0, "componentType": FLOAT, "count": 4, "type": "VEC3",
                 "min": QUAD_POSITIONS.min(axis=0).tolist(), "max": QUAD_POSITIONS.max(axis=0).tolist()})
    accs.append({"bufferView": view, "byteOffset": 12, "componentType": FLOAT, "count": 4, "type": "VEC3"})
    prim = {"attributes": {"POSITION": len(accs) - 2, "NORMAL": len(accs) - 1},
            "indices": b.add_accessor(QUAD_FACES.ravel(), UNSIGNED_SHORT, "SCALAR")}
    b.add_node("n", mesh=b.add_mesh([prim], name="interleaved"))


def test_interleaved_attributes_use_the_byte_stride(tmp_path):
    b = GltfBuilder()
    _interleaved(b)
    path = save_valid(b, tmp_path / "inter.glb")
    mesh = read_gltf(path, "scene").meshes[0]
    np.testing.assert_array_equal(mesh.positions, QUAD_POSITIONS)
    np.testing.assert_array_equal(mesh.normals, QUAD_NORMALS)
    theirs = trimesh.load_scene(str(path), process=False).geometry["interleaved"]
    np.testing.assert_array_equal(mesh.positions, theirs.vertices)  # independent reader agrees


def _sparse(b, with_base: bool):
    """POSITION of a quad: sparse substitution of vertices 1 and 3 (spec 3.6.2.3)."""
    base = np.zeros((4, 3)) if not with_base else QUAD_POSITIONS
    new = np.array([[2.0, 0.0, 0.0], [0.0, 3.0, 0.0]])
    full = base.copy()
    full[[1, 3]] = new
    acc = {"componentType": FLOAT, "count": 4, "type": "VEC3",
           "min": full.min(axis=0).tolist(), "max": full.max(axis=0).tolist(),
           "sparse": {"count": 2,
                      "indices": {"bufferView": b.add_buffer_view(np.array([1, 3], np.uint16).tobytes()),
                                  "componentType": UNSIGNED_SHORT},
                      "values": {"bufferView": b.add_buffer_view(new.astype(np.float32).tobytes())}}}
    if with_base:
        acc["bufferView"] = b.add_buffer_view(base.astype(np.float32).tobytes(), ARRAY_BUFFER)
    accs = b.doc.setdefault("accessors", [])
    accs.append(acc)
    prim = {"attributes": {"POSITION": len(accs) - 1},
            "indices": b.add_accessor(QUAD_FACES.ravel(), UNSIGNED_SHORT, "SCALAR")}
    b.add_node("n", mesh=b.add_mesh([prim]))
    return full


@pytest.mark.parametrize("with_base", [True, False])
def test_sparse_accessor_substitutes_its_elements(tmp_path, with_base):
    # spec 3.6.2.3: without a bufferView the accessor starts as zeros
    b = GltfBuilder()
    expected = _sparse(b, with_base)
    mesh = read_gltf(save_valid(b, tmp_path / "sparse.glb"), "scene").meshes[0]
    np.testing.assert_array_equal(mesh.positions, expected)


def test_quantized_positions_and_normals(tmp_path):
    # KHR_mesh_quantization README: POSITION may be (normalized or not) SHORT, NORMAL normalized
    # BYTE; the accessors decode as spec 3.11 says (plain integers keep their value)
    b = GltfBuilder()
    b.require_extension("KHR_mesh_quantization")
    pos = np.array([[0, 0, 0], [100, 0, 0], [100, 100, 0], [0, 100, 0]])
    normals = np.tile([0, 0, 127], (4, 1))
    prim = {"attributes": {
        "POSITION": b.add_accessor(pos, SHORT, "VEC3", target=ARRAY_BUFFER, min_max=True, stride=8),
        "NORMAL": b.add_accessor(normals, BYTE, "VEC3", normalized=True, target=ARRAY_BUFFER, stride=4)},
        "indices": b.add_accessor(QUAD_FACES.ravel(), UNSIGNED_SHORT, "SCALAR")}
    b.add_node("n", mesh=b.add_mesh([prim]))
    mesh = read_gltf(save_valid(b, tmp_path / "quantized.glb"), "scene").meshes[0]
    np.testing.assert_array_equal(mesh.positions, pos)
    np.testing.assert_array_equal(mesh.normals, np.tile([0.0, 0.0, 1.0], (4, 1)))
