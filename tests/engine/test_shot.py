"""The shot file: parsing, defaults and one-line errors naming the key path.

Source for expected values: the shot file reference (docs/shot-file.md) and the core format the
README's shot-file section shows; TOML syntax positions come from tomllib itself.
"""

from __future__ import annotations

import math
import tomllib

import numpy as np
import pytest

from lampyr.engine.shot import load_shot, parse_shot, parse_shot_text
from lampyr.errors import AssetError, ShotError

HEADER = """name = "t"
frames = 1
[image]
width = 4
height = 3
[sampling]
samples = 2
"""
CAMERA = """[camera]
position = [0, 0, 5]
target = [0, 0, 0]
fov = 40
"""
BARE_CAMERA = """[camera]
position = [0, 0, 5]
target = [0, 0, 0]
"""
MATERIAL = """[[material]]
name = "white"
type = "diffuse"
"""
BALL = """[[object]]
name = "ball"
material = "white"
sphere = { center = [0, 0, 0], radius = 1 }
"""

README_CORE = """
name = "courtyard"              # file stem of the frames: courtyard.0001.exr …
frames = [1, 48]                # first and last frame, inclusive; a single integer for a still
fps = 24

[image]
width = 960
height = 540

[sampling]
samples = 128                   # samples per pixel to reach
bounces = 8                     # longest path; Russian roulette may end paths sooner, unbiased
seed = 1

[camera]
position = [0.0, 1.6, 6.0]
target = [0.0, 1.0, 0.0]
up = [0.0, 1.0, 0.0]             # the default; image rows run top to bottom, columns left to right
fov = 45.0                      # vertical field of view, degrees
aperture = 0.0                  # lens radius in scene units; 0 is a pinhole
focus = 6.0                     # focus distance
shutter = 0.5                   # open fraction of the frame interval, for motion blur

[environment]
color = [0.05, 0.05, 0.08]      # uniform radiance from every direction not blocked
# map = "assets/sky.exr"        # latitude-longitude radiance map, importance sampled;
                                # its top row is straight up (+y), its middle row the horizon

[[material]]
name = "white"
type = "diffuse"                # diffuse | metal | glass | plastic …
color = [0.8, 0.8, 0.8]
# roughness, ior, emission = [r, g, b] (radiance; any material may emit)

[[object]]
name = "ball"
material = "white"
sphere = { center = [0.0, 1.0, 0.0], radius = 1.0 }
"""


def write_shot(tmp_path, text: str, name: str = "shot.toml"):
    """Write shot TOML `text` into tmp_path and return the file's path."""
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def shot_text(header=HEADER, camera=CAMERA, rest=MATERIAL + BALL) -> str:
    return header + camera + rest


def error_of(tmp_path, text: str) -> ShotError:
    path = write_shot(tmp_path, text)
    with pytest.raises(ShotError) as info:
        load_shot(path)
    return info.value


# ---------------------------------------------------------------------------------------------
# what parses


def test_readme_core_example_parses(tmp_path):
    # source: README.md, "The shot file" (the core format that must keep working)
    shot = load_shot(write_shot(tmp_path, README_CORE))
    assert (shot.name, shot.first_frame, shot.last_frame, shot.fps) == ("courtyard", 1, 48, 24.0)
    assert (shot.width, shot.height, shot.samples, shot.bounces, shot.seed) == (960, 540, 128, 8, 1)
    cam = shot.camera
    assert cam.position.tolist() == [0.0, 1.6, 6.0] and cam.target.tolist() == [0.0, 1.0, 0.0]
    assert (cam.fov, cam.aperture, cam.focus, cam.shutter) == (45.0, 0.0, 6.0, 0.5)
    assert shot.environment.color.tolist() == [0.05, 0.05, 0.08]
    assert [(m.name, m.type) for m in shot.materials] == [("white", "diffuse")]
    ball = shot.objects[0]
    assert (ball.name, ball.material, ball.mesh) == ("ball", "white", None)
    assert ball.sphere.center.tolist() == [0.0, 1.0, 0.0] and ball.sphere.radius == 1.0


