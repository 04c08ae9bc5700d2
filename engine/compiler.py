"""Compile a validated shot into the arrays the kernels read.

Files are read and meshes' BVHs built once per shot (`compile_geometry`); each frame then only
places instances (shot objects by their keys, scene nodes by their animated world matrices),
rebuilds the meshes that deform (skins, morph targets), builds the small top-level BVH over the
instances' motion bounds and gathers lights (`compile_frame`). Both return plain arrays, so a
worker keeps a shot's geometry in memory and compiles frame after frame cheaply.

Time: a frame's shutter opens and closes at frame ∓ shutter/2 (in frames); the scene file's
animation is read at `shot.scene_time(t)` seconds, so the shot's first frame (or `time_zero`)
shows glTF time 0.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .animation import object_transform
from .assets import asset_files, check_inside, load_environment_map
from .camera import camera_rows, compile_camera
from .gltf_animation import decompose_trs, world_matrices
from .lights import build_env_distribution
from .material_table import M_EMISSION, MATERIAL_SIZE, is_passable
from .mesh_table import MeshTable, MeshTableBuilder
from .layers import ENV_GROUP
from .prefetch import SPAN_MIN_BYTES
from .punctual import L_GROUP, PUNCT_SIZE, light_power, light_row
from .scene import FLAG_COUNT, FLAG_PASSABLE, KIND_MESH, KIND_SPHERE, Scene
from .scene_data import LIGHT_DIRECTIONAL, LIGHT_POINT, LIGHT_SPOT
from .scene_import import (
    MAX_COORD, Part, _mesh_arrays, assemble, check_has_area, read_scene_file, sheared_moving_nodes, shown_nodes,
)
from .skinning import SPACE_WORLD, deformed_vertices
from .bvh import build_bvh
from .textures import srgb_table
from .transforms import apply_placement, pack_placement, placement_at
from .wide_bvh import concat_nodes

MOTION_STEPS = 8  # instants per shutter at which motion bounds are taken
LUMA = np.array([0.2126, 0.7152, 0.0722])  # Rec. 709 luminance weights (ITU-R BT.709)
SHOT_LIGHT_TYPES = {"point": LIGHT_POINT, "spot": LIGHT_SPOT, "directional": LIGHT_DIRECTIONAL}
IDENTITY_ROW = pack_placement((0.0, 0.0, 0.0), (1.0, 0.0, 0.0, 0.0), (1.0, 1.0, 1.0))


@dataclass(frozen=True, eq=False)
class Geometry:
    """Per-shot, frame-independent data: the mesh table, instances, materials, textures,
    environment, and the scene file (for its animation, cameras and lights)."""

    meshes: MeshTable
    parts: tuple
    mats: np.ndarray  # (m, MATERIAL_SIZE) float64
    texrefs: np.ndarray
    tex_pixels: np.ndarray
    tex_info: np.ndarray
    srgb_lut: np.ndarray
    env_color: np.ndarray
    env_map: np.ndarray
    env_row_cdf: np.ndarray
    env_col_cdf: np.ndarray
    env_params: np.ndarray  # [has_map, strength, rotate, p_env placeholder]
    scene: object  # SceneData or None
    deforming: tuple  # (node, material rows) of the scene's skinned / morphing meshes
    mat_names: tuple = ()  # the name of each row of mats (ID mattes, mattes.py)

    @property
    def triangle_count(self) -> int:
        return self.meshes.triangle_count

    @property
    def tris(self) -> np.ndarray:
        return self.meshes.tris


def read_shot_files(shot):
    """(scene SceneData or None, {object index: SceneData}) of every file the shot renders."""
    scene = None if shot.scene is None else read_scene_file(shot.root, shot.scene, "scene")
    files = {}
    for oi, o in enumerate(shot.objects):
        if o.mesh is not None:
            files[oi] = read_scene_file(shot.root, o.mesh, f"object[{o.name}].mesh")
            check_has_area(files[oi], o.mesh, f"object[{o.name}].mesh")
    if shot.camera.scene_camera is not None:
        scene_camera_node(shot, scene)  # an unknown name is an error now, not at the first frame
    return scene, files


def check_shot_files(shot) -> list[str]:
    """Read every file the shot renders, as a worker will, so that a bad file is refused before
    anything is submitted (AssetError / ShotError naming the shot file, the key and the asset);
    returns warning lines for the person.

    In order: the files the shot would send (`Shot.files()`: references that leave the shot's
    folder, links to outside it), every mesh and scene file (the readers the worker runs, with
    their textures and buffers) and the environment map."""
    from lampyr.errors import ShotError

    try:
        _check_files_inside(shot)
        scene, files = read_shot_files(shot)
        if shot.environment.map is not None:
            build_env_distribution(load_environment_map(shot.root, shot.environment.map, "environment.map"))
    except ShotError as err:
        if shot.path is not None and not err.file:
            err.file = str(shot.path)
        raise
    except RecursionError:  # a reader handed a file nested deeper than Python recurses
        raise ShotError("", "a file the shot uses is nested too deeply to read", str(shot.path or "")) from None
    warnings = []
    for sd in ([scene] if scene is not None else []) + list(files.values()):
        if sd.extensions_ignored:
            warnings.append(f"{sd.path}: lampyr does not read the optional extension(s) "
                            f"{', '.join(sd.extensions_ignored)}; the scene renders without them")
    for sd in ([scene] if scene is not None else []) + list(files.values()):
        big = max((float(np.abs(m.positions).max()) for m in sd.meshes if len(m.positions)), default=0.0)
        if big > MAX_COORD:
            warnings.append(f"{sd.path}: vertex coordinates reach {big:.3g}; lampyr clamps them to "
                            f"±{MAX_COORD:g} scene units")
    for node in ([] if scene is None else sheared_moving_nodes(scene)):
        warnings.append(f"{scene.path}: nodes[{node}] ({scene.nodes[node].name}) is sheared and animated; "
                        f"lampyr renders it with the nearest rotation and scale")
    return warnings


def _check_files_inside(shot) -> None:
    """Every file the shot would send (`Shot.files()`, by the key that names it) lies inside the
    shot's folder: no reference leaves it, and no link in it leads out of it."""
    if shot.root is None:
        return
    named = ([("scene", shot.scene)] if shot.scene is not None else []) \
        + [(f"object[{o.name}].mesh", o.mesh) for o in shot.objects if o.mesh is not None] \
        + ([("environment.map", shot.environment.map)] if shot.environment.map is not None else [])
    for key, rel in named:
        for f in asset_files(shot.root, rel, key):
            check_inside(shot.root, shot.root / f, f, key)


