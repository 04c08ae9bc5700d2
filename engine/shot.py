"""The shot file: TOML parsed with tomllib and validated into frozen dataclasses.

Every problem is one `ShotError` whose text is one line, `<key path>: expected <what>, got
<what was found>` (`camera.fov: expected degrees between 1 and 179, got 0`). Key paths name
tables of an array by their `name` when it is valid (`object[lantern].key[2].frame`), else by
1-based position (`object[3]`). Unknown keys are errors that list the allowed ones, so a typo is
never silently ignored. Vectors are `(3,) float64` read-only arrays. docs/shot-file.md is the
reference of every key.
"""

from __future__ import annotations

import copy
import difflib
import json
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from lampyr.errors import ShotError

from .animation import camera_at
from .assets import MAP_EXTENSIONS, MESH_EXTENSIONS, asset_files, check_asset_path, resolve_asset

MAX_FRAME = 9999  # frame numbers are written with 4 digits
MAX_SIZE = 16384
MAX_PIXELS = 100_000_000
MAX_SAMPLES = 1_048_576
MAX_BOUNCES = 128
MATERIAL_TYPES = ("diffuse", "metal", "glass", "plastic", "pbr")
LIGHT_TYPES = ("point", "spot", "directional")
SCENE_EXTENSIONS = (".glb", ".gltf")
SAMPLERS = ("sobol", "random")
_NAME = re.compile(r"[A-Za-z0-9_][A-Za-z0-9_.-]{0,99}")
_GROUP = re.compile(r"[A-Za-z0-9_]{1,40}")  # a light group's name: a layer name group_<NAME>
LAYERS = ("diffuse_direct", "diffuse_indirect", "specular_direct", "specular_indirect",
          "transmission", "emission", "background")  # engine/layers.py, LAYER_NAMES
ID_MATTES = ("object", "material")  # engine/mattes.py, MATTE_KINDS
_LABEL = re.compile(r"[A-Za-z0-9_.-]([A-Za-z0-9 _.-]{0,62}[A-Za-z0-9_.-])?")
_MISSING = object()


class _Text(str):
    """A description of what was found, shown as it is (not as a TOML string)."""


# ---------------------------------------------------------------------------------------------
# reading values


def _show(v) -> str:
    """A found value as TOML would write it, cut to one short line."""
    if v is _MISSING:
        return "nothing (the key is required)"
    if isinstance(v, _Text):
        return str(v)
    if isinstance(v, bool):
        text = "true" if v else "false"
    elif isinstance(v, (int, float)):
        text = repr(v)
    elif isinstance(v, str):
        text = json.dumps(v)
    elif isinstance(v, list):
        text = "[" + ", ".join(_show(x) for x in v) + "]"
    elif isinstance(v, dict):
        text = "a table {" + ", ".join(sorted(v)) + "}"
    else:  # TOML dates and times
        text = f"the date/time {v.isoformat()}"
    return text if len(text) <= 60 else text[:57] + "..."


def _fail(key: str, expected: str, found):
    raise ShotError(key, f"expected {expected}, got {_show(found)}")


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def _in_range(v, lo, hi, lo_open) -> bool:
    return _is_number(v) and (lo is None or (v > lo if lo_open else v >= lo)) and (hi is None or v <= hi)


def number(what: str, lo=None, hi=None, lo_open=False):
    """Checker for a finite number (ints accepted) in [lo, hi] ((lo, hi] when lo_open)."""
    def check(v, key):
        return float(v) if _in_range(v, lo, hi, lo_open) else _fail(key, what, v)
    return check


def integer(what: str, lo: int, hi: int):
    def check(v, key):
        if not (isinstance(v, int) and not isinstance(v, bool) and lo <= v <= hi):
            _fail(key, what, v)
        return int(v)
    return check


def _frozen(values) -> np.ndarray:
    arr = np.array(values, np.float64)
    arr.setflags(write=False)
    return arr