def test_frames_range_is_inclusive(tmp_path):
    # source: README.md, "frames = [1, 48]  # first and last frame, inclusive"
    shot = load_shot(write_shot(tmp_path, README_CORE))
    assert shot.frames() == range(1, 49)


def test_single_integer_frames_is_a_still(tmp_path):
    # source: README.md, "one integer for a still"
    shot = load_shot(write_shot(tmp_path, shot_text(HEADER.replace("frames = 1", "frames = 12"))))
    assert list(shot.frames()) == [12]


@pytest.mark.parametrize(
    "attribute, expected",
    [
        ("fps", 24.0), ("bounces", 8), ("seed", 1), ("sampler", "sobol"), ("roulette", 3),
    ],
)
def test_shot_defaults(tmp_path, attribute, expected):
    # source: docs/shot-file.md, defaults
    shot = load_shot(write_shot(tmp_path, shot_text()))
    assert getattr(shot, attribute) == expected


def test_camera_defaults(tmp_path):
    # source: docs/shot-file.md: up +y, 45° fov, pinhole, half-open shutter, focus on the target
    cam = load_shot(write_shot(tmp_path, shot_text(camera=BARE_CAMERA))).camera
    assert cam.up.tolist() == [0.0, 1.0, 0.0]
    assert (cam.fov, cam.aperture, cam.shutter, cam.focus, cam.auto_focus) == (45.0, 0.0, 0.5, 5.0, True)


def test_environment_defaults(tmp_path):
    # source: docs/shot-file.md: black, no map, strength 1, no rotation
    env = load_shot(write_shot(tmp_path, shot_text())).environment
    assert (env.color.tolist(), env.map, env.strength, env.rotate) == ([0.0, 0.0, 0.0], None, 1.0, 0.0)


@pytest.mark.parametrize("kind, roughness",
                         [("diffuse", 0.0), ("metal", 0.0), ("glass", 0.0), ("plastic", 0.1)])
def test_material_defaults(tmp_path, kind, roughness):
    # source: docs/shot-file.md, [[material]] defaults
    text = shot_text(rest=MATERIAL.replace('"diffuse"', f'"{kind}"') + BALL)
    mat = load_shot(write_shot(tmp_path, text)).materials[0]
    assert mat.color.tolist() == [0.8, 0.8, 0.8] and mat.ior == 1.5 and mat.emission.tolist() == [0, 0, 0]
    assert mat.roughness == roughness


def test_object_defaults(tmp_path):
    # source: docs/shot-file.md, [[object]] defaults
    obj = load_shot(write_shot(tmp_path, shot_text())).objects[0]
    assert obj.translate.tolist() == [0, 0, 0] and obj.rotate.tolist() == [0, 0, 0]
    assert obj.scale.tolist() == [1, 1, 1] and obj.keys == ()


def test_integers_are_accepted_for_numbers(tmp_path):
    # source: docs/shot-file.md, "an integer is accepted wherever a number is"
    cam = load_shot(write_shot(tmp_path, shot_text())).camera
    assert isinstance(cam.fov, float) and cam.position.dtype == np.float64


def test_one_number_emission_is_grey(tmp_path):
    # source: docs/shot-file.md: emission is one number or [r, g, b]
    text = shot_text(rest=MATERIAL + "emission = 2\n" + BALL)
    assert load_shot(write_shot(tmp_path, text)).materials[0].emission.tolist() == [2.0, 2.0, 2.0]


def test_vectors_are_read_only(tmp_path):
    # source: docs/shot-file.md: a parsed shot does not change
    shot = load_shot(write_shot(tmp_path, shot_text()))
    with pytest.raises(ValueError):
        shot.camera.position[0] = 1.0


def test_keys_are_read_in_order(tmp_path):
    # source: docs/shot-file.md, [[object.key]]
    text = shot_text(rest=MATERIAL + BALL + "[[object.key]]\nframe = 1\ntranslate = [0, 0, 0]\n"
                     "[[object.key]]\nframe = 5\nscale = 2\n")
    keys = load_shot(write_shot(tmp_path, text)).objects[0].keys
    assert [k.frame for k in keys] == [1, 5]
    assert keys[0].scale is None and keys[1].scale.tolist() == [2.0, 2.0, 2.0]