def scene_camera_node(shot, scene) -> int:
    """The node of the scene that carries the camera `[camera] scene_camera` names."""
    name = shot.camera.scene_camera
    nodes = [i for i in shown_nodes(scene) if scene.nodes[i].camera >= 0]
    for i in nodes:
        if scene.nodes[i].name == name or scene.cameras[scene.nodes[i].camera].name == name:
            return i
    from lampyr.errors import ShotError

    names = sorted({scene.nodes[i].name for i in nodes if scene.nodes[i].name})
    have = f"its camera nodes are {', '.join(repr(n) for n in names)}" if names else "it has no camera nodes"
    raise ShotError("camera.scene_camera", f"expected the name of a camera node of {shot.scene} ({have}), "
                                           f"got {name!r}")


def compile_geometry(shot, texture_file=None) -> Geometry:
    """Read every file of the shot, build the meshes' BVHs and the material, texture and
    environment tables. texture_file: where to keep the packed texels for other processes of
    this machine to map (see scene_import.assemble), or None to keep them in this process."""
    scene, files = read_shot_files(shot)
    asm = assemble(shot, scene, files, texture_file)
    env = shot.environment
    if env.map is not None:
        env_map = load_environment_map(shot.root, env.map, "environment.map")
        row_cdf, col_cdf = build_env_distribution(env_map)
        params = np.array([1.0, env.strength, np.radians(env.rotate), 0.0, 0.0])
    else:
        env_map = np.zeros((1, 1, 3))
        row_cdf, col_cdf = np.array([0.0, 1.0]), np.array([[0.0, 1.0]])
        params = np.array([0.0, 1.0, 0.0, 0.0, 0.0])
    params[ENV_GROUP] = shot.group_index(env.group)
    mats = asm.mats if len(asm.mats) else np.zeros((1, MATERIAL_SIZE))
    return Geometry(
        meshes=asm.meshes.build(), parts=tuple(asm.parts), mats=mats.reshape(-1, MATERIAL_SIZE),
        texrefs=asm.texrefs, tex_pixels=asm.tex_pixels, tex_info=asm.tex_info, srgb_lut=srgb_table(),
        env_color=np.asarray(env.color, np.float64), env_map=np.ascontiguousarray(env_map, np.float64),
        env_row_cdf=row_cdf, env_col_cdf=np.ascontiguousarray(col_cdf), env_params=params,
        scene=asm.scene, deforming=tuple(asm.deforming), mat_names=tuple(asm.mat_names),
    )


