"""The bottom level of the scene: every mesh's BVH, triangles, materials and vertex attributes,
concatenated into flat arrays the kernels index by mesh.

A mesh is stored once, in its own object space, however many instances place it. Triangles sit
in BVH leaf order; for triangle row k (absolute):

* `tris[k]` (3, 3) float32: its corners;
* `tri_mat[k]` int32: its material's row in the material table (an instance may override it);
* `tri_vtx[k]` (3,) int32: rows of its corners in the vertex-attribute arrays `vtx_n` (V, 3)
  float32 unit normals, `vtx_uv` (V, 4) float32 (u0, v0, u1, v1), `vtx_t` (V, 4) float32
  tangents (xyz unit, w = ±1 handedness).

`mesh_attr[m]` says which attributes mesh m has (ATTR_* bits); a kernel reads an attribute only
when its bit is set, so a mesh without them costs nothing but its `tri_vtx` rows.

A deforming mesh (a skin or morph targets, rebuilt every frame) also has its pose at shutter
close: `mesh_end[m]` is the row of `tris_end` (T2, 3, 3) float32 that holds its first triangle
there (-1 for meshes that do not deform), and its BVH bounds both poses. A ray at shutter
fraction w sees the corners (1 - w) a + w b (deformation blur).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .bvh import build_bvh, corner_bounds, pack_triangles
from .wide_bvh import collapse_bvh, concat_nodes, empty_wide

ATTR_NORMAL = 1
ATTR_UV0 = 2
ATTR_UV1 = 4
ATTR_TANGENT = 8


@dataclass(frozen=True, eq=False)
class MeshTable:
    """Concatenated bottom-level arrays (shapes in the module docstring); M meshes, T triangles."""

    blas_box: np.ndarray  # (N, 8, 8) float32 eight-wide nodes (wide_bvh.py)
    blas_meta: np.ndarray  # (N, 8, 8) int32 view of blas_box
    blas_span: np.ndarray  # (N, 2) int32 leaf spans (wide_bvh.leaf_spans)
    tris: np.ndarray  # (T, 3, 3) float32
    tri_mat: np.ndarray  # (T,) int32
    tri_vtx: np.ndarray  # (T, 3) int32
    vtx_n: np.ndarray  # (V, 3) float32
    vtx_uv: np.ndarray  # (V, 4) float32
    vtx_t: np.ndarray  # (V, 4) float32
    mesh_node_base: np.ndarray  # (M,) int64
    mesh_tri_base: np.ndarray  # (M,) int64
    mesh_tri_count: np.ndarray  # (M,) int64
    mesh_attr: np.ndarray  # (M,) int64
    mesh_box: np.ndarray  # (M, 2, 3) float64 object-space bounds
    tris_end: np.ndarray  # (T2, 3, 3) float32 deforming meshes' triangles at shutter close
    mesh_end: np.ndarray  # (M,) int64 first row in tris_end, -1 when the mesh does not deform

    @property
    def triangle_count(self) -> int:
        return int(self.mesh_tri_count.sum())

    @property
    def mesh_count(self) -> int:
        return int(self.mesh_tri_base.shape[0])


class MeshTableBuilder:
    """Collects meshes (`add`) and concatenates them (`build`)."""

    def __init__(self):
        self._parts: list[dict] = []

    def add(self, positions, faces, tri_mat, normals=None, uv0=None, uv1=None, tangents=None,
            positions_end=None) -> int:
        """Add one mesh; returns its index.

        positions (V, 3) float64, faces (F, 3) int64, tri_mat (F,) int material rows; optional
        per-vertex normals (V, 3), uv0 / uv1 (V, 2), tangents (V, 4), all float; positions_end
        (V, 3): the vertices at shutter close, for a mesh that deforms.
        """
        v = np.asarray(positions, np.float64)
        f = np.asarray(faces, np.int64).reshape(-1, 3)
        tri = v[f]
        end = None
        if positions_end is not None:
            v_end = np.asarray(positions_end, np.float64)
            end = v_end[f]
            tri = np.concatenate([tri, end], axis=1)  # boxes bound both poses
        # SAH termination (bigger leaves where they are cheaper) pays for meshes: +10 % on
        # incoherent rays in bench/rays.py; the small top level keeps plain leaves
        bvh = build_bvh(*corner_bounds(tri), max_leaf=16, trav_cost=4.0)
        order = np.asarray(bvh.order)
        attr = 0
        nv = len(v)
        vn = np.zeros((nv, 3), np.float32)
        uv = np.zeros((nv, 4), np.float32)
        vt = np.zeros((nv, 4), np.float32)
        if normals is not None:
            n = np.asarray(normals, np.float64)
            length = np.linalg.norm(n, axis=1, keepdims=True)
            vn[:] = np.where(length > 0, n / np.where(length > 0, length, 1.0), 0.0)
            attr |= ATTR_NORMAL
        if uv0 is not None:
            uv[:, 0:2] = uv0
            attr |= ATTR_UV0
        if uv1 is not None:
            uv[:, 2:4] = uv1
            attr |= ATTR_UV1
        if tangents is not None:
            vt[:] = tangents
            attr |= ATTR_TANGENT
        self._parts.append(dict(
            wide=collapse_bvh(bvh), tris=pack_triangles(v, f, order), tri_mat=np.asarray(tri_mat, np.int32)[order],
            tri_vtx=f[order].astype(np.int64), vn=vn, uv=uv, vt=vt, attr=attr,
            box=np.array([tri.reshape(-1, 3).min(axis=0), tri.reshape(-1, 3).max(axis=0)]),
            tris_end=None if end is None else pack_triangles(v_end, f, order),
        ))
        return len(self._parts) - 1

    def build(self) -> MeshTable:
        parts = self._parts
        node_base, tri_base, tri_count = [], [], []
        n_nodes = n_tris = n_verts = 0
        tri_vtx = []
        mesh_end = []
        n_end = 0
        for p in parts:
            if p["tris_end"] is None:
                mesh_end.append(-1)
            else:
                mesh_end.append(n_end)
                n_end += len(p["tris_end"])
            node_base.append(n_nodes)
            tri_base.append(n_tris)
            tri_count.append(len(p["tris"]))
            tri_vtx.append(p["tri_vtx"] + n_verts)
            n_nodes += len(p["wide"].box)
            n_tris += len(p["tris"])
            n_verts += len(p["vn"])

        def cat(arrs, shape, dtype):
            return np.ascontiguousarray(np.concatenate(arrs).astype(dtype, copy=False)) if arrs \
                else np.zeros(shape, dtype)

        nodes = concat_nodes([p["wide"].box for p in parts]) if parts else empty_wide()
        return MeshTable(
            blas_box=nodes.box,
            blas_meta=nodes.meta,
            blas_span=nodes.span,
            tris=cat([p["tris"] for p in parts], (1, 3, 3), np.float32),
            tri_mat=cat([p["tri_mat"] for p in parts], (1,), np.int32),
            tri_vtx=cat(tri_vtx, (1, 3), np.int32),
            vtx_n=cat([p["vn"] for p in parts], (1, 3), np.float32),
            vtx_uv=cat([p["uv"] for p in parts], (1, 4), np.float32),
            vtx_t=cat([p["vt"] for p in parts], (1, 4), np.float32),
            mesh_node_base=np.array(node_base, np.int64),
            mesh_tri_base=np.array(tri_base, np.int64),
            mesh_tri_count=np.array(tri_count, np.int64),
            mesh_attr=np.array([p["attr"] for p in parts], np.int64),
            mesh_box=np.array([p["box"] for p in parts], np.float64).reshape(-1, 2, 3),
            tris_end=cat([p["tris_end"] for p in parts if p["tris_end"] is not None], (0, 3, 3), np.float32),
            mesh_end=np.array(mesh_end, np.int64),
        )