def test_focus_given_in_a_key_turns_auto_focus_off(tmp_path):
    # source: docs/shot-file.md, camera focus
    text = shot_text(camera=CAMERA + "[[camera.key]]\nframe = 1\nfocus = 3\n")
    assert load_shot(write_shot(tmp_path, text)).camera.auto_focus is False


def test_parse_shot_accepts_a_dict_without_a_folder():
    # source: docs/shot-file.md: parse_shot validates data as tomllib returns it
    shot = parse_shot(tomllib.loads(shot_text()), root=None)
    assert shot.root is None and shot.path is None and shot.name == "t"


def test_mesh_object_may_omit_its_material(tmp_path):
    # source: docs/shot-file.md: a mesh without a material uses the file's own colours
    (tmp_path / "m.obj").write_text("v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n")
    text = shot_text(rest=MATERIAL + '[[object]]\nname = "m"\nmesh = "m.obj"\n')
    assert load_shot(write_shot(tmp_path, text)).objects[0].material is None


# ---------------------------------------------------------------------------------------------
# overrides


def test_with_overrides_returns_a_new_shot(tmp_path):
    # source: docs/shot-file.md, overrides
    shot = load_shot(write_shot(tmp_path, README_CORE))
    small = shot.with_overrides(samples=4, frames=(2, 3), width=8, height=6)
    assert (small.samples, small.frames(), small.width, small.height) == (4, range(2, 4), 8, 6)
    assert (shot.samples, shot.width) == (128, 960)


def test_with_overrides_validates(tmp_path):
    # source: docs/shot-file.md, sampling.samples limits
    path = write_shot(tmp_path, README_CORE)
    with pytest.raises(ShotError) as info:
        load_shot(path).with_overrides(samples=0)
    assert info.value.key == "sampling.samples" and str(info.value).startswith(f"{path}: ")


# ---------------------------------------------------------------------------------------------
# errors: one line, the key path, what is expected, what was found


def test_error_text_has_the_documented_shape(tmp_path):
    # source: docs/shot-file.md, "Errors"
    path = write_shot(tmp_path, shot_text(camera=CAMERA.replace("fov = 40", "fov = 0")))
    with pytest.raises(ShotError) as info:
        load_shot(path)
    assert str(info.value) == f"{path}: camera.fov: expected degrees between 1 and 179, got 0"


def _cam(old, new):
    return shot_text(camera=CAMERA.replace(old, new))


def _head(old, new):
    return shot_text(header=HEADER.replace(old, new))


def _rest(text):
    return shot_text(rest=text)