def vector(what: str, lo=None, hi=None, lo_open=False, scalar=False):
    """Checker for 3 finite numbers in range (or, with `scalar`, also one number for all three)."""
    def check(v, key):
        if scalar and _in_range(v, lo, hi, lo_open):
            return _frozen([v] * 3)
        if not (isinstance(v, list) and len(v) == 3 and all(_in_range(x, lo, hi, lo_open) for x in v)):
            _fail(key, what, v)
        return _frozen(v)
    return check


def choice(options, what: str = "one of"):
    def check(v, key):
        if not (isinstance(v, str) and v in options):
            _fail(key, what + " " + ", ".join(json.dumps(o) for o in options), v)
        return v
    return check


def _asset(extensions, root):
    def check(v, key):
        if not isinstance(v, str):
            _fail(key, "a file path relative to the shot file's folder", v)
        check_asset_path(v, key, extensions)
        if root is not None:
            resolve_asset(root, v, key, extensions)
        return v
    return check


class _Table:
    """One TOML table being read: knows its key path and refuses keys it does not know."""

    def __init__(self, data, path: str, allowed, what: str | None = None):
        if not isinstance(data, dict):
            _fail(path, what or f"a table [{path}]", data)
        for k in data:
            if k not in allowed:
                near = difflib.get_close_matches(k, allowed, n=1, cutoff=0.6)
                hint = f" (did you mean {near[0]}?)" if near else ""
                raise ShotError(self._join(path, k), f"expected one of the keys {', '.join(sorted(allowed))}"
                                                     f", got unknown key {json.dumps(k)}{hint}")
        self.data, self.path = data, path

    @staticmethod
    def _join(path: str, key: str) -> str:
        return f"{path}.{key}" if path else key

    def key(self, k: str) -> str:
        return self._join(self.path, k)

    def has(self, k: str) -> bool:
        return k in self.data

    def get(self, k: str, check, default=_MISSING):
        if k not in self.data:
            return check(_MISSING, self.key(k)) if default is _MISSING else default
        return check(self.data[k], self.key(k))

    def array(self, k: str, what: str) -> list:
        """An array of tables (`[[path.k]]`), empty when absent."""
        v = self.data.get(k, [])
        if not (isinstance(v, list) and all(isinstance(x, dict) for x in v)):
            _fail(self.key(k), what, v)
        return v


def _labels(items: list[dict], kind: str) -> list[str]:
    """Key path per table of an array: `kind[name]` when its name is valid, else `kind[i]`."""
    labels, seen = [], {}
    for i, item in enumerate(items, 1):
        name = item.get("name")
        if not (isinstance(name, str) and _LABEL.fullmatch(name)):
            _fail(f"{kind}[{i}].name", "a name of letters, digits, spaces and _ - . (1 to 64 characters)",
                  item.get("name", _MISSING))
        if name in seen:
            _fail(f"{kind}[{i}].name", f"a name no other {kind} has (also {kind} {seen[name]})", name)
        seen[name] = i
        labels.append(f"{kind}[{name}]")
    return labels


# ---------------------------------------------------------------------------------------------
# the model


@dataclass(frozen=True, eq=False)
class CameraKey:
    frame: int
    position: np.ndarray | None = None
    target: np.ndarray | None = None
    up: np.ndarray | None = None
    fov: float | None = None
    focus: float | None = None


@dataclass(frozen=True, eq=False)
class Camera:
    """position, target, up: (3,) float64; fov: vertical degrees; aperture: lens radius;
    focus: distance; shutter: open fraction of the frame interval; auto_focus: the shot sets no
    focus, so focus follows |target - position| as they move."""

    position: np.ndarray
    target: np.ndarray
    up: np.ndarray
    fov: float
    aperture: float
    focus: float
    shutter: float
    keys: tuple = ()
    auto_focus: bool = False
    scene_camera: str | None = None  # render through this camera node of the shot's scene file


@dataclass(frozen=True, eq=False)
class Environment:
    color: np.ndarray
    map: str | None
    strength: float
    rotate: float
    group: str | None = None  # light group (docs/shot-file.md, [output] light_groups)


