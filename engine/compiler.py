"""Compile a validated shot into the arrays the kernels read.

Meshes are loaded and their BVHs built once per shot (`compile_geometry`); each frame then only
places instances, builds the small top-level BVH over their motion bounds and gathers lights
(`compile_frame`). Both return plain arrays, so a worker can keep the geometry of a shot in
memory and compile frame after frame cheaply.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .animation import object_transform
from .assets import load_environment_map, load_mesh
from .bsdf import DIFFUSE, GLASS, MATERIAL_SIZE, METAL, PLASTIC, material_row
from .bvh import build_bvh, pack_triangles
from .camera import compile_camera
from .lights import build_env_distribution
from .scene import KIND_MESH, KIND_SPHERE, Scene
from .transforms import apply_placement, pack_placement, placement_at

MATERIAL_TYPES = {"diffuse": DIFFUSE, "metal": METAL, "glass": GLASS, "plastic": PLASTIC}
DEFAULT_GREY = (0.8, 0.8, 0.8)  # rule of thumb: a mid-light grey for meshes without a colour
MOTION_STEPS = 8  # instants per shutter at which motion bounds are taken
LUMA = np.array([0.2126, 0.7152, 0.0722])  # Rec. 709 luminance weights (ITU-R BT.709)


@dataclass(frozen=True)
class Part:
    """One instance to place per frame: an object's sphere or one part of its mesh."""

    obj: int  # index into shot.objects
    kind: int  # KIND_MESH | KIND_SPHERE
    mesh: int  # mesh index, -1 for spheres
    material: int  # row of the material table
    sphere: tuple  # (cx, cy, cz, r) object space, spheres only
    box: np.ndarray  # (2, 3) object-space bounds


@dataclass(frozen=True)
class Geometry:
    """Per-shot, frame-independent arrays: the bottom-level BVHs, materials, environment."""

    blas_lo: np.ndarray
    blas_hi: np.ndarray
    blas_a: np.ndarray
    blas_count: np.ndarray
    blas_axis: np.ndarray
    tris: np.ndarray
    mesh_node_base: np.ndarray
    mesh_tri_base: np.ndarray
    mesh_tri_count: np.ndarray
    parts: tuple
    mats: np.ndarray
    env_color: np.ndarray
    env_map: np.ndarray
    env_row_cdf: np.ndarray
    env_col_cdf: np.ndarray
    env_params: np.ndarray  # [has_map, strength, rotate, p_env placeholder]

    @property
    def triangle_count(self) -> int:
        return int(self.tris.shape[0])


def _material_from_shot(m) -> np.ndarray:
    return material_row(MATERIAL_TYPES[m.type], m.color, m.roughness, m.ior, m.emission)