BAD = [
    # (TOML, key path, a piece of the message)
    (_head('name = "t"', 'name = "a/b"'), "name", 'got "a/b"'),
    (_head('name = "t"', 'name = ".hidden"'), "name", 'got ".hidden"'),
    (_head('name = "t"\n', ""), "name", "got nothing"),
    (_head("frames = 1", "frames = [5, 2]"), "frames", "got [5, 2]"),
    (_head("frames = 1", "frames = 10000"), "frames", "got 10000"),
    (_head("frames = 1", "frames = 1.5"), "frames", "got 1.5"),
    (_head("frames = 1", "frames = [1, 2, 3]"), "frames", "got [1, 2, 3]"),
    (_head("frames = 1", "frames = 1\nfps = 0"), "fps", "got 0"),
    (_head("width = 4", "width = 0"), "image.width", "got 0"),
    (_head("width = 4", "width = 16385"), "image.width", "got 16385"),
    (_head("width = 4", "width = 4.0"), "image.width", "got 4.0"),
    (_head("width = 4\nheight = 3", "width = 16384\nheight = 10000"), "image",
     "at most 100000000 pixels"),
    (_head("[image]\nwidth = 4\nheight = 3\n", ""), "image", "got nothing"),
    (_head("samples = 2", "samples = 0"), "sampling.samples", "got 0"),
    (_head("samples = 2", "samples = 1048577"), "sampling.samples", "got 1048577"),
    (_head("samples = 2", "samples = 2\nbounces = 129"), "sampling.bounces", "got 129"),
    (_head("samples = 2", "samples = 2\nseed = -1"), "sampling.seed", "got -1"),
    (_head("samples = 2", "samples = 2\nseed = 4294967296"), "sampling.seed", "got 4294967296"),
    (_head("samples = 2", 'samples = 2\nsampler = "halton"'), "sampling.sampler", 'got "halton"'),
    (_head("samples = 2", "samples = 2\nroulette = -1"), "sampling.roulette", "got -1"),
    (_cam("fov = 40", "fov = 180"), "camera.fov", "got 180"),
    (_cam("fov = 40", "fov = true"), "camera.fov", "got true"),
    (_cam("fov = 40", "fov = nan"), "camera.fov", "got nan"),
    (_cam("position = [0, 0, 5]", "position = [0, 0]"), "camera.position", "got [0, 0]"),
    (_cam("position = [0, 0, 5]", "position = [0, inf, 5]"), "camera.position", "got [0, inf, 5]"),
    (_cam("position = [0, 0, 5]", 'position = [0, "1", 5]'), "camera.position", 'got [0, "1", 5]'),
    (_cam("fov = 40", "fov = 40\naperture = -0.1"), "camera.aperture", "got -0.1"),
    (_cam("fov = 40", "fov = 40\nfocus = 0"), "camera.focus", "got 0"),
    (_cam("fov = 40", "fov = 40\nshutter = 1.5"), "camera.shutter", "got 1.5"),
    (_cam("fov = 40", "fov = 40\nup = [0, 0, 1]"), "camera.up", "got [0.0, 0.0, 1.0]"),
    (_cam("target = [0, 0, 0]", "target = [0, 0, 5]"), "camera.target", "got [0.0, 0.0, 5.0]"),
    (_cam("fov = 40", "fov = 40\n[[camera.key]]\nframe = 3\nfov = 30\n[[camera.key]]\nframe = 3\nfov = 20"),
     "camera.key[2].frame", "got 3"),
    (_cam("fov = 40", "fov = 40\n[[camera.key]]\nframe = 1\nposition = [0, 5, 0]"), "camera.key[1].up",
     "got [0.0, 1.0, 0.0]"),
    (_cam("fov = 40", "fov = 40\n[[camera.key]]\nframe = 1"), "camera.key[1]", "got a table {frame}"),
    (_cam("fov = 40", "fov = 40\n[[camera.key]]\nposition = [1, 1, 1]"), "camera.key[1].frame",
     "got nothing"),
    (_cam("fov = 40", "fov = 40\n[environment]\ncolor = [-1, 0, 0]"), "environment.color", "got [-1, 0, 0]"),
    (_cam("fov = 40", "fov = 40\n[environment]\nstrength = -1"), "environment.strength", "got -1"),
    (_cam("fov = 40", 'fov = 40\n[environment]\nmap = "sky.png"'), "environment.map", 'got "sky.png"'),
    (_cam("fov = 40", 'fov = 40\n[environment]\nmap = "sky.exr"'), "environment.map", 'got "sky.exr"'),
    (_rest(MATERIAL.replace('"diffuse"', '"velvet"') + BALL), "material[white].type", 'got "velvet"'),
    (_rest(MATERIAL + "color = [1.2, 0, 0]\n" + BALL), "material[white].color", "got [1.2, 0, 0]"),
    (_rest(MATERIAL + "roughness = 2\n" + BALL), "material[white].roughness", "got 2"),
    (_rest(MATERIAL + "ior = 0.9\n" + BALL), "material[white].ior", "got 0.9"),
    (_rest(MATERIAL + "emission = -1\n" + BALL), "material[white].emission", "got -1"),
    (_rest(MATERIAL.replace('name = "white"\n', "") + BALL), "material[1].name", "got nothing"),
    (_rest(MATERIAL + MATERIAL + BALL), "material[2].name", 'got "white"'),
    (_rest('[material]\nname = "white"\ntype = "diffuse"\n' + BALL), "material", "got a table"),
    (_rest(MATERIAL + BALL.replace('"white"', '"whit"')), "object[ball].material", '"white", got "whit"'),
    (_rest(BALL), "object[ball].material", "defines none"),
    (_rest(MATERIAL + BALL.replace('material = "white"\n', "")), "object[ball].material", "got nothing"),
    (_rest(MATERIAL + BALL.replace("radius = 1", "radius = 0")), "object[ball].sphere.radius", "got 0"),
    (_rest(MATERIAL + BALL.replace("radius = 1", "radius = 1, centre = [0, 0, 0]")),
     "object[ball].sphere.centre", 'got unknown key "centre"'),
    (_rest(MATERIAL + BALL + 'mesh = "a.obj"\n'), "object[ball]", "got both"),
    (_rest(MATERIAL + '[[object]]\nname = "ball"\nmaterial = "white"\n'), "object[ball]", "got neither"),
    (_rest(MATERIAL + BALL + "scale = [1, 2, 1]\n"), "object[ball].scale", "got [1, 2, 1]"),
    (_rest(MATERIAL + BALL + "scale = 0\n"), "object[ball].scale", "got 0"),
    (_rest(MATERIAL + BALL + "rotate = [0, 90]\n"), "object[ball].rotate", "got [0, 90]"),
    (_rest(MATERIAL + BALL + BALL), "object[2].name", 'got "ball"'),
    (_rest(MATERIAL + BALL.replace('name = "ball"', "name = 7")), "object[1].name", "got 7"),
    (_rest(MATERIAL + BALL + "[[object.key]]\nframe = 4\ntranslate = [0, 1, 0]\n"
           "[[object.key]]\nframe = 2\ntranslate = [0, 0, 0]\n"), "object[ball].key[2].frame", "got 2"),
    (_rest(MATERIAL + BALL + "[[object.key]]\nframe = 1\nscale = [1, 2, 3]\n"),
     "object[ball].key[1].scale", "got [1, 2, 3]"),
    (_rest(MATERIAL + BALL + "[[object.key]]\nframe = 1\nvisible = false\n"),
     "object[ball].key[1].visible", 'got unknown key "visible"'),
]