@dataclass(frozen=True, eq=False)
class Material:
    name: str
    type: str
    color: np.ndarray
    roughness: float
    ior: float
    emission: np.ndarray  # (3,) radiance
    metallic: float = 0.0  # "pbr" only
    transmission: float = 0.0  # "pbr" only: a thin-walled transmissive surface
    group: str | None = None  # light group of its emission


@dataclass(frozen=True, eq=False)
class Light:
    """A punctual light of the shot (docs/shot-file.md, "Lights"): position and direction (3,)
    float64 (direction: where the light travels, unit); color (3,); intensity: irradiance
    I cos θ / d² (point, spot) or E cos θ (directional) in the shot's radiance units; cone angles
    in radians."""

    name: str
    type: str
    position: np.ndarray
    direction: np.ndarray
    color: np.ndarray
    intensity: float
    inner_cone: float
    outer_cone: float
    group: str | None = None


@dataclass(frozen=True, eq=False)
class Sphere:
    center: np.ndarray
    radius: float


@dataclass(frozen=True, eq=False)
class ObjectKey:
    frame: int
    translate: np.ndarray | None = None
    rotate: np.ndarray | None = None
    scale: np.ndarray | None = None


@dataclass(frozen=True, eq=False)
class Object:
    """rotate: Euler degrees applied X, then Y, then Z about the world axes through the object's
    origin; then scale (3,) comes first and translate last (animation.compose_matrix)."""

    name: str
    material: str | None
    sphere: Sphere | None
    mesh: str | None
    translate: np.ndarray
    rotate: np.ndarray
    scale: np.ndarray
    keys: tuple = ()


@dataclass(frozen=True, eq=False)
class Shot:
    name: str
    first_frame: int
    last_frame: int
    fps: float
    width: int
    height: int
    samples: int
    bounces: int
    seed: int
    sampler: str
    roulette: int
    camera: Camera
    environment: Environment
    materials: tuple
    objects: tuple
    scene: str | None = None  # shot-relative path of a glTF 2.0 scene file
    time_zero: float | None = None  # the frame that shows the scene file's time 0 (None: first frame)
    scene_light_scale: float = 1.0  # multiplies the intensity of the scene file's lights
    lights: tuple = ()
    denoise: bool = True  # [output] denoise: complete frames get a denoised layer
    layers: tuple = ()  # [output] layers: light-path layers kept (names of LAYERS)
    light_groups: bool = False  # [output] light_groups: a layer per light group
    scene_groups: dict = field(default_factory=dict)  # [output] groups: scene file's light or material → group
    id_mattes: tuple = ()  # [output] id_mattes: ID matte kinds kept (names of ID_MATTES)
    path: Path | None = None
    root: Path | None = None
    raw: dict = field(default_factory=dict, repr=False)

    def frames(self) -> range:
        return range(self.first_frame, self.last_frame + 1)

    def light_group_names(self) -> tuple[str, ...]:
        """Every light group an emitter of the shot names, sorted; group i's index is i + 1 and
        0 is the ungrouped emitters (`group_other`)."""
        names = {m.group for m in self.materials} | {li.group for li in self.lights}
        names |= {self.environment.group} | set(self.scene_groups.values())
        return tuple(sorted(n for n in names if n is not None))

    def group_index(self, name: str | None) -> int:
        """The light group's index (0 for None: ungrouped)."""
        return 0 if name is None else 1 + self.light_group_names().index(name)

    def scene_time(self, frame: float) -> float:
        """Seconds of scene-file animation time shown at (fractional) `frame`: (frame - zero) / fps,
        with zero = `time_zero` or the first frame."""
        zero = self.first_frame if self.time_zero is None else self.time_zero
        return (float(frame) - zero) / self.fps

    def files(self) -> list[str]:
        """Sorted shot-relative paths of every file the shot uses (meshes with their MTL files,
        textures and buffers; the environment map), which submitting sends."""
        out: set[str] = set()
        if self.scene is not None:
            out.update(asset_files(self.root, self.scene, "scene"))
        for o in self.objects:
            if o.mesh is not None:
                out.update(asset_files(self.root, o.mesh, f"object[{o.name}].mesh"))
        if self.environment.map is not None:
            out.update(asset_files(self.root, self.environment.map, "environment.map"))
        return sorted(out)

    def with_overrides(self, samples=None, frames=None, width=None, height=None,
                       denoise=None) -> "Shot":
        """A new validated Shot with these values replaced; frames: an int, (first, last) or a range."""
        raw = copy.deepcopy(self.raw)
        if denoise is not None:
            raw.setdefault("output", {})["denoise"] = denoise
        if samples is not None:
            raw.setdefault("sampling", {})["samples"] = samples
        if frames is not None:
            if isinstance(frames, range):
                frames = [frames.start, frames.stop - 1]
            raw["frames"] = frames if isinstance(frames, int) else list(frames)
        if width is not None:
            raw.setdefault("image", {})["width"] = width
        if height is not None:
            raw.setdefault("image", {})["height"] = height
        try:
            return parse_shot(raw, root=self.root, path=self.path)
        except ShotError as err:
            err.file = err.file or (None if self.path is None else str(self.path))
            raise