def _box_corners(box: np.ndarray) -> np.ndarray:
    lo, hi = box
    return np.array([[x, y, z] for x in (lo[0], hi[0]) for y in (lo[1], hi[1]) for z in (lo[2], hi[2])])


def shutter_interval(shot, frame: int) -> tuple[float, float]:
    """Times (in frames) at which the shutter opens and closes: centred on the frame."""
    half = 0.5 * shot.camera.shutter
    return frame - half, frame + half


class _Worlds:
    """The scene's node world matrices at shutter open and close (computed once per frame)."""

    def __init__(self, shot, scene, t_open: float, t_close: float):
        self.scene = scene
        if scene is None:
            self.open = self.close = None
            return
        self.open = world_matrices(scene, shot.scene_time(t_open))
        self.close = self.open if not scene.channels else world_matrices(scene, shot.scene_time(t_close))

    def placement(self, node: int) -> np.ndarray:
        """(2, 10) motion rows of a node at open and close. A zero scale (a node scaled to
        nothing, as animators hide things) becomes a tiny one: the kernels divide by it."""
        rows = []
        for m in (self.open[node], self.close[node]):
            t, q, s, _ = decompose_trs(m)
            tiny = 1e-9 * max(float(np.abs(s).max()), 1e-3)
            s = np.where(np.abs(s) < tiny, np.copysign(tiny, s), s)
            rows.append(pack_placement(t, q, s))
        return np.array(rows)


def _deforming_meshes(shot, geom: Geometry, worlds: _Worlds, t_open: float, t_close: float,
                      builder: MeshTableBuilder, first_mesh: int) -> list[Part]:
    """Build the skinned and morphing meshes in their poses at shutter open and close (a ray
    blends the two: deformation blur); their parts. Normals and tangents are the open pose's."""
    parts = []
    scene = geom.scene
    for node, mat_rows in geom.deforming:
        mesh = scene.meshes[scene.nodes[node].mesh]
        positions, normals, space = deformed_vertices(scene, node, shot.scene_time(t_open), worlds.open)
        end, _, _ = deformed_vertices(scene, node, shot.scene_time(t_close), worlds.close)
        # tangents follow the deformed surface: computed from it when a normal map needs them
        arrays = _mesh_arrays(mesh, mat_rows, list(geom.mats), geom.texrefs, positions, normals, None)
        m = first_mesh + builder.add(*arrays, positions_end=end)
        both = np.concatenate([positions, end])
        box = np.array([both.min(axis=0), both.max(axis=0)])
        parts.append(Part(KIND_MESH, m, -1, box, node=-1 if space == SPACE_WORLD else node))
    return parts


def _concat(a: MeshTable, b: MeshTable) -> MeshTable:
    """Mesh table b appended to a (b's indices shifted)."""
    n_nodes = len(a.blas_box)
    n_tris = len(a.tris)
    n_verts = len(a.vtx_n)
    nodes = concat_nodes([a.blas_box, b.blas_box])
    return MeshTable(
        blas_box=nodes.box, blas_meta=nodes.meta, blas_span=nodes.span, tris=np.concatenate([a.tris, b.tris]),
        tri_mat=np.concatenate([a.tri_mat, b.tri_mat]),
        tri_vtx=np.concatenate([a.tri_vtx, b.tri_vtx + n_verts]).astype(np.int32),
        vtx_n=np.concatenate([a.vtx_n, b.vtx_n]), vtx_uv=np.concatenate([a.vtx_uv, b.vtx_uv]),
        vtx_t=np.concatenate([a.vtx_t, b.vtx_t]),
        mesh_node_base=np.concatenate([a.mesh_node_base, b.mesh_node_base + n_nodes]),
        mesh_tri_base=np.concatenate([a.mesh_tri_base, b.mesh_tri_base + n_tris]),
        mesh_tri_count=np.concatenate([a.mesh_tri_count, b.mesh_tri_count]),
        mesh_attr=np.concatenate([a.mesh_attr, b.mesh_attr]),
        mesh_box=np.concatenate([a.mesh_box, b.mesh_box]),
        tris_end=np.concatenate([a.tris_end, b.tris_end]),
        mesh_end=np.concatenate([a.mesh_end, np.where(b.mesh_end >= 0, b.mesh_end + len(a.tris_end), -1)]),
    )