def compile_geometry(shot) -> Geometry:
    """Load every mesh of the shot, build their BVHs and the material and environment tables."""
    mats = [_material_from_shot(m) for m in shot.materials]
    mat_index = {m.name: i for i, m in enumerate(shot.materials)}
    implicit: dict[tuple, int] = {}

    los, his, As, counts, axes, tris = [], [], [], [], [], []
    node_base, tri_base, tri_count = [], [], []
    n_nodes = 0
    n_tris = 0
    parts = []
    for oi, obj in enumerate(shot.objects):
        if obj.sphere is not None:
            (cx, cy, cz), r = obj.sphere.center, obj.sphere.radius
            box = np.array([[cx - r, cy - r, cz - r], [cx + r, cy + r, cz + r]], float)
            parts.append(Part(oi, KIND_SPHERE, -1, mat_index[obj.material], (cx, cy, cz, r), box))
            continue
        for mp in load_mesh(shot.root, obj.mesh, f"object[{obj.name}].mesh"):
            v = np.asarray(mp.vertices, np.float64)
            f = np.asarray(mp.faces, np.int64)
            tri = v[f]
            # SAH termination (bigger leaves where they are cheaper) pays for meshes: +10 % on
            # incoherent rays in bench/rays.py; the small top level keeps plain leaves
            bvh = build_bvh(tri.min(axis=1), tri.max(axis=1), max_leaf=16, trav_cost=4.0)
            los.append(bvh.lo)
            his.append(bvh.hi)
            As.append(bvh.a)
            counts.append(bvh.count)
            axes.append(bvh.axis)
            tris.append(pack_triangles(v, f, bvh.order))
            node_base.append(n_nodes)
            tri_base.append(n_tris)
            tri_count.append(len(f))
            n_nodes += len(bvh.lo)
            n_tris += len(f)
            if obj.material is not None:
                mi = mat_index[obj.material]
            else:
                color = tuple(DEFAULT_GREY if mp.base_color is None else np.round(mp.base_color, 6))
                if color not in implicit:
                    implicit[color] = len(mats)
                    mats.append(material_row(DIFFUSE, color, 0.0, 1.5, (0.0, 0.0, 0.0)))
                mi = implicit[color]
            box = np.array([v.min(axis=0), v.max(axis=0)])
            parts.append(Part(oi, KIND_MESH, len(node_base) - 1, mi, (0.0, 0.0, 0.0, 0.0), box))

    def cat(arrs, shape, dtype):
        return np.ascontiguousarray(np.concatenate(arrs)) if arrs else np.zeros(shape, dtype)

    env = shot.environment
    if env.map is not None:
        env_map = load_environment_map(shot.root, env.map, "environment.map")
        row_cdf, col_cdf = build_env_distribution(env_map)
        params = np.array([1.0, env.strength, np.radians(env.rotate), 0.0])
    else:
        env_map = np.zeros((1, 1, 3))
        row_cdf, col_cdf = np.array([0.0, 1.0]), np.array([[0.0, 1.0]])
        params = np.array([0.0, 1.0, 0.0, 0.0])

    return Geometry(
        blas_lo=cat(los, (1, 3), np.float32),
        blas_hi=cat(his, (1, 3), np.float32),
        blas_a=cat(As, (1,), np.int32),
        blas_count=cat(counts, (1,), np.int32),
        blas_axis=cat(axes, (1,), np.int8),
        tris=cat(tris, (1, 3, 3), np.float32),
        mesh_node_base=np.array(node_base, np.int64),
        mesh_tri_base=np.array(tri_base, np.int64),
        mesh_tri_count=np.array(tri_count, np.int64),
        parts=tuple(parts),
        mats=np.ascontiguousarray(np.array(mats, np.float64).reshape(-1, MATERIAL_SIZE)),
        env_color=np.asarray(env.color, np.float64),
        env_map=np.ascontiguousarray(env_map, np.float64),
        env_row_cdf=row_cdf,
        env_col_cdf=np.ascontiguousarray(col_cdf),
        env_params=params,
    )


def _box_corners(box: np.ndarray) -> np.ndarray:
    lo, hi = box
    return np.array([[x, y, z] for x in (lo[0], hi[0]) for y in (lo[1], hi[1]) for z in (lo[2], hi[2])])


def shutter_interval(shot, frame: int) -> tuple[float, float]:
    """Times (in frames) at which the shutter opens and closes: centred on the frame."""
    half = 0.5 * shot.camera.shutter
    return frame - half, frame + half