# ---------------------------------------------------------------------------------------------
# parsing

_POINT = vector("3 numbers [x, y, z] in scene units")
_FRAME = integer(f"a frame number between 0 and {MAX_FRAME}", 0, MAX_FRAME)
_FOV = number("degrees between 1 and 179", 1, 179)
_FOCUS = number("a focus distance > 0 in scene units", 0, lo_open=True)
_DEGREES = vector("3 angles [x, y, z] in degrees")


def _boolean(v, key):
    return v if isinstance(v, bool) else _fail(key, "true or false", v)


def _frames(v, key):
    if isinstance(v, list) and len(v) == 2:
        first, last = _FRAME(v[0], key), _FRAME(v[1], key)
        if first > last:
            _fail(key, "[first, last] with first <= last", v)
        return first, last
    if isinstance(v, int) and not isinstance(v, bool):
        return (_FRAME(v, key),) * 2
    _fail(key, f"a frame number (a still) or [first, last], frames between 0 and {MAX_FRAME}", v)


def _keys(t: _Table, allowed, read) -> tuple:
    """Read `[[<table>.key]]`: each with a frame, at least one channel, frames increasing."""
    keys, last = [], None
    for i, data in enumerate(t.array("key", f"an array of tables [[{t.path}.key]]"), 1):
        kt = _Table(data, f"{t.path}.key[{i}]", allowed)
        frame = kt.get("frame", _FRAME)
        if last is not None and frame <= last:
            _fail(kt.key("frame"), f"a frame after {last} (keys must be in increasing frame order)", frame)
        if len(data) < 2:
            _fail(kt.path, "a frame and at least one of " + ", ".join(sorted(allowed - {"frame"})), data)
        keys.append(read(kt, frame))
        last = frame
    return tuple(keys)


def _camera_name(v, key):
    if not (isinstance(v, str) and v.strip()):
        _fail(key, "the name of a camera node in the scene file", v)
    return v


