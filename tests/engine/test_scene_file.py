"""A shot's `scene = "file.glb"`: node placement and instancing, materials, cameras, lights and
time, checked against the glTF 2.0 specification and independent arithmetic (scipy Rotation).

Every file is written with examples/gltf_builder.py and passes the Khronos glTF-Validator with
0 errors before lampyr reads it (tests/engine/gltf_files.py).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from examples.gltf_builder import GltfBuilder, tex
from lampyr.engine.compiler import compile_frame, compile_geometry
from lampyr.engine.material_table import M_COLOR, M_TYPE, PBR
from lampyr.engine.punctual import L_DIR_OPEN, L_POS_OPEN, L_RGB
from lampyr.engine.render import render_frame
from lampyr.errors import ShotError
from tests.engine.gltf_files import QUAD_FACES, QUAD_NORMALS, QUAD_POSITIONS, QUAD_UVS, save_valid
from tests.engine.scenes import load, shot_text


def scene_shot(tmp_path, builder: GltfBuilder, body: str = "", camera=None, frames="1", extra_top=""):
    save_valid(builder, tmp_path / "scene.glb")
    camera = camera or "position = [0, 0, 5]\ntarget = [0, 0, 0]"
    text = shot_text(body, camera=camera, frames=frames)
    text = f'scene = "scene.glb"\n{extra_top}\n' + text
    return load(tmp_path, text)


def quad_builder(material: dict | None = None) -> tuple[GltfBuilder, int]:
    b = GltfBuilder()
    mat = b.add_material("paint", **(material or {"base_color": [0.2, 0.4, 0.6, 1.0]}))
    mesh = b.add_mesh([b.primitive(QUAD_POSITIONS, QUAD_NORMALS, QUAD_UVS, indices=QUAD_FACES, material=mat)],
                      name="quad")
    return b, mesh


def test_a_mesh_used_by_two_nodes_is_stored_once_and_placed_twice(tmp_path):
    b, mesh = quad_builder()
    b.add_node("left", mesh=mesh, translation=[-2, 0, 0])
    b.add_node("right", mesh=mesh, translation=[2, 0, 0], rotation=Rotation.from_euler("y", 30, degrees=True).as_quat())
    shot = scene_shot(tmp_path, b)
    geom = compile_geometry(shot)
    assert geom.meshes.mesh_count == 1 and geom.triangle_count == 2
    scene, _ = compile_frame(shot, geom, 1)
    assert len(scene.inst_mesh) == 2 and set(scene.inst_mesh) == {0}
    # placement rows: translation and w-x-y-z quaternion of each node (glTF stores x, y, z, w)
    q = Rotation.from_euler("y", 30, degrees=True).as_quat()  # scipy: x, y, z, w
    rows = {tuple(np.round(m[0, 0:3], 9)): m[0] for m in scene.inst_motion}
    np.testing.assert_allclose(rows[(2.0, 0.0, 0.0)][3:7], [q[3], q[0], q[1], q[2]], atol=1e-12)


def test_a_child_node_is_placed_by_its_parents_world_matrix(tmp_path):
    b, mesh = quad_builder()
    rp = Rotation.from_euler("z", 90, degrees=True)
    rc = Rotation.from_euler("x", 45, degrees=True)
    child = b.add_node("child", mesh=mesh, translation=[1, 0, 0], rotation=rc.as_quat(), scale=[2, 2, 2])
    b.add_node("parent", translation=[0, 3, 0], rotation=rp.as_quat(), children=[child])
    shot = scene_shot(tmp_path, b)
    scene, _ = compile_frame(shot, compile_geometry(shot), 1)
    m = scene.inst_motion[0, 0]
    # world = T_p R_p · T_c R_c S_c, composed with scipy (not lampyr)
    np.testing.assert_allclose(m[0:3], np.array([0, 3, 0]) + rp.apply([1, 0, 0]), atol=1e-12)
    w = (rp * rc).as_quat()
    assert np.allclose(m[3:7], [w[3], w[0], w[1], w[2]], atol=1e-12) or \
        np.allclose(m[3:7], [-w[3], -w[0], -w[1], -w[2]], atol=1e-12)
    np.testing.assert_allclose(m[7:10], 2.0)


def test_triangles_carry_their_primitives_materials(tmp_path):
    b = GltfBuilder()
    red = b.add_material("red", base_color=[1, 0, 0, 1])
    blue = b.add_material("blue", base_color=[0, 0, 1, 1])
    prims = [b.primitive(QUAD_POSITIONS, QUAD_NORMALS, QUAD_UVS, indices=QUAD_FACES, material=red),
             b.primitive(QUAD_POSITIONS + [0, 0, -1], QUAD_NORMALS, QUAD_UVS, indices=QUAD_FACES[:1], material=blue)]
    b.add_node("two", mesh=b.add_mesh(prims))
    geom = compile_geometry(scene_shot(tmp_path, b))
    colours = sorted(tuple(geom.mats[r, M_COLOR:M_COLOR + 3]) for r in geom.meshes.tri_mat)
    assert colours == [(0, 0, 1), (1, 0, 0), (1, 0, 0)]
    assert all(geom.mats[r, M_TYPE] == PBR for r in geom.meshes.tri_mat)


def test_a_shot_material_of_the_same_name_replaces_the_files(tmp_path):
    b, mesh = quad_builder()
    b.add_node("quad", mesh=mesh)
    shot = scene_shot(tmp_path, b, body='[[material]]\nname = "paint"\ntype = "diffuse"\ncolor = [0.9, 0.1, 0.1]')
    geom = compile_geometry(shot)
    row = geom.mats[geom.meshes.tri_mat[0]]
    assert row[M_TYPE] == 0 and tuple(row[M_COLOR:M_COLOR + 3]) == (0.9, 0.1, 0.1)


def test_the_first_frame_shows_time_zero_and_time_zero_moves_it(tmp_path):
    b, mesh = quad_builder()
    node = b.add_node("mover", mesh=mesh)
    # translation x = seconds (LINEAR from (0 s, 0) to (10 s, 10))
    b.add_animation([(node, "translation", [0.0, 10.0], [[0, 0, 0], [10, 0, 0]], "LINEAR")])
    shot = scene_shot(tmp_path, b, frames="[5, 29]", camera="position = [0, 0, 5]\ntarget = [0, 0, 0]\nshutter = 0")
    geom = compile_geometry(shot)
    fps = shot.fps
    for frame in (5, 17, 29):
        scene, _ = compile_frame(shot, geom, frame)
        assert scene.inst_motion[0, 0, 0] == pytest.approx((frame - 5) / fps, abs=1e-9)
    shot2 = scene_shot(tmp_path, b, frames="[5, 29]", extra_top="time_zero = 1",
                       camera="position = [0, 0, 5]\ntarget = [0, 0, 0]\nshutter = 0")
    scene, _ = compile_frame(shot2, compile_geometry(shot2), 5)
    assert scene.inst_motion[0, 0, 0] == pytest.approx(4 / fps, abs=1e-9)


def test_motion_blur_reads_the_animation_at_shutter_open_and_close(tmp_path):
    b, mesh = quad_builder()
    node = b.add_node("mover", mesh=mesh)
    b.add_animation([(node, "translation", [0.0, 1.0], [[0, 0, 0], [24, 0, 0]], "LINEAR")])
    shot = scene_shot(tmp_path, b, frames="[1, 24]", camera="position = [0, 0, 5]\ntarget = [0, 0, 0]\nshutter = 0.5")
    scene, _ = compile_frame(shot, compile_geometry(shot), 3)
    # 24 units per second at 24 fps: one unit per frame; the shutter spans frames 2.75 .. 3.25
    np.testing.assert_allclose(scene.inst_motion[0, :, 0], [1.75, 2.25], atol=1e-9)
    assert scene.inst_moving[0] == 1


def test_scene_camera_renders_as_the_same_view_written_in_the_shot(tmp_path):
    b, mesh = quad_builder()
    b.add_node("quad", mesh=mesh)
    cam = b.add_camera(yfov=math.radians(40), name="lens")
    # a camera node turned 20° about y and tilted 10° down, under a parent moved to (0.5, 0.5, 0):
    # glTF cameras look down their local -z with +y up (glTF 2.0 section 3.10)
    turn = Rotation.from_euler("yx", [20, -10], degrees=True)
    b.add_node("rig", translation=[0.5, 0.5, 0.0],
               children=[b.add_node("shot_cam", camera=cam, translation=[1.0, 0.0, 4.0], rotation=turn.as_quat())])
    position = np.array([0.5, 0.5, 0.0]) + [1.0, 0.0, 4.0]
    target = position + turn.apply([0, 0, -1])  # scipy, not lampyr
    up = turn.apply([0, 1, 0])
    env = '[environment]\ncolor = [0.2, 0.3, 0.4]'
    through = scene_shot(tmp_path, b, body=env, camera='scene_camera = "shot_cam"\nshutter = 0')
    written = scene_shot(tmp_path, b, body=env, camera=(
        f"position = {position.tolist()}\ntarget = {target.tolist()}\nup = {up.tolist()}\nfov = 40\nshutter = 0"))
    a = render_frame(through, 1).mean()
    assert a.std() > 0  # the quad is in view, not only the background
    np.testing.assert_allclose(a, render_frame(written, 1).mean(), rtol=1e-6, atol=1e-9)


def test_an_unknown_scene_camera_is_one_line_naming_the_key(tmp_path):
    b, mesh = quad_builder()
    b.add_node("quad", mesh=mesh)
    b.add_node("main", camera=b.add_camera(yfov=0.7))
    shot = scene_shot(tmp_path, b, camera='scene_camera = "missing"')
    with pytest.raises(ShotError) as err:
        compile_geometry(shot)
    text = str(err.value)
    assert "camera.scene_camera" in text and "'main'" in text and "missing" in text and "\n" not in text


def test_scene_lights_take_their_nodes_position_and_direction(tmp_path):
    b, mesh = quad_builder()
    b.add_node("quad", mesh=mesh)
    light = b.add_light("spot", color=[1.0, 0.5, 0.25], intensity=8.0, inner_cone=0.1, outer_cone=0.5)
    turn = Rotation.from_euler("x", -90, degrees=True)  # local -z turned to point down (-y)
    b.add_node("lamp", light=light, translation=[1, 2, 3], rotation=turn.as_quat())
    shot = scene_shot(tmp_path, b, extra_top="scene_light_scale = 0.5")
    scene, _ = compile_frame(shot, compile_geometry(shot), 1)
    row = scene.punct[0]
    np.testing.assert_allclose(row[L_POS_OPEN:L_POS_OPEN + 3], [1, 2, 3], atol=1e-12)
    np.testing.assert_allclose(row[L_DIR_OPEN:L_DIR_OPEN + 3], turn.apply([0, 0, -1]), atol=1e-12)
    np.testing.assert_allclose(row[L_RGB:L_RGB + 3], np.array([1.0, 0.5, 0.25]) * 8.0 * 0.5)


def test_a_shot_of_only_a_scene_file_is_valid_and_renders(tmp_path):
    b, mesh = quad_builder({"base_color": [1, 1, 1, 1], "emissive": [1, 1, 1]})
    b.add_node("quad", mesh=mesh, translation=[-2, -2, 0], scale=[4, 4, 1])
    shot = scene_shot(tmp_path, b)
    assert shot.objects == ()
    film = render_frame(shot, 1)
    # the emissive quad fills the middle of the view: radiance 1 there (glTF emissiveFactor)
    assert film.mean()[4, 4, 0] == pytest.approx(1.0)


def _strip_builder(targets=None, joints=None, weights=None):
    """An emissive 1 × 4 strip at x ∈ [0, 1], y ∈ [-2, 2] (z = 0), facing +z."""
    b = GltfBuilder()
    mat = b.add_material("glow", base_color=[0, 0, 0, 1], emissive=[1, 1, 1])
    pos = np.array([[0.0, -2, 0], [1, -2, 0], [1, 2, 0], [0, 2, 0]])
    prim = b.primitive(pos, QUAD_NORMALS, QUAD_UVS, indices=QUAD_FACES, material=mat, targets=targets,
                       joints=joints, weights=weights)
    return b, b.add_mesh([prim], name="strip", weights=[0.0] if targets else None), pos


def test_a_morphing_mesh_blurs_linearly_between_its_poses_at_shutter_open_and_close(tmp_path):
    # morph target: every vertex 2 units along +x; its weight goes 0 -> 1 over scene seconds 0 -> 1
    b, mesh, pos = _strip_builder(targets=[{"POSITION": np.tile([2.0, 0.0, 0.0], (4, 1))}])
    node = b.add_node("strip", mesh=mesh)
    b.add_animation([(node, "weights", [0.0, 1.0], [[0.0], [1.0]], "LINEAR")])
    # frame 1 at scene time 0.5 s (fps 1, time_zero 0.5); the shutter spans 0 .. 1 s
    save_valid(b, tmp_path / "scene.glb")
    shot = load(tmp_path, 'scene = "scene.glb"\nfps = 1\ntime_zero = 0.5\n' + shot_text(
        "", width=24, height=1, samples=256, sampler="sobol", bounces=0,
        camera="position = [1.5, 0, 60]\ntarget = [1.5, 0, 0]\nshutter = 1\nfov = 1"))
    film = render_frame(shot, 1)
    # a point x is covered while 2w <= x <= 1 + 2w with w the shutter fraction: for that long
    # half the view's width at z = 0 (square pixels); the view's height (±0.52) lies inside the strip
    half_w = 60 * math.tan(math.radians(0.5)) * 24
    edges = np.linspace(1.5 - half_w, 1.5 + half_w, 24 * 64 + 1)
    x = 0.5 * (edges[:-1] + edges[1:])
    cover = np.clip(np.minimum(1.0, x / 2) - np.maximum(0.0, (x - 1) / 2), 0.0, None)
    expected = cover.reshape(24, 64).mean(axis=1)
    got = film.mean()[0, :, 0]
    se = film.std_error()[0, :, 0]
    assert expected.max() > 0.4 and expected.min() == 0.0  # the whole ramp is in view
    np.testing.assert_array_less(np.abs(got - expected), 4 * se + 0.01)


def test_a_skinned_mesh_is_posed_by_its_joint_at_shutter_open_and_close(tmp_path):
    ones = np.zeros((4, 4))
    ones[:, 0] = 1.0
    b, mesh, pos = _strip_builder(joints=np.zeros((4, 4), np.int64), weights=ones)
    joint = b.add_node("bone")
    b.add_node("strip", mesh=mesh, skin=b.add_skin([joint]))
    b.add_animation([(joint, "translation", [0.0, 1.0], [[0, 0, 0], [0, 3, 0]], "LINEAR")])
    save_valid(b, tmp_path / "scene.glb")
    shot = load(tmp_path, 'scene = "scene.glb"\nfps = 1\ntime_zero = 0.5\n' + shot_text(
        "", camera="position = [0, 0, 5]\ntarget = [0, 0, 0]\nshutter = 0.5"))
    scene, _ = compile_frame(shot, compile_geometry(shot), 1)
    m = int(scene.inst_mesh[0])
    first, count = scene.mesh_tri_base[m], scene.mesh_tri_count[m]
    assert scene.mesh_end[m] >= 0
    # the joint moves 3 units up per second; the shutter spans 0.25 .. 0.75 s: y + 0.75 and y + 2.25
    # (glTF 2.0 skinning: jointMatrix = world(joint) · inverseBind, identity here)
    open_pose = np.sort(scene.tris[first:first + count].reshape(-1, 3), axis=0)
    close_pose = np.sort(scene.tris_end[scene.mesh_end[m]:scene.mesh_end[m] + count].reshape(-1, 3), axis=0)
    corners = pos[QUAD_FACES].reshape(-1, 3)
    np.testing.assert_allclose(open_pose, np.sort(corners + [0, 0.75, 0], axis=0), atol=1e-6)
    np.testing.assert_allclose(close_pose, np.sort(corners + [0, 2.25, 0], axis=0), atol=1e-6)


@pytest.mark.parametrize("double_sided", [False, True])
def test_the_camera_sees_the_back_of_a_surface_only_when_it_is_double_sided(tmp_path, double_sided):
    # glTF 2.0 section 3.9.6 (material.doubleSided): false means back-face culling
    b = GltfBuilder()
    glow = b.add_material("glow", base_color=[0, 0, 0, 1], emissive=[1, 1, 1], double_sided=double_sided)
    mesh = b.add_mesh([b.primitive(QUAD_POSITIONS, QUAD_NORMALS, QUAD_UVS, indices=QUAD_FACES, material=glow)])
    b.add_node("quad", mesh=mesh, translation=[-2, -2, 0], scale=[4, 4, 1])  # faces +z
    env = "[environment]\ncolor = [0.25, 0.25, 0.25]"
    front = scene_shot(tmp_path, b, body=env, camera="position = [0, 0, 5]\ntarget = [0, 0, 0]")
    back = scene_shot(tmp_path, b, body=env, camera="position = [0, 0, -5]\ntarget = [0, 0, 0]")
    # the glow's own specular layer adds a little of the grey surroundings (at most F0 = 0.04 of it)
    assert render_frame(front, 1).mean()[4, 4, 0] == pytest.approx(1.0, abs=0.02)
    seen_from_behind = render_frame(back, 1).mean()[4, 4, 0]
    assert seen_from_behind == pytest.approx(1.0 if double_sided else 0.25, abs=0.02)


def test_an_optional_extension_lampyr_does_not_read_is_one_warning_line(tmp_path):
    # glTF 2.0 section 3.12: extensionsUsed lists optional extensions a reader may ignore
    from lampyr.engine.compiler import check_shot_files

    b, mesh = quad_builder()
    b.add_node("quad", mesh=mesh)
    b.use_extension("EXT_lights_image_based")
    b.use_extension("KHR_materials_sheen")
    shot = scene_shot(tmp_path, b)
    (line,) = check_shot_files(shot)
    assert "EXT_lights_image_based" in line and "KHR_materials_sheen" in line and "\n" not in line
    assert render_frame(shot, 1).mean().shape == (8, 8, 3)  # and the scene renders without them


def test_a_node_scaled_to_nothing_renders_as_nothing(tmp_path):
    # animators hide objects by scaling them to 0 (glTF 2.0 allows any scale)
    b, mesh = quad_builder({"base_color": [1, 1, 1, 1], "emissive": [1, 1, 1]})
    b.add_node("hidden", mesh=mesh, translation=[-2, -2, 0], scale=[4, 0, 1])
    shot = scene_shot(tmp_path, b, body="[environment]\ncolor = [0.25, 0.25, 0.25]")
    np.testing.assert_allclose(render_frame(shot, 1).mean(), 0.25)


def test_lights_and_cameras_of_other_scenes_in_the_file_are_not_used(tmp_path):
    # glTF 2.0 section 3.5.2: only the nodes of the scene shown are rendered
    b, mesh = quad_builder()
    shown = b.add_node("quad", mesh=mesh)
    lamp = b.add_node("lamp", light=b.add_light("point", intensity=5.0), translation=[0, 0, 2])
    b.add_node("other_cam", camera=b.add_camera(yfov=0.7))
    b.add_scene([shown], name="shown", default=True)
    b.add_scene([lamp], name="spare", default=False)
    shot = scene_shot(tmp_path, b)
    scene, _ = compile_frame(shot, compile_geometry(shot), 1)
    assert not (scene.light_inst == -1).any()  # no punctual light in the light list
    shot = scene_shot(tmp_path, b, camera='scene_camera = "other_cam"')
    with pytest.raises(ShotError):
        compile_geometry(shot)


def test_a_cut_out_emitter_gives_no_light_where_it_is_cut(tmp_path):
    # glTF 2.0 section 3.9.4 (alphaMode MASK): below the cutoff the surface is not there, so it
    # neither shows nor emits; light samples must agree with the rays that pass it
    b = GltfBuilder()
    clear = b.add_image(np.zeros((2, 2, 4), np.uint8))  # alpha 0 everywhere
    card = b.add_material("card", base_color=[1, 1, 1, 1], emissive=[1, 1, 1], alpha_mode="MASK",
                          base_color_tex=tex(b.add_texture(clear)))
    floor = b.add_material("floor", base_color=[0.8, 0.8, 0.8, 1], metallic=0.0, roughness=1.0)
    card_mesh = b.add_mesh([b.primitive(QUAD_POSITIONS, QUAD_NORMALS, QUAD_UVS, indices=QUAD_FACES,
                                        material=card)])
    b.add_node("card", mesh=card_mesh, translation=[-2, -2, 1], scale=[4, 4, 1])
    floor_mesh = b.add_mesh([b.primitive(QUAD_POSITIONS, QUAD_NORMALS, QUAD_UVS, indices=QUAD_FACES,
                                         material=floor)])
    b.add_node("floor", mesh=floor_mesh, translation=[-5, -5, 0], scale=[10, 10, 1])
    shot = scene_shot(tmp_path, b, camera="position = [0, 0, 5]\ntarget = [0, 0, 0]")
    assert render_frame(shot, 1).mean().max() == 0.0


def test_a_scene_camera_with_an_aperture_needs_a_focus(tmp_path):
    # docs/shot-file.md: focus defaults to |target - position|, which a scene camera does not have
    b, mesh = quad_builder()
    b.add_node("quad", mesh=mesh)
    b.add_node("lens", camera=b.add_camera(yfov=0.7))
    with pytest.raises(ShotError) as err:
        scene_shot(tmp_path, b, camera='scene_camera = "lens"\naperture = 0.05')
    assert err.value.key == "camera.focus"
    shot = scene_shot(tmp_path, b, camera='scene_camera = "lens"\naperture = 0.05\nfocus = 4')
    assert shot.camera.focus == 4.0