def _punctual_rows(shot, geom: Geometry, worlds: _Worlds) -> list[np.ndarray]:
    """Light rows of the shot's `[[light]]` entries and the scene file's lights at this frame."""
    rows = []
    for li in shot.lights:
        rows.append(light_row(SHOT_LIGHT_TYPES[li.type], li.color * li.intensity, li.position, li.position,
                              li.direction, li.direction, li.inner_cone, li.outer_cone))
        rows[-1][L_GROUP] = shot.group_index(li.group)
    scene = geom.scene
    if scene is not None:
        for node in shown_nodes(scene):
            spec = scene.nodes[node]
            if spec.light < 0:
                continue
            light = scene.lights[spec.light]
            at = [(m[:3, 3], -m[:3, 2]) for m in (worlds.open[node], worlds.close[node])]  # down local -Z
            if not all(np.linalg.norm(d) > 0 for _, d in at):
                continue  # a light scaled to nothing
            rows.append(light_row(light.type, np.asarray(light.color) * light.intensity * shot.scene_light_scale,
                                  at[0][0], at[1][0], at[0][1], at[1][1], light.inner_cone, light.outer_cone))
            # [output] groups names the file's light, or the node that carries it
            group = shot.scene_groups.get(light.name, shot.scene_groups.get(spec.name))
            rows[-1][L_GROUP] = shot.group_index(group)
    return rows