def _camera(t: _Table, scene_file: bool = False) -> Camera:
    up_check = vector("3 numbers [x, y, z], the camera's up direction")

    def read_key(kt, frame):
        return CameraKey(frame, kt.get("position", _POINT, None), kt.get("target", _POINT, None),
                         kt.get("up", up_check, None), kt.get("fov", _FOV, None),
                         kt.get("focus", _FOCUS, None))

    scene_camera = t.get("scene_camera", _camera_name, None)
    if scene_camera is not None and not scene_file:
        _fail(t.key("scene_camera"), 'a shot with a scene file (scene = "assets/shot.glb") to take the camera from',
              scene_camera)
    # required without a scene camera (_MISSING: the one-line "the key is required" error)
    position = t.get("position", _POINT, _MISSING if scene_camera is None else _frozen([0, 0, 0]))
    target = t.get("target", _POINT, _MISSING if scene_camera is None else _frozen([0, 0, -1]))
    keys = _keys(t, {"frame", "position", "target", "up", "fov", "focus"}, read_key)
    auto = not t.has("focus") and all(k.focus is None for k in keys)
    distance = float(np.linalg.norm(target - position))
    cam = Camera(
        position=position, target=target, up=t.get("up", up_check, _frozen([0, 1, 0])),
        fov=t.get("fov", _FOV, 45.0),
        aperture=t.get("aperture", number("a lens radius >= 0 in scene units", 0), 0.0),
        focus=t.get("focus", _FOCUS, distance if distance > 0 else 1.0),
        shutter=t.get("shutter", number("an open fraction between 0 and 1", 0, 1), 0.5),
        keys=keys, auto_focus=auto, scene_camera=scene_camera,
    )
    if scene_camera is not None:
        if cam.aperture > 0 and not t.has("focus"):
            _fail(t.key("focus"), "a focus distance when a scene_camera has an aperture (glTF cameras carry "
                                  "none)", _MISSING)
        return cam  # placed by the scene's camera node (checked when the scene is read)
    for i, key in enumerate(keys or [None], 1):
        where = "camera" if key is None else f"camera.key[{i}]"
        when = "" if key is None else f" at frame {key.frame}"
        position, target, up, _, _ = camera_at(cam, 0.0 if key is None else key.frame)
        view = target - position
        if not np.linalg.norm(view) > 0:
            _fail(f"{where}.target", f"a target away from the camera position{when}", target.tolist())
        up_n = np.linalg.norm(up)
        sin = np.linalg.norm(np.cross(view, up)) / (np.linalg.norm(view) * up_n) if up_n > 0 else 0.0
        if sin < 1e-6:
            _fail(f"{where}.up", f"an up direction not parallel to the view direction "
                                 f"{np.round(view, 6).tolist()}{when}", up.tolist())
    return cam


def _environment(t: _Table, root) -> Environment:
    return Environment(
        color=t.get("color", vector("3 numbers >= 0 [r, g, b], radiance", 0), _frozen([0, 0, 0])),
        map=t.get("map", _asset(MAP_EXTENSIONS, root), None),
        strength=t.get("strength", number("a multiplier >= 0", 0), 1.0),
        rotate=t.get("rotate", number("degrees about +y"), 0.0),
        group=t.get("group", _group_name, None),
    )


def _group_name(v, key):
    if isinstance(v, str) and _GROUP.fullmatch(v) and v != "other":
        return v
    _fail(key, 'a light group name of 1 to 40 letters, digits and _ (not "other", the name of '
               "the ungrouped emitters' layer)", v)


def _layer_list(v, key):
    if isinstance(v, list) and all(isinstance(x, str) and x in LAYERS for x in v) and len(set(v)) == len(v):
        return tuple(v)
    bad = [x for x in v if not (isinstance(x, str) and x in LAYERS)] if isinstance(v, list) else None
    _fail(key, f"a list of distinct layer names among {', '.join(LAYERS)}",
          bad[0] if bad else v)


def _matte_list(v, key):
    if isinstance(v, list) and all(isinstance(x, str) and x in ID_MATTES for x in v) and len(set(v)) == len(v):
        return tuple(v)
    bad = [x for x in v if not (isinstance(x, str) and x in ID_MATTES)] if isinstance(v, list) else None
    if isinstance(v, list) and not bad:
        _fail(key, f"a list of distinct ID matte kinds among {', '.join(ID_MATTES)}",
              _Text(f'"{next(x for x in v if v.count(x) > 1)}" twice'))
    _fail(key, f"a list of distinct ID matte kinds among {', '.join(ID_MATTES)}", bad[0] if bad else v)


