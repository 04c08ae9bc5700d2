"""Scene compilation (shot → flat arrays) and ray queries against the compiled scene.

The compiled scene is a two-level hierarchy, kept as a NamedTuple of plain arrays (which numba
caches well, where a jitclass argument misses the cache on every run):

* bottom level: one eight-wide BVH (wide_bvh.py) per mesh in its own object space, all
  concatenated (`blas_*`, `tris`, with per-mesh node and triangle offsets), built once per shot
  and shared by every frame;
* top level: a BVH over *instances* (a mesh or an analytic sphere, with a material and a
  placement at shutter open and close), built per frame over the instances' motion bounds.

A ray is moved into an instance's object space with the placement interpolated at its time, so
moving objects blur without re-building anything. Object-space `t` equals world `t` because the
direction is transformed without re-normalising.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from numba import njit

from .borrowing import borrowing
from .intersect import ray_box, ray_sphere
from .transforms import placement_at, quat_rotate
from .wide_traversal import intersect_wide, intersect_wide_at, occluded_wide, occluded_wide_at

KIND_MESH = 0
KIND_SPHERE = 1


class Scene(NamedTuple):
    # bottom level, object space (float32 geometry)
    blas_box: np.ndarray  # (N, 8, 8) float32 eight-wide nodes (wide_bvh.py)
    blas_meta: np.ndarray  # (N, 8, 8) int32 view of blas_box: child rows and counts
    blas_span: np.ndarray  # (N, 2) int32 each node's leaf span (wide_bvh.leaf_spans)
    tris: np.ndarray  # (T, 3, 3) float32, in leaf order per mesh
    mesh_node_base: np.ndarray  # (M,) int64
    mesh_tri_base: np.ndarray  # (M,) int64
    mesh_tri_count: np.ndarray  # (M,) int64
    # per triangle and per vertex (mesh_table.py)
    tri_mat: np.ndarray  # (T,) int32 material row of each triangle
    tri_vtx: np.ndarray  # (T, 3) int32 rows of its corners in the vertex arrays
    vtx_n: np.ndarray  # (V, 3) float32 unit normals
    vtx_uv: np.ndarray  # (V, 4) float32 u0, v0, u1, v1
    vtx_t: np.ndarray  # (V, 4) float32 tangent xyz, handedness w
    mesh_attr: np.ndarray  # (M,) int64 ATTR_* bits
    tris_end: np.ndarray  # (T2, 3, 3) float32 deforming meshes at shutter close (mesh_table.py)
    mesh_end: np.ndarray  # (M,) int64 their first row there, -1 for meshes that do not deform
    # top level, world space
    tl_lo: np.ndarray  # (Q, 3) float32
    tl_hi: np.ndarray
    tl_a: np.ndarray
    tl_count: np.ndarray
    tl_axis: np.ndarray
    tl_order: np.ndarray  # (K,) int32 instance ids in leaf order
    # instances
    inst_kind: np.ndarray  # (K,) int64: KIND_MESH | KIND_SPHERE
    inst_mesh: np.ndarray  # (K,) int64 mesh index, -1 for spheres
    inst_mat: np.ndarray  # (K,) int64 row of `mats` for the whole instance, -1: per triangle
    inst_sphere: np.ndarray  # (K, 4) float64 object-space centre and radius
    inst_moving: np.ndarray  # (K,) int64: 1 when open and close placements differ
    inst_motion: np.ndarray  # (K, 2, 10) float64 placements at shutter open / close
    inst_light_base: np.ndarray  # (K,) int64 first light index of the instance, -1 if it does not emit
    inst_passable: np.ndarray  # (K,) int64 1 when some material of the instance lets rays pass
    mats: np.ndarray  # (m, MATERIAL_SIZE) float64 material rows (material_table.py)
    # textures (textures.py)
    texrefs: np.ndarray  # (R, TEXREF_SIZE) float64 texture references
    tex_pixels: np.ndarray  # (N,) uint8 RGBA texels of every image
    tex_info: np.ndarray  # (I, 4) int64 [offset, width, height, 0] per image
    srgb_lut: np.ndarray  # (256,) float64 sRGB-encoded byte -> linear
    # punctual lights (punctual.py)
    punct: np.ndarray  # (P, PUNCT_SIZE) float64
    # lights: emissive triangles and spheres, chosen in proportion to power
    light_inst: np.ndarray  # (L,) int64 instance; -1 for a punctual light
    light_prim: np.ndarray  # (L,) int64 absolute triangle index, -1 for a sphere, row of punct
    light_pmf: np.ndarray  # (L,) float64
    light_cdf: np.ndarray  # (L + 1,) float64
    # environment
    env_color: np.ndarray  # (3,) float64 uniform radiance (used when there is no map)
    env_map: np.ndarray  # (H, W, 3) float64 radiance, (1, 1, 3) when there is no map
    env_row_cdf: np.ndarray  # (H + 1,) float64 marginal over rows
    env_col_cdf: np.ndarray  # (H, W + 1) float64 conditional over columns per row
    env_params: np.ndarray  # (5,) float64: [has_map, strength, rotate (radians), p_env, light group]
    flags: np.ndarray  # (FLAG_COUNT,) int64 scene-wide facts (FLAG_*)


FLAG_PASSABLE = 0  # some material lets shadow rays through (cut-outs, coverage, thin transmission)
FLAG_COUNT = 4

# which instances a query visits
VISIT_ALL = 0
VISIT_SOLID = 1  # only instances whose materials all stop rays
VISIT_PASSABLE = 2  # only instances with some material that lets rays pass


# ------------------------------------------------------------------------------------------
# kernels


@njit(cache=True, inline="always")
def ray_to_object(motion, moving, time_u, ox, oy, oz, dx, dy, dz):
    """Object-space ray under the instance placement at time_u: p_o = R^T (p_w - t) / s."""
    if moving:
        tx, ty, tz, qw, qx, qy, qz, sx, sy, sz = placement_at(motion, time_u)
    else:
        m = motion[0]
        tx, ty, tz, qw, qx, qy, qz, sx, sy, sz = m[0], m[1], m[2], m[3], m[4], m[5], m[6], m[7], m[8], m[9]
    px, py, pz = quat_rotate(qw, -qx, -qy, -qz, ox - tx, oy - ty, oz - tz)
    vx, vy, vz = quat_rotate(qw, -qx, -qy, -qz, dx, dy, dz)
    return px / sx, py / sy, pz / sz, vx / sx, vy / sy, vz / sz


@njit(cache=True, inline="always")
def normal_to_world(motion, moving, time_u, nx, ny, nz):
    """World unit normal of an object-space normal: R S^-1 n (the inverse transpose of R S)."""
    if moving:
        tx, ty, tz, qw, qx, qy, qz, sx, sy, sz = placement_at(motion, time_u)
    else:
        m = motion[0]
        qw, qx, qy, qz, sx, sy, sz = m[3], m[4], m[5], m[6], m[7], m[8], m[9]
    wx, wy, wz = quat_rotate(qw, qx, qy, qz, nx / sx, ny / sy, nz / sz)
    n = math.sqrt(wx * wx + wy * wy + wz * wz)
    return wx / n, wy / n, wz / n


@njit(cache=True, inline="always")
def vector_to_world(motion, moving, time_u, vx, vy, vz):
    """World direction of an object-space surface direction (a tangent): R (s * v)."""
    if moving:
        tx, ty, tz, qw, qx, qy, qz, sx, sy, sz = placement_at(motion, time_u)
    else:
        m = motion[0]
        qw, qx, qy, qz, sx, sy, sz = m[3], m[4], m[5], m[6], m[7], m[8], m[9]
    return quat_rotate(qw, qx, qy, qz, vx * sx, vy * sy, vz * sz)


@njit(cache=True, inline="always")
def point_to_world(motion, moving, time_u, px, py, pz):
    if moving:
        tx, ty, tz, qw, qx, qy, qz, sx, sy, sz = placement_at(motion, time_u)
    else:
        m = motion[0]
        tx, ty, tz, qw, qx, qy, qz, sx, sy, sz = m[0], m[1], m[2], m[3], m[4], m[5], m[6], m[7], m[8], m[9]
    wx, wy, wz = quat_rotate(qw, qx, qy, qz, px * sx, py * sy, pz * sz)
    return wx + tx, wy + ty, wz + tz


@borrowing()
def intersect_instance(S, i, ox, oy, oz, dx, dy, dz, tmax, time_u, stack):
    """Closest hit of a world ray with instance i: (t, k, u, v); k = -1 on a miss.

    For meshes k is the absolute triangle index into S.tris; for spheres k = 0.
    """
    lox, loy, loz, ldx, ldy, ldz = ray_to_object(
        S.inst_motion[i], S.inst_moving[i], time_u, ox, oy, oz, dx, dy, dz
    )
    if S.inst_kind[i] == KIND_SPHERE:
        c = S.inst_sphere[i]
        hit, t = ray_sphere(lox, loy, loz, ldx, ldy, ldz, 0.0, tmax, c[0], c[1], c[2], c[3])
        if hit:
            return t, 0, 0.0, 0.0
        return tmax, -1, 0.0, 0.0
    m = S.inst_mesh[i]
    if S.mesh_end[m] < 0:
        return intersect_wide(
            S.blas_box, S.blas_meta, S.blas_span, S.tris,
            S.mesh_node_base[m], S.mesh_tri_base[m], lox, loy, loz, ldx, ldy, ldz, 0.0, tmax, stack,
        )
    return intersect_wide_at(
        S.blas_box, S.blas_meta, S.blas_span, S.tris, S.tris_end,
        S.mesh_node_base[m], S.mesh_tri_base[m], S.mesh_end[m], time_u,
        lox, loy, loz, ldx, ldy, ldz, 0.0, tmax, stack,
    )


@njit(cache=True, inline="always")
def _skips(S, i, visit):
    """True when a query of kind `visit` (VISIT_*) passes over instance i."""
    if visit == VISIT_ALL:
        return False
    return (S.inst_passable[i] == 1) == (visit == VISIT_SOLID)


@borrowing()
def intersect_scene(S, ox, oy, oz, dx, dy, dz, tmax, time_u, stack_top, stack, visit=VISIT_ALL):
    """Closest hit in the scene: (t, instance, k, u, v); instance = -1 on a miss.

    stack_top, stack: (>= 64,) int32 scratch, allocated once per thread by the caller;
    visit: which instances to test (VISIT_*).
    """
    best_t = tmax
    best_i = -1
    best_k = -1
    best_u = 0.0
    best_v = 0.0
    if S.tl_count.shape[0] == 0:  # an empty scene: no top-level node to enter
        return best_t, best_i, best_k, best_u, best_v
    idx = 1.0 / dx if dx != 0.0 else math.copysign(math.inf, dx)
    idy = 1.0 / dy if dy != 0.0 else math.copysign(math.inf, dy)
    idz = 1.0 / dz if dz != 0.0 else math.copysign(math.inf, dz)
    n_nodes = S.tl_count.shape[0]
    room = stack_top.shape[0] - 2
    stack_top[0] = 0
    sp = 1
    while sp > 0:
        sp -= 1
        node = stack_top[sp]
        hit, tnear = ray_box(ox, oy, oz, idx, idy, idz, 0.0, best_t, S.tl_lo[node], S.tl_hi[node])
        if not hit:
            continue
        count = S.tl_count[node]
        if count > 0:
            first = S.tl_a[node]
            for j in range(first, first + count):
                i = S.tl_order[j]
                if _skips(S, i, visit):
                    continue
                t, k, u, v = intersect_instance(S, i, ox, oy, oz, dx, dy, dz, best_t, time_u, stack)
                if k >= 0 and t < best_t:
                    best_t, best_i, best_k, best_u, best_v = t, i, k, u, v
        elif node + 1 < n_nodes and 0 <= S.tl_a[node] < n_nodes and sp <= room:  # never past the arrays
            left = node + 1
            right = S.tl_a[node]
            axis = S.tl_axis[node]
            neg = (dx < 0.0) if axis == 0 else ((dy < 0.0) if axis == 1 else (dz < 0.0))
            if neg:  # visit the near child first: push it last
                stack_top[sp] = left
                stack_top[sp + 1] = right
            else:
                stack_top[sp] = right
                stack_top[sp + 1] = left
            sp += 2
    return best_t, best_i, best_k, best_u, best_v


@borrowing()
def occluded_scene(S, ox, oy, oz, dx, dy, dz, tmax, time_u, stack_top, stack, visit=VISIT_ALL):
    """True if anything lies on the ray strictly before tmax (shadow rays; early exit);
    visit: which instances to test (VISIT_*)."""
    n_nodes = S.tl_count.shape[0]
    if n_nodes == 0:  # an empty scene
        return False
    idx = 1.0 / dx if dx != 0.0 else math.copysign(math.inf, dx)
    idy = 1.0 / dy if dy != 0.0 else math.copysign(math.inf, dy)
    idz = 1.0 / dz if dz != 0.0 else math.copysign(math.inf, dz)
    room = stack_top.shape[0] - 2
    stack_top[0] = 0
    sp = 1
    while sp > 0:
        sp -= 1
        node = stack_top[sp]
        hit, tnear = ray_box(ox, oy, oz, idx, idy, idz, 0.0, tmax, S.tl_lo[node], S.tl_hi[node])
        if not hit:
            continue
        count = S.tl_count[node]
        if count > 0:
            first = S.tl_a[node]
            for j in range(first, first + count):
                i = S.tl_order[j]
                if _skips(S, i, visit):
                    continue
                lox, loy, loz, ldx, ldy, ldz = ray_to_object(
                    S.inst_motion[i], S.inst_moving[i], time_u, ox, oy, oz, dx, dy, dz
                )
                if S.inst_kind[i] == KIND_SPHERE:
                    c = S.inst_sphere[i]
                    h, t = ray_sphere(lox, loy, loz, ldx, ldy, ldz, 0.0, tmax, c[0], c[1], c[2], c[3])
                    if h:
                        return True
                else:
                    m = S.inst_mesh[i]
                    if S.mesh_end[m] < 0:
                        if occluded_wide(
                            S.blas_box, S.blas_meta, S.blas_span, S.tris,
                            S.mesh_node_base[m], S.mesh_tri_base[m],
                            lox, loy, loz, ldx, ldy, ldz, 0.0, tmax, stack,
                        ):
                            return True
                    elif occluded_wide_at(
                        S.blas_box, S.blas_meta, S.blas_span, S.tris, S.tris_end,
                        S.mesh_node_base[m], S.mesh_tri_base[m], S.mesh_end[m], time_u,
                        lox, loy, loz, ldx, ldy, ldz, 0.0, tmax, stack,
                    ):
                        return True
        elif node + 1 < n_nodes and 0 <= S.tl_a[node] < n_nodes and sp <= room:  # never past the arrays
            stack_top[sp] = node + 1
            stack_top[sp + 1] = S.tl_a[node]
            sp += 2
    return False


@njit(cache=True, inline="always")
def tri_corners(S, m, k, time_u):
    """Object-space corners of triangle k (of mesh m) at shutter fraction time_u: 9 floats,
    a, b, c; blended towards the pose at shutter close for a deforming mesh."""
    a = S.tris[k]
    e = S.mesh_end[m]
    if e < 0:
        return a[0, 0], a[0, 1], a[0, 2], a[1, 0], a[1, 1], a[1, 2], a[2, 0], a[2, 1], a[2, 2]
    b = S.tris_end[k - S.mesh_tri_base[m] + e]
    w = time_u
    return (a[0, 0] + w * (b[0, 0] - a[0, 0]), a[0, 1] + w * (b[0, 1] - a[0, 1]), a[0, 2] + w * (b[0, 2] - a[0, 2]),
            a[1, 0] + w * (b[1, 0] - a[1, 0]), a[1, 1] + w * (b[1, 1] - a[1, 1]), a[1, 2] + w * (b[1, 2] - a[1, 2]),
            a[2, 0] + w * (b[2, 0] - a[2, 0]), a[2, 1] + w * (b[2, 1] - a[2, 1]), a[2, 2] + w * (b[2, 2] - a[2, 2]))