def compile_frame(shot, geom: Geometry, frame: int, span_min_bytes: int = SPAN_MIN_BYTES):
    """(Scene, camera rows) for one frame; span_min_bytes: the triangle rows (bytes) from which
    the traversals prefetch leaf spans (prefetch.py)."""
    t_open, t_close = shutter_interval(shot, frame)
    worlds = _Worlds(shot, geom.scene, t_open, t_close)
    meshes = geom.meshes
    parts = list(geom.parts)
    if geom.deforming:
        builder = MeshTableBuilder()
        parts += _deforming_meshes(shot, geom, worlds, t_open, t_close, builder, meshes.mesh_count)
        meshes = _concat(meshes, builder.build())

    k = len(parts)
    motion = np.zeros((max(k, 1), 2, 10))
    motion[:] = IDENTITY_ROW
    moving = np.zeros(max(k, 1), np.int64)
    world_lo = np.zeros((max(k, 1), 3))
    world_hi = np.zeros((max(k, 1), 3))
    placements: dict[tuple, np.ndarray] = {}
    for i, part in enumerate(parts):
        if part.obj >= 0:
            key = ("obj", part.obj)
            if key not in placements:
                obj = shot.objects[part.obj]
                placements[key] = np.array([pack_placement(*object_transform(obj, t)) for t in (t_open, t_close)])
        elif part.node >= 0:
            key = ("node", part.node)
            if key not in placements:
                placements[key] = worlds.placement(part.node)
        else:
            key = ("fixed",)
            placements[key] = np.array([IDENTITY_ROW, IDENTITY_ROW])
        motion[i] = placements[key]
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
    else:  # an empty scene: a top level of no nodes, which the traversals answer with a miss
        tl_arrays = (
            np.zeros((0, 3), np.float32), np.zeros((0, 3), np.float32),
            np.zeros(0, np.int32), np.zeros(0, np.int32), np.zeros(0, np.int8), np.zeros(0, np.int32),
        )

    light_inst, light_prim, power = [], [], []
    inst_light_base = np.full(max(k, 1), -1, np.int64)
    emits = (geom.mats[:, M_EMISSION:M_EMISSION + 3] @ LUMA) > 0.0
    for i, part in enumerate(parts):
        mid = _lerp_row(motion[i], 0.5)
        if part.kind == KIND_SPHERE:
            lum = float(LUMA @ geom.mats[part.material, M_EMISSION:M_EMISSION + 3])
            if lum <= 0.0:
                continue
            inst_light_base[i] = len(light_inst)
            r = part.sphere[3] * mid[7]
            light_inst.append(i)
            light_prim.append(-1)
            power.append(lum * np.pi * 4.0 * np.pi * r * r)
            continue
        first = int(meshes.mesh_tri_base[part.mesh])
        count = int(meshes.mesh_tri_count[part.mesh])
        rows = np.full(count, part.material) if part.material >= 0 else meshes.tri_mat[first:first + count]
        if not emits[rows].any():
            continue
        inst_light_base[i] = len(light_inst)
        tri = meshes.tris[first:first + count].astype(np.float64)
        w = apply_placement(mid, tri.reshape(-1, 3)).reshape(-1, 3, 3)
        area = 0.5 * np.linalg.norm(np.cross(w[:, 1] - w[:, 0], w[:, 2] - w[:, 0]), axis=1)
        lum = geom.mats[rows, M_EMISSION:M_EMISSION + 3] @ LUMA
        light_inst.extend([i] * count)
        light_prim.extend(range(first, first + count))
        power.extend(lum * np.pi * area)
    punct = _punctual_rows(shot, geom, worlds)
    if punct:
        radius = 0.5 * float(np.linalg.norm(world_hi[:k].max(axis=0) - world_lo[:k].min(axis=0))) if k else 1.0
        for p, row in enumerate(punct):
            light_inst.append(-1)
            light_prim.append(p)
            power.append(light_power(row, max(radius, 1e-6)))
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
    flags = np.zeros(FLAG_COUNT, np.int64)
    inst_passable = _passable_parts(parts, meshes, geom.mats, max(k, 1))
    flags[FLAG_PASSABLE] = int(inst_passable[:k].any())  # some instance lets shadow rays pass

    scene = Scene(
        meshes.blas_box, meshes.blas_meta, _span_hints(meshes, span_min_bytes), meshes.tris,
        meshes.mesh_node_base, meshes.mesh_tri_base, meshes.mesh_tri_count,
        meshes.tri_mat, meshes.tri_vtx, meshes.vtx_n, meshes.vtx_uv, meshes.vtx_t, meshes.mesh_attr,
        meshes.tris_end, meshes.mesh_end,
        *tl_arrays,
        inst_kind=np.array([p.kind for p in parts] or [0], np.int64),
        inst_mesh=np.array([p.mesh for p in parts] or [-1], np.int64),
        inst_mat=np.array([p.material for p in parts] or [0], np.int64),
        inst_sphere=np.array([p.sphere for p in parts] or [(0.0, 0.0, 0.0, 0.0)], np.float64),
        inst_moving=moving,
        inst_motion=motion,
        inst_light_base=inst_light_base,
        inst_passable=inst_passable,
        mats=geom.mats,
        texrefs=geom.texrefs,
        tex_pixels=geom.tex_pixels,
        tex_info=geom.tex_info,
        srgb_lut=geom.srgb_lut,
        punct=np.array(punct, np.float64).reshape(-1, PUNCT_SIZE) if punct else np.zeros((1, PUNCT_SIZE)),
        light_inst=np.array(light_inst, np.int64),
        light_prim=np.array(light_prim, np.int64),
        light_pmf=pmf,
        light_cdf=cdf,
        env_color=geom.env_color,
        env_map=geom.env_map,
        env_row_cdf=geom.env_row_cdf,
        env_col_cdf=geom.env_col_cdf,
        env_params=env_params,
        flags=flags,
    )
    if shot.camera.scene_camera is not None:
        node = scene_camera_node(shot, geom.scene)
        yfov = geom.scene.cameras[geom.scene.nodes[node].camera].yfov
        views = []
        for m in (worlds.open[node], worlds.close[node]):
            position = m[:3, 3]
            views.append((position, position - m[:3, 2], m[:3, 1], math.degrees(yfov), shot.camera.focus))
        cam = camera_rows(views)
    else:
        cam = compile_camera(shot.camera, frame, t_open, t_close)
    return scene, cam


def _span_hints(meshes: MeshTable, min_bytes: int) -> np.ndarray:
    """The leaf spans the traversals prefetch from: the meshes' own when their triangle rows
    (shutter open and close) take at least min_bytes, else all zero (no prefetch)."""
    if meshes.tris.nbytes + meshes.tris_end.nbytes >= min_bytes:
        return meshes.blas_span
    return np.zeros_like(meshes.blas_span)


def _passable_parts(parts, meshes: MeshTable, mats: np.ndarray, size: int) -> np.ndarray:
    """(size,) int64: 1 for each instance with a material that lets rays pass (material_table)."""
    passable = np.array([is_passable(row) for row in mats], bool)
    out = np.zeros(size, np.int64)
    for i, part in enumerate(parts):
        if part.material >= 0:
            out[i] = passable[part.material]
        else:
            first = int(meshes.mesh_tri_base[part.mesh])
            rows = meshes.tri_mat[first:first + int(meshes.mesh_tri_count[part.mesh])]
            out[i] = int(passable[np.unique(rows)].any())
    return out


def _lerp_row(motion: np.ndarray, s: float) -> np.ndarray:
    """Placement row (10,) at shutter fraction s of a (2, 10) open/close pair."""
    return np.array(placement_at(motion, s))