def _scene_groups(v, key):
    if not isinstance(v, dict):
        _fail(key, 'a table of scene-file light or material names and their light groups '
                   '({ "Lamp" = "key" })', v)
    return {str(k): _group_name(g, f"{key}.{k}") for k, g in v.items()}


def _material(t: _Table, name: str) -> Material:
    kind = t.get("type", choice(MATERIAL_TYPES))
    for only_pbr in ("metallic", "transmission"):
        if kind != "pbr" and t.has(only_pbr):
            _fail(t.key(only_pbr), 'no such key for this type (it belongs to type = "pbr")', t.data[only_pbr])
    return Material(
        name=name, type=kind,
        color=t.get("color", vector("3 numbers between 0 and 1 [r, g, b]", 0, 1), _frozen([0.8] * 3)),
        roughness=t.get("roughness", number("a roughness between 0 and 1", 0, 1),
                        0.1 if kind == "plastic" else 0.0),
        ior=t.get("ior", number("an index of refraction between 1 and 4", 1, 4), 1.5),
        emission=t.get("emission", vector("a radiance >= 0: one number or [r, g, b]", 0, scalar=True),
                       _frozen([0, 0, 0])),
        metallic=t.get("metallic", number("a metalness between 0 and 1", 0, 1), 0.0),
        transmission=t.get("transmission", number("a transmission between 0 and 1", 0, 1), 0.0),
        group=t.get("group", _group_name, None),
    )


def _light(t: _Table, name: str) -> Light:
    kind = t.get("type", choice(LIGHT_TYPES))
    direction = _frozen([0, -1, 0])
    if kind != "directional" or t.has("position"):
        position = t.get("position", _POINT)
    else:
        position = _frozen([0, 0, 0])
    if kind != "point":
        aim = vector("3 numbers [x, y, z], the direction the light shines, not all zero")
        if t.has("direction") == t.has("target"):
            _fail(t.path, "exactly one of direction = [x, y, z] or target = [x, y, z]",
                  _Text("both" if t.has("direction") else "neither"))
        d = t.get("direction", aim) if t.has("direction") else t.get("target", _POINT) - position
        norm = float(np.linalg.norm(d))
        if not norm > 0:
            _fail(t.key("direction" if t.has("direction") else "target"),
                  "a direction that is not zero (a target away from the position)", d.tolist())
        direction = _frozen(d / norm)
    elif t.has("direction") or t.has("target"):
        key = "direction" if t.has("direction") else "target"
        _fail(t.key(key), 'no such key for a point light (it belongs to "spot" and "directional")', t.data[key])
    cone = number("an angle in degrees between 0 and 90", 0, 90)
    outer = t.get("outer_cone", cone, 45.0) if kind == "spot" else 45.0
    inner = t.get("inner_cone", cone, 0.0) if kind == "spot" else 0.0
    if kind != "spot":
        for k in ("inner_cone", "outer_cone"):
            if t.has(k):
                _fail(t.key(k), 'no such key for this light (it belongs to type = "spot")', t.data[k])
    if inner >= outer and kind == "spot":
        _fail(t.key("inner_cone"), f"an angle below outer_cone ({outer:g})", inner)
    return Light(
        name=name, type=kind, position=position, direction=direction,
        color=t.get("color", vector("3 numbers between 0 and 1 [r, g, b]", 0, 1), _frozen([1, 1, 1])),
        intensity=t.get("intensity", number("an intensity >= 0 in the shot's radiance units", 0), 1.0),
        inner_cone=math.radians(inner), outer_cone=math.radians(outer),
        group=t.get("group", _group_name, None),
    )