@pytest.mark.parametrize("text, key, found", BAD)
def test_bad_input_gives_one_line_naming_the_key(tmp_path, text, key, found):
    # source: docs/shot-file.md, the reference of every key and its limits
    err = error_of(tmp_path, text)
    assert err.key == key
    assert err.problem.startswith("expected ") and found in err.problem
    assert "\n" not in str(err)


def test_unknown_key_lists_the_allowed_keys(tmp_path):
    # source: docs/shot-file.md, "unknown keys are errors"
    err = error_of(tmp_path, _cam("fov = 40", "fovy = 40"))
    assert str(err).endswith(
        'camera.fovy: expected one of the keys aperture, focus, fov, key, position, scene_camera, shutter, '
        'target, up, got unknown key "fovy" (did you mean fov?)'
    )


def test_unknown_top_level_key_is_refused(tmp_path):
    # source: docs/shot-file.md, top-level keys
    err = error_of(tmp_path, 'nmae = "x"\n' + shot_text())
    assert err.key == "nmae" and "frames" in err.problem


def test_pixel_limit_is_stated(tmp_path):
    # source: docs/shot-file.md, image size limits
    err = error_of(tmp_path, _head("width = 4\nheight = 3", "width = 16384\nheight = 16384"))
    assert err.problem == ("expected width × height at most 100000000 pixels (100 megapixels), "
                           'got 16384 × 16384 = 268435456')


@pytest.mark.parametrize(
    "text",
    ["name = \n", 'name = "t"\nframes = [1, 2\n', 'name = "t"\nname = "u"\n', "[image\n"],
)
def test_toml_syntax_error_is_one_line_with_tomllib_position(tmp_path, text):
    # source: tomllib (Python standard library) reports the position; we repeat it on one line
    with pytest.raises(tomllib.TOMLDecodeError) as reference:
        tomllib.loads(text)
    err = error_of(tmp_path, text)
    position = str(reference.value).rsplit("(at ", 1)[1].rstrip(")")
    assert err.key == position and "\n" not in str(err) and "TOML syntax error" in err.problem


def test_error_names_the_file(tmp_path):
    # source: docs/shot-file.md, "Errors": the command line prints the file first
    path = write_shot(tmp_path, _head("samples = 2", "samples = 0"))
    with pytest.raises(ShotError) as info:
        load_shot(path)
    assert str(info.value).startswith(f"{path}: sampling.samples: ")