def compile_frame(shot, geom: Geometry, frame: int):
    """(Scene, camera rows) for one frame."""
    t_open, t_close = shutter_interval(shot, frame)
    k = len(geom.parts)
    motion = np.zeros((max(k, 1), 2, 10))
    moving = np.zeros(max(k, 1), np.int64)
    world_lo = np.zeros((max(k, 1), 3))
    world_hi = np.zeros((max(k, 1), 3))
    placements: dict[int, np.ndarray] = {}
    for i, part in enumerate(geom.parts):
        obj = shot.objects[part.obj]
        if part.obj not in placements:
            placements[part.obj] = np.array(
                [pack_placement(*object_transform(obj, t)) for t in (t_open, t_close)]
            )
        motion[i] = placements[part.obj]
        moving[i] = int(not np.array_equal(motion[i, 0], motion[i, 1]))
        corners = _box_corners(part.box)
        steps = np.linspace(0.0, 1.0, MOTION_STEPS + 1) if moving[i] else [0.0]
        pts = np.concatenate([apply_placement(_lerp_row(motion[i], s), corners) for s in steps])
        pad = 1e-4 * (1.0 + np.abs(pts).max())  # room for float32 rounding and arc bulge
        world_lo[i] = pts.min(axis=0) - pad
        world_hi[i] = pts.max(axis=0) + pad

    if k:
        tl = build_bvh(world_lo[:k], world_hi[:k], leaf_size=2)
        tl_arrays = (tl.lo, tl.hi, tl.a, tl.count, tl.axis, tl.order)
    else:  # an empty scene: one leaf box that nothing can hit
        tl_arrays = (
            np.full((1, 3), np.inf, np.float32), np.full((1, 3), -np.inf, np.float32),
            np.zeros(1, np.int32), np.zeros(1, np.int32), np.zeros(1, np.int8), np.zeros(1, np.int32),
        )

    light_inst, light_prim, power = [], [], []
    inst_light_base = np.full(max(k, 1), -1, np.int64)
    for i, part in enumerate(geom.parts):
        emission = geom.mats[part.material, 6:9]
        lum = float(LUMA @ emission)
        if lum <= 0.0:
            continue
        inst_light_base[i] = len(light_inst)
        mid = _lerp_row(motion[i], 0.5)
        if part.kind == KIND_SPHERE:
            r = part.sphere[3] * mid[7]
            light_inst.append(i)
            light_prim.append(-1)
            power.append(lum * np.pi * 4.0 * np.pi * r * r)
        else:
            first = int(geom.mesh_tri_base[part.mesh])
            count = int(geom.mesh_tri_count[part.mesh])
            tri = geom.tris[first:first + count].astype(np.float64)
            w = apply_placement(mid, tri.reshape(-1, 3)).reshape(-1, 3, 3)
            area = 0.5 * np.linalg.norm(np.cross(w[:, 1] - w[:, 0], w[:, 2] - w[:, 0]), axis=1)
            light_inst.extend([i] * count)
            light_prim.extend(range(first, first + count))
            power.extend(lum * np.pi * area)
    power = np.asarray(power, np.float64)
    if power.size and power.sum() > 0:
        pmf = power / power.sum()
    else:
        pmf = np.full(power.size, 1.0 / max(power.size, 1))
    cdf = np.concatenate([[0.0], np.cumsum(pmf)])
    cdf[-1] = 1.0

    env_params = geom.env_params.copy()
    env_on = env_params[0] > 0 or float(np.max(geom.env_color)) > 0
    # Light choice: half the samples to the environment when both exist (rule of thumb).
    env_params[3] = 0.0 if not env_on else (1.0 if not light_inst else 0.5)

    scene = Scene(
        geom.blas_lo, geom.blas_hi, geom.blas_a, geom.blas_count, geom.blas_axis, geom.tris,
        geom.mesh_node_base, geom.mesh_tri_base, geom.mesh_tri_count,
        *tl_arrays,
        inst_kind=np.array([p.kind for p in geom.parts] or [0], np.int64),
        inst_mesh=np.array([p.mesh for p in geom.parts] or [-1], np.int64),
        inst_mat=np.array([p.material for p in geom.parts] or [0], np.int64),
        inst_sphere=np.array([p.sphere for p in geom.parts] or [(0.0, 0.0, 0.0, 0.0)], np.float64),
        inst_moving=moving,
        inst_motion=motion,
        inst_light_base=inst_light_base,
        mats=geom.mats if len(geom.mats) else np.zeros((1, MATERIAL_SIZE)),
        light_inst=np.array(light_inst, np.int64),
        light_prim=np.array(light_prim, np.int64),
        light_pmf=pmf,
        light_cdf=cdf,
        env_color=geom.env_color,
        env_map=geom.env_map,
        env_row_cdf=geom.env_row_cdf,
        env_col_cdf=geom.env_col_cdf,
        env_params=env_params,
    )
    cam = compile_camera(shot.camera, frame, t_open, t_close)
    return scene, cam


def _lerp_row(motion: np.ndarray, s: float) -> np.ndarray:
    """Placement row (10,) at shutter fraction s of a (2, 10) open/close pair."""
    return np.array(placement_at(motion, s))