def _object(t: _Table, name: str, materials: dict, root) -> Object:
    if t.has("sphere") == t.has("mesh"):
        _fail(t.path, 'exactly one of sphere = {center, radius} or mesh = "path"',
              _Text("both" if t.has("sphere") else "neither"))
    material = t.get("material", choice(list(materials), "one of the materials") if materials
                     else _no_materials, None)
    sphere = mesh = None
    if t.has("sphere"):
        st = _Table(t.data["sphere"], t.key("sphere"), {"center", "radius"},
                    "an inline table {center = [x, y, z], radius = r}")
        sphere = Sphere(st.get("center", _POINT, _frozen([0, 0, 0])),
                        st.get("radius", number("a radius > 0 in scene units", 0, lo_open=True)))
        if material is None:
            _fail(t.key("material"), "the name of a [[material]] (spheres need one)", _MISSING)
        uniform = number("one number > 0 (a sphere scales uniformly)", 0, lo_open=True)

        def scale_check(v, key):
            return _frozen([uniform(v, key)] * 3)
    else:
        mesh = t.get("mesh", _asset(MESH_EXTENSIONS, root))
        scale_check = vector("a number > 0 or 3 numbers > 0 [x, y, z]", 0, lo_open=True, scalar=True)

    def read_key(kt, frame):
        return ObjectKey(frame, kt.get("translate", _POINT, None), kt.get("rotate", _DEGREES, None),
                         kt.get("scale", scale_check, None))

    return Object(
        name=name, material=material, sphere=sphere, mesh=mesh,
        translate=t.get("translate", _POINT, _frozen([0, 0, 0])),
        rotate=t.get("rotate", _DEGREES, _frozen([0, 0, 0])),
        scale=t.get("scale", scale_check, _frozen([1, 1, 1])),
        keys=_keys(t, {"frame", "translate", "rotate", "scale"}, read_key),
    )


def _no_materials(v, key):
    _fail(key, "the name of a [[material]], but the shot defines none", v)


def parse_shot(data: dict, root=None, path=None) -> Shot:
    """Validate a shot's TOML data (as tomllib returns it) into a Shot.

    root: folder that relative asset paths resolve against (files are checked to exist when it is
    given); path: the shot file, if any. Raises ShotError (AssetError for files).
    """
    top = _Table(data, "", {"name", "frames", "fps", "image", "sampling", "camera", "environment",
                            "material", "object", "light", "scene", "time_zero",
                            "scene_light_scale", "output"},
                 "a table of shot keys")
    scene = top.get("scene", _asset(SCENE_EXTENSIONS, root), None)
    name = top.get("name", lambda v, k: v if isinstance(v, str) and _NAME.fullmatch(v) else _fail(
        k, "a name of letters, digits and _ - . (not starting with . or -), at most 100 characters", v))
    first, last = top.get("frames", _frames)
    image = _Table(data.get("image", _MISSING), "image", {"width", "height"},
                   "a table [image] with width and height")
    size = integer(f"a size in pixels between 1 and {MAX_SIZE}", 1, MAX_SIZE)
    width, height = image.get("width", size), image.get("height", size)
    if width * height > MAX_PIXELS:
        _fail("image", f"width × height at most {MAX_PIXELS} pixels (100 megapixels)",
              _Text(f"{width} × {height} = {width * height}"))
    sampling = _Table(data.get("sampling", _MISSING), "sampling",
                      {"samples", "bounces", "seed", "sampler", "roulette"},
                      "a table [sampling] with samples")
    bounce = integer(f"a bounce count between 0 and {MAX_BOUNCES}", 0, MAX_BOUNCES)
    camera = _camera(_Table(data.get("camera", _MISSING), "camera", {
        "position", "target", "up", "fov", "aperture", "focus", "shutter", "key", "scene_camera"}),
        scene_file=scene is not None)
    environment = _environment(_Table(data.get("environment", {}), "environment",
                                      {"color", "map", "strength", "rotate", "group"}), root)

    output = _Table(data.get("output", {}), "output", {"denoise", "layers", "light_groups", "groups",
                                                     "id_mattes"},
                    "a table [output]")
    mat_data = top.array("material", "an array of tables ([[material]] blocks)")
    materials = tuple(_material(_Table(d, label, {"name", "type", "color", "roughness", "ior", "emission",
                                                  "metallic", "transmission", "group"}),
                                d["name"]) for d, label in zip(mat_data, _labels(mat_data, "material")))
    light_data = top.array("light", "an array of tables ([[light]] blocks)")
    lights = tuple(_light(_Table(d, label, {"name", "type", "position", "direction", "target", "color",
                                            "intensity", "inner_cone", "outer_cone", "group"}), d["name"])
                   for d, label in zip(light_data, _labels(light_data, "light")))
    known = {m.name: m for m in materials}
    obj_data = top.array("object", "an array of tables ([[object]] blocks)")
    objects = tuple(_object(_Table(d, label, {"name", "material", "sphere", "mesh", "translate", "rotate",
                                              "scale", "key"}), d["name"], known, root)
                    for d, label in zip(obj_data, _labels(obj_data, "object")))
    return Shot(
        name=name, first_frame=first, last_frame=last,
        fps=top.get("fps", number("frames per second > 0", 0, lo_open=True), 24.0),
        width=width, height=height,
        samples=sampling.get("samples", integer(f"samples per pixel between 1 and {MAX_SAMPLES}", 1,
                                                MAX_SAMPLES)),
        bounces=sampling.get("bounces", bounce, 8),
        seed=sampling.get("seed", integer("a seed between 0 and 4294967295", 0, 2**32 - 1), 1),
        sampler=sampling.get("sampler", choice(SAMPLERS), "sobol"),
        roulette=sampling.get("roulette", bounce, 3),
        camera=camera, environment=environment, materials=materials, objects=objects,
        scene=scene, lights=lights,
        denoise=output.get("denoise", _boolean, True),
        layers=output.get("layers", _layer_list, ()),
        light_groups=output.get("light_groups", _boolean, False),
        scene_groups=output.get("groups", _scene_groups, {}),
        id_mattes=output.get("id_mattes", _matte_list, ()),
        time_zero=top.get("time_zero", number("a frame number (may be negative or fractional)"), None),
        scene_light_scale=top.get("scene_light_scale", number("a multiplier >= 0", 0), 1.0),
        path=None if path is None else Path(path), root=None if root is None else Path(root),
        raw=copy.deepcopy(data),
    )