def test_missing_shot_file_is_a_shot_error(tmp_path):
    # source: docs/shot-file.md, "Errors"
    with pytest.raises(ShotError, match="cannot read the shot file"):
        load_shot(tmp_path / "nope.toml")


def test_parse_shot_text_reports_syntax_without_a_file():
    # source: tomllib position, as above
    with pytest.raises(ShotError) as info:
        parse_shot_text("a = = 1\n")
    assert info.value.key == "line 1, column 5" and info.value.file is None


# ---------------------------------------------------------------------------------------------
# asset paths in the shot


@pytest.mark.parametrize(
    "mesh, found",
    [
        ("../outside.obj", "no '..'"),
        ("assets/../../outside.obj", "no '..'"),
        ("/etc/outside.obj", "absolute path"),
        ("assets\\\\lamp.obj", "forward slashes"),
        ("lamp.fbx", ".glb, .gltf, .obj, .ply, .stl"),
        ("missing.obj", "relative to the shot file's folder"),
    ],
)
def test_mesh_path_problems_name_the_object(tmp_path, mesh, found):
    # source: docs/shot-file.md, "Paths" (relative to the shot file's folder)
    text = shot_text(rest=f'[[object]]\nname = "lamp"\nmesh = "{mesh}"\n')
    path = write_shot(tmp_path, text)
    with pytest.raises(AssetError) as info:
        load_shot(path)
    assert info.value.key == "object[lamp].mesh" and found in info.value.problem


def test_files_lists_meshes_and_map_sorted(tmp_path):
    # source: docs/shot-file.md, "Files a shot uses"
    (tmp_path / "assets").mkdir()
    (tmp_path / "assets" / "b.stl").write_text("solid b\nendsolid b\n")
    (tmp_path / "a.ply").write_text("ply\n")
    (tmp_path / "assets" / "sky.exr").write_bytes(b"")
    text = shot_text(rest='[environment]\nmap = "assets/sky.exr"\n'
                          '[[object]]\nname = "b"\nmesh = "assets/b.stl"\n'
                          '[[object]]\nname = "a"\nmesh = "a.ply"\n')
    shot = load_shot(write_shot(tmp_path, text))
    assert shot.files() == ["a.ply", "assets/b.stl", "assets/sky.exr"]


def test_nan_in_a_vector_is_not_finite():
    # source: docs/shot-file.md, "NaN and infinity are refused"
    data = tomllib.loads(shot_text())
    data["camera"]["target"] = [0.0, math.nan, 0.0]
    with pytest.raises(ShotError) as info:
        parse_shot(data)
    assert info.value.key == "camera.target"


# ---------------------------------------------------------------------------------------------
# [output]: source docs/shot-file.md, the [output] table

@pytest.mark.parametrize("rest, expected", [("", True), ("[output]\ndenoise = false\n", False),
                                            ("[output]\ndenoise = true\n", True),
                                            ("[output]\n", True)])
def test_output_denoise(rest, expected):
    assert parse_shot_text(shot_text(rest=MATERIAL + BALL + rest)).denoise is expected


@pytest.mark.parametrize("denoise", [False, True])
def test_with_overrides_sets_denoise(denoise):
    shot = parse_shot_text(shot_text(rest=MATERIAL + BALL + "[output]\ndenoise = true\n"))
    assert shot.with_overrides(denoise=denoise).denoise is denoise


@pytest.mark.parametrize("rest, key, found", [
    ("[output]\ndenoise = 1\n", "output.denoise", "got 1"),
    ('[output]\ndenoise = "no"\n', "output.denoise", 'got "no"'),
    ("[output]\ndenoize = false\n", "output.denoize", 'got unknown key "denoize"'),
])
def test_bad_output_gives_one_line_naming_the_key(tmp_path, rest, key, found):
    err = error_of(tmp_path, shot_text(rest=MATERIAL + BALL + rest))
    assert err.key == key and found in err.problem and "\n" not in str(err)


def test_output_must_be_a_table(tmp_path):
    err = error_of(tmp_path, "output = 3\n" + shot_text())
    assert err.key == "output" and "got 3" in err.problem