def _toml_error(exc: tomllib.TOMLDecodeError) -> ShotError:
    """One line `line L, column C: TOML syntax error: ...` from tomllib's message."""
    text = str(exc)
    m = re.search(r"\s*\(at line (\d+), column (\d+)\)$", text)
    if m:
        return ShotError(f"line {m[1]}, column {m[2]}", f"TOML syntax error: {text[:m.start()]}")
    m = re.search(r"\s*\(at end of document\)$", text)
    return ShotError("end of document" if m else "", f"TOML syntax error: {text[:m.start()] if m else text}")


def parse_shot_text(text: str, root=None, path=None) -> Shot:
    """Parse shot TOML text (for instance from a submitted scene's files); see parse_shot."""
    try:
        data = tomllib.loads(text)
        return parse_shot(data, root=root, path=path)
    except tomllib.TOMLDecodeError as exc:
        raise _toml_error(exc) from None
    except RecursionError:  # tables or arrays nested thousands deep: no shot key goes so deep
        raise ShotError("", "expected a shot file whose tables and arrays nest a few levels deep, "
                            "got nesting too deep to read") from None


def load_shot(path) -> Shot:
    """Read and validate the shot file at `path`; asset paths resolve against its folder.

    Errors carry `file=str(path)`, so their text starts with the file name.
    """
    path = Path(path)
    try:
        try:
            text = path.read_text(encoding="utf-8")
        except OSError as exc:
            raise ShotError("", f"cannot read the shot file: {exc.strerror or exc}") from None
        except UnicodeDecodeError as exc:
            raise ShotError("", f"expected a UTF-8 text file, got byte {exc.object[exc.start]:#04x} at "
                                f"offset {exc.start}") from None
        return parse_shot_text(text, root=path.resolve().parent, path=path)
    except ShotError as err:
        err.file = err.file or str(path)
        raise
