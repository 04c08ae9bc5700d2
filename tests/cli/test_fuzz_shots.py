"""A fuzz of the shot file and of every kind of file a shot uses, made from a fixed seed.

Each case is one folder: a shot file and its assets, one thing broken on purpose (or, for the
valid ones, one legal oddity). What is checked for every invalid case (docs/shot-file.md,
"Errors"; the project's rule for bad input): exit status 2, at most three lines on stderr,
no traceback, no hang, nothing started. Valid cases must pass the same check. Cases whose
mutation may or may not break the file ("either") must end in one of the two, never anything
else.

Most cases run in this process — through `check_shot_files` (what `lampyr render`, `lampyr submit`
and the page's upload run first) and through the command's own entry point (`lampyr.cli.main`)
with stderr captured — and a handful through a real `lampyr render` / `lampyr submit` process.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import random
import signal
import struct
import subprocess
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import OpenEXR
import pytest

from examples.gltf_builder import glb_bytes, png_bytes
from lampyr.errors import LampyrError

SEED = 20261202
N_SHOT_MUTATIONS = 260  # random broken shot files (the values a key must not take, syntax)
N_ASSET_MUTATIONS = 220  # random broken asset files
N_EITHER = 60  # random byte damage that may or may not break a file
CASE_SECONDS = 20  # longer than this is a hang

VALID_OBJ = (b"# a quad\nmtllib m.mtl\nv 0 0 0\nv 1 0 0\nv 1 1 0\nv 0 1 0\nvt 0 0\nvt 1 0\nvt 1 1\nvt 0 1\n"
             b"vn 0 0 1\nusemtl paint\nf 1/1/1 2/2/1 3/3/1\nf 1/1/1 3/3/1 4/4/1\n")
VALID_MTL = b"newmtl paint\nKd 0.6 0.5 0.4\nmap_Kd t.png\n"
VALID_PLY = (b"ply\nformat ascii 1.0\nelement vertex 3\nproperty float x\nproperty float y\nproperty float z\n"
             b"element face 1\nproperty list uchar int vertex_indices\nend_header\n0 0 0\n1 0 0\n0 1 0\n3 0 1 2\n")
VALID_STL = (b"solid t\nfacet normal 0 0 1\nouter loop\nvertex 0 0 0\nvertex 1 0 0\nvertex 0 1 0\nendloop\n"
             b"endfacet\nendsolid t\n")


def _gltf_document() -> tuple[dict, bytes]:
    """A one-triangle glTF 2.0 document and its buffer (glTF 2.0 spec, 3.6-3.7)."""
    positions = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0]], np.float32).tobytes()
    indices = np.array([0, 1, 2], np.uint16).tobytes() + b"\0\0"
    blob = positions + indices
    doc = {
        "asset": {"version": "2.0"}, "scene": 0, "scenes": [{"nodes": [0]}], "nodes": [{"mesh": 0}],
        "meshes": [{"primitives": [{"attributes": {"POSITION": 0}, "indices": 1}]}],
        "buffers": [{"byteLength": len(blob), "uri": "q.bin"}],
        "bufferViews": [{"buffer": 0, "byteOffset": 0, "byteLength": 36},
                        {"buffer": 0, "byteOffset": 36, "byteLength": 6}],
        "accessors": [{"bufferView": 0, "componentType": 5126, "count": 3, "type": "VEC3",
                       "min": [0, 0, 0], "max": [1, 1, 0]},
                      {"bufferView": 1, "componentType": 5123, "count": 3, "type": "SCALAR"}],
    }
    return doc, blob


def _exr(path: Path, channels: dict) -> bytes:
    header = {"compression": OpenEXR.ZIP_COMPRESSION, "type": OpenEXR.scanlineimage}
    with OpenEXR.File(header, {k: np.asarray(v, np.float32) for k, v in channels.items()}) as f:
        f.write(str(path))
    data = path.read_bytes()
    path.unlink()
    return data


SKY = np.ones((8, 16, 3))


def _base_files(tmp: Path) -> dict[str, bytes]:
    doc, blob = _gltf_document()
    glb_doc = json.loads(json.dumps(doc))
    del glb_doc["buffers"][0]["uri"]
    return {
        "a/m.obj": VALID_OBJ, "a/m.mtl": VALID_MTL, "a/t.png": png_bytes(np.full((2, 2, 4), 180, np.uint8)),
        "a/m.ply": VALID_PLY, "a/m.stl": VALID_STL,
        "a/q.gltf": json.dumps(doc).encode(), "a/q.bin": blob, "a/q.glb": glb_bytes(glb_doc, blob),
        "a/sky.exr": _exr(tmp / "_sky.exr", {"RGB": SKY}),
    }


MESHES = ["a/m.obj", "a/m.ply", "a/m.stl", "a/q.gltf", "a/q.glb"]


def shot_text(mesh: str | None = "a/m.obj", sky: bool = False, extra: str = "", **values) -> str:
    """The base shot, with top-level keys first and [camera] last (so a cut anywhere before its
    end leaves a required key missing or a syntax error). values: replace `key = value` lines."""
    lines = {
        "name": '"fuzz"', "frames": "[1, 2]", "fps": "24",
        "image.width": "8", "image.height": "6",
        "sampling.samples": "2", "sampling.bounces": "3", "sampling.seed": "7", "sampling.sampler": '"sobol"',
        "camera.position": "[0.0, 1.0, 4.0]", "camera.target": "[0.0, 0.5, 0.0]", "camera.fov": "40.0",
        "camera.aperture": "0.0", "camera.shutter": "0.5",
        "material.type": '"diffuse"', "material.color": "[0.7, 0.7, 0.7]", "material.roughness": "0.5",
        "object.material": '"white"', "object.radius": "1.0", "environment.color": "[0.1, 0.1, 0.1]",
    }
    lines.update(values)
    v = lines.get
    text = [f"name = {v('name')}", f"frames = {v('frames')}", f"fps = {v('fps')}", extra]
    text += ["[environment]", f"color = {v('environment.color')}"] + (['map = "a/sky.exr"'] if sky else [])
    text += ["[[material]]", 'name = "white"', f"type = {v('material.type')}", f"color = {v('material.color')}",
             f"roughness = {v('material.roughness')}"]
    text += ["[[object]]", 'name = "ball"', f"material = {v('object.material')}",
             f"sphere = {{ center = [0.0, 0.5, 0.0], radius = {v('object.radius')} }}"]
    if mesh is not None:
        text += ["[[object]]", 'name = "part"', f"mesh = {json.dumps(mesh)}"]
    text += ["[image]", f"width = {v('image.width')}", f"height = {v('image.height')}"]
    text += ["[sampling]", f"samples = {v('sampling.samples')}", f"bounces = {v('sampling.bounces')}",
             f"seed = {v('sampling.seed')}", f"sampler = {v('sampling.sampler')}"]
    text += ["[camera]", f"position = {v('camera.position')}", f"target = {v('camera.target')}",
             f"fov = {v('camera.fov')}", f"aperture = {v('camera.aperture')}", f"shutter = {v('camera.shutter')}"]
    return "\n".join(t for t in text if t) + "\n"


# values each key must refuse (docs/shot-file.md, the tables of keys and their limits)
BAD_VALUES = {
    "name": ['""', '"../x"', '".hidden"', '"-x"', '"' + "a" * 101 + '"', "5", "true", '"a b"'],
    "frames": ["-1", "10000", "[5, 1]", '"1"', "[1, 2, 3]", "nan", "1.5", "[]"],
    "fps": ["0", "-1", "nan", "inf", '"24"', "false"],
    "image.width": ["0", "16385", "-3", "1.5", '"8"', "true", "[8]"],
    "image.height": ["0", "16385", "-1", "nan"],
    "sampling.samples": ["0", "1048577", '"1"', "nan", "-4", "2.5"],
    "sampling.bounces": ["-1", "129", "1e3"],
    "sampling.seed": ["-1", "4294967296", '"7"'],
    "sampling.sampler": ['"halton"', "1", '""'],
    "camera.position": ["[0.0, 0.0]", "[nan, 0.0, 0.0]", '"here"', "[0, 0, 0, 0]", "[true, 0, 0]",
                        "[inf, 0, 0]", "[0.0, 0.5, 0.0]"],  # the last equals the target
    "camera.target": ["[1.0]", "[0.0, -inf, 0.0]", "{ x = 1 }", "[0.0, 1.0, 4.0]"],  # the last: the position
    "camera.fov": ["0", "180", "nan", "-5", '"wide"', "179.5"],
    "camera.aperture": ["-1", "nan", "-inf"],
    "camera.shutter": ["1.5", "-0.1", "nan"],
    "material.type": ['"velvet"', "3", '""'],
    "material.color": ["[1.5, 0.0, 0.0]", "[-0.1, 0.0, 0.0]", "[0.5, 0.5]", "[nan, 0, 0]", '"red"'],
    "material.roughness": ["-1", "2", "nan"],
    "object.material": ['"crystal"', "7", '""'],
    "object.radius": ["-1", "0", "nan", "inf", '"big"'],
    "environment.color": ["[nan, 0, 0]", "[0, 0]", "[-1, 0, 0]", '"dusk"'],
}
BAD_PATHS = ['"../a/m.obj"', '"/etc/hosts.obj"', '"a\\\\m.obj"', '"a/missing.obj"', '"a/m.txt"', '""',
             '"a"', '"C:/m.obj"', "3", '"a/./../../m.obj"']
UNKNOWN = ["colour = 1", "[output]\ndenoise = 3", "[image]\ndepth = 3", "[[object]]\nname = \"x\"",
           "[[material]]\nname = \"white\"\ntype = \"diffuse\""]


@dataclass
class Case:
    name: str
    expect: str  # "invalid", "valid" or "either"
    text: str = ""  # the shot file (bytes in raw when set)
    files: dict = field(default_factory=dict)  # changed or added assets
    raw: bytes | None = None
    links: dict = field(default_factory=dict)  # shot-relative link -> target ("OUT:" = outside)


def _damage(rng: random.Random, data: bytes, n: int) -> bytes:
    b = bytearray(data)
    for _ in range(n):
        i = rng.randrange(len(b))
        b[i] = rng.randrange(256)
    return bytes(b)


def _shot_mutations(rng: random.Random) -> list[Case]:
    cases = []
    keys = sorted(BAD_VALUES)
    for i in range(N_SHOT_MUTATIONS):
        kind = rng.choice(["value", "value", "value", "path", "unknown", "cut", "missing", "bytes", "nest"])
        if kind == "value":
            key = rng.choice(keys)
            value = rng.choice(BAD_VALUES[key])
            cases.append(Case(f"{i}-value-{key}={value[:20]}", "invalid", shot_text(**{key: value})))
        elif kind == "path":
            where = rng.choice(["mesh", "map", "scene"])
            path = rng.choice(BAD_PATHS)
            if where == "mesh":
                text = shot_text(mesh=None) + f'[[object]]\nname = "bad"\nmesh = {path}\n'
                text = _before_tables(text, "")
            elif where == "map":
                text = shot_text(mesh=None).replace("[environment]\n", f"[environment]\nmap = {path}\n")
            else:
                text = _before_tables(shot_text(), f"scene = {path}")
            cases.append(Case(f"{i}-path-{where}={path}", "invalid", text))
        elif kind == "unknown":
            cases.append(Case(f"{i}-unknown", "invalid", _before_tables(shot_text(), "") + rng.choice(UNKNOWN) + "\n"))
        elif kind == "cut":
            text = shot_text()
            end = text.index("target = ") + len("target = [0.0, 0.5")
            cases.append(Case(f"{i}-cut", "invalid", text[:rng.randrange(end)]))
        elif kind == "missing":
            text = shot_text().splitlines()
            required = [k for k, line in enumerate(text)
                        if line.split(" =")[0] in ("name", "frames", "width", "height", "samples", "position",
                                                   "target")
                        or line in ("[image]", "[sampling]", "[camera]")]
            k = rng.choice(required)
            cut = text[:k] + text[k + 1:]
            if text[k].startswith("["):  # a whole table: its keys go too
                stop = next((j for j in range(k + 1, len(text)) if text[j].startswith("[")), len(text))
                cut = text[:k] + text[stop:]
            cases.append(Case(f"{i}-missing-{text[k]}", "invalid", "\n".join(cut) + "\n"))
        elif kind == "bytes":
            raw = shot_text().encode()
            pos = rng.randrange(len(raw))
            raw = raw[:pos] + bytes([rng.choice([0xff, 0xfe, 0xc3, 0x80, 0xe9])]) + raw[pos:]
            cases.append(Case(f"{i}-not-utf8", "invalid", raw=raw))
        else:
            depth = rng.choice([1200, 5000, 20000])
            opener, closer = rng.choice([("[", "]"), ("{a = ", "}")])
            inner = "1" if opener != "[" else ""
            text = _before_tables(shot_text(), f"deep = {opener * depth}{inner}{closer * depth}")
            cases.append(Case(f"{i}-nested-{depth}", "invalid", text))
    return cases


def _before_tables(text: str, line: str) -> str:
    """`line` added among the top-level keys (before the first table)."""
    head, sep, tail = text.partition("[environment]")
    return head + (line + "\n" if line else "") + sep + tail


def _obj_mutations(rng: random.Random) -> list[tuple[str, bytes, dict]]:
    """(label, OBJ bytes, other changed files): each one broken."""
    faces = b"f 1 2 3\n"
    coord = lambda: rng.choice([b"nan", b"inf", b"-inf", b"NaN"])  # noqa: E731
    return [
        ("empty", b"", {}),
        ("random bytes", bytes(rng.randrange(256) for _ in range(rng.randrange(1, 400))), {}),
        ("non-finite", b"v 0 0 0\nv 1 %s 0\nv 0 1 0\n" % coord() + faces, {}),
        ("index past the end", b"v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 %d\n" % rng.randrange(4, 10**6), {}),
        ("no faces", b"v 0 0 0\nv 1 0 0\nv 0 1 0\n", {}),
        ("collinear", b"v 0 0 0\nv %d 0 0\nv %d 0 0\n" % (rng.randrange(1, 9), rng.randrange(10, 99)) + faces, {}),
        ("one point", b"v 1 1 1\n" + b"f 1 1 1\n", {}),
        ("mtllib outside", b"mtllib ../../%s.mtl\n" % rng.choice([b"x", b"lib/y", b"m"]) + VALID_OBJ, {}),
        ("map outside", VALID_OBJ, {"a/m.mtl": b"newmtl paint\nmap_Kd ../../%s.png\n" % rng.choice([b"x", b"t"])}),
        ("map missing", VALID_OBJ, {"a/m.mtl": b"newmtl paint\nmap_Kd gone%d.png\n" % rng.randrange(99)}),
        ("map not an image", VALID_OBJ, {"a/t.png": bytes(rng.randrange(256) for _ in range(64))}),
        ("map absolute", VALID_OBJ, {"a/m.mtl": b"newmtl paint\nmap_Kd /tmp/t.png\n"}),
    ]


def _gltf_mutations(rng: random.Random, files: dict) -> list[tuple[str, str, bytes, dict]]:
    """(label, mesh path, its bytes, other changed files): each one broken."""
    doc, blob = _gltf_document()

    def changed(change) -> bytes:
        d = json.loads(json.dumps(doc))
        change(d)
        return json.dumps(d).encode()

    def set_(path, value):
        def change(d):
            *head, last = path
            for p in head:
                d = d[p]
            d[last] = value
        return change

    def drop(path):
        def change(d):
            *head, last = path
            for p in head:
                d = d[p]
            del d[last]
        return change

    glb = files["a/q.glb"]
    out = [
        ("top-level array", "a/q.gltf", json.dumps([doc]).encode(), {}),
        ("not json", "a/q.gltf", json.dumps(doc).encode()[: rng.randrange(1, 200)], {}),
        ("deep json", "a/q.gltf", b'{"asset": {"version": "2.0"}, "x": ' + b"[" * 50000 + b"]" * 50000 + b"}", {}),
        ("no asset", "a/q.gltf", changed(drop(["asset"])), {}),
        ("version 1", "a/q.gltf", changed(set_(["asset", "version"], "1.0")), {}),
        ("buffer outside", "a/q.gltf", changed(set_(["buffers", 0, "uri"], rng.choice(["../../q.bin", "../../../x"]))), {}),
        ("buffer absolute", "a/q.gltf", changed(set_(["buffers", 0, "uri"], "/etc/passwd")), {}),
        ("buffer missing", "a/q.gltf", changed(set_(["buffers", 0, "uri"], "gone.bin")), {}),
        ("buffer short", "a/q.gltf", doc and json.dumps(doc).encode(), {"a/q.bin": blob[: rng.randrange(1, 40)]}),
        ("buffers not a list", "a/q.gltf", changed(set_(["buffers"], {"uri": "q.bin"})), {}),
        ("accessor past its view", "a/q.gltf", changed(set_(["accessors", 0, "count"], rng.randrange(4, 10**7))), {}),
        ("bad component type", "a/q.gltf", changed(set_(["accessors", 0, "componentType"], rng.choice([1, 5130, "x"]))), {}),
        ("index out of range", "a/q.gltf", changed(set_(["meshes", 0, "primitives", 0, "indices"], rng.randrange(2, 99))), {}),
        ("mode points", "a/q.gltf", changed(set_(["meshes", 0, "primitives", 0, "mode"], rng.choice([0, 1, 2, 3]))), {}),
        ("node loop", "a/q.gltf", changed(set_(["nodes"], [{"mesh": 0, "children": [0]}])), {}),
        ("required extension", "a/q.gltf", changed(set_(["extensionsRequired"], ["KHR_draco_mesh_compression"])), {}),
        ("glb truncated", "a/q.glb", glb[: rng.randrange(1, len(glb) - 1)], {}),
        ("glb version 1", "a/q.glb", glb[:4] + struct.pack("<I", 1) + glb[8:], {}),
        ("glb first chunk not json", "a/q.glb", glb[:16] + b"BIN\0" + glb[20:], {}),
        ("glb random", "a/q.glb", b"glTF" + bytes(rng.randrange(256) for _ in range(rng.randrange(0, 64))), {}),
    ]
    return out


def _asset_mutations(rng: random.Random, files: dict) -> list[Case]:
    cases = []
    gltf = _gltf_mutations(rng, files)
    for i in range(N_ASSET_MUTATIONS):
        kind = rng.choice(["obj", "obj", "gltf", "gltf", "ply", "stl", "sky", "link"])
        if kind == "obj":
            label, data, more = rng.choice(_obj_mutations(rng))
            cases.append(Case(f"{i}-obj-{label}", "invalid", shot_text("a/m.obj"), {"a/m.obj": data, **more}))
        elif kind == "gltf":
            label, mesh, data, more = rng.choice(gltf)
            if rng.random() < 0.3 and mesh.endswith(".gltf"):  # the same file as the shot's scene
                text = _before_tables(shot_text(None), f'scene = "{mesh}"')
            else:
                text = shot_text(mesh)
            cases.append(Case(f"{i}-gltf-{label}", "invalid", text, {mesh: data, **more}))
        elif kind == "ply":
            data = rng.choice([
                VALID_PLY[: VALID_PLY.index(b"end_header")],  # the header never ends
                VALID_PLY.replace(b"element vertex 3", b"element vertex %d" % rng.randrange(4, 10**6)),
                b"ply\n" + bytes(rng.randrange(256) for _ in range(rng.randrange(1, 200))),
                VALID_PLY.replace(b"3 0 1 2", b"3 0 1 %d" % rng.randrange(3, 10**6)),
                VALID_PLY.replace(b"1 0 0\n", b"nan 0 0\n"),
                VALID_PLY.replace(b"element face 1", b"element face 0").replace(b"3 0 1 2\n", b""),
            ])
            cases.append(Case(f"{i}-ply", "invalid", shot_text("a/m.ply"), {"a/m.ply": data}))
        elif kind == "stl":
            count = rng.randrange(2, 1000)
            data = rng.choice([
                b"\0" * 80 + struct.pack("<I", count) + b"\0" * rng.randrange(0, 50),
                VALID_STL[: rng.randrange(1, VALID_STL.index(b"vertex 0 1 0"))],
                VALID_STL.replace(b"vertex 1 0 0", b"vertex 1 nan 0"),
                b"",
            ])
            cases.append(Case(f"{i}-stl", "invalid", shot_text("a/m.stl"), {"a/m.stl": data}))
        elif kind == "sky":
            tmp_rgb = SKY.copy()
            pick = rng.choice(["text", "png", "truncated", "negative", "nan", "inf", "no rgb", "empty"])
            if pick in ("negative", "nan", "inf"):
                tmp_rgb[rng.randrange(8), rng.randrange(16), rng.randrange(3)] = {
                    "negative": -rng.uniform(1e-3, 1e3), "nan": np.nan, "inf": np.inf}[pick]
            cases.append(Case(f"{i}-sky-{pick}", "invalid", shot_text(None, sky=True),
                              {"a/sky.exr": ("SKY", pick, tmp_rgb, rng.randrange(8, 200))}))
        else:
            what = rng.choice(["mesh file", "mesh folder", "texture", "buffer", "sky"])
            link = {"mesh file": ("a/m.obj", "OUT:m.obj"), "mesh folder": ("b", "OUT:"),
                    "texture": ("a/t.png", "OUT:t.png"), "buffer": ("a/q.bin", "OUT:q.bin"),
                    "sky": ("a/sky.exr", "OUT:sky.exr")}[what]
            mesh = {"mesh folder": "b/m.obj", "buffer": "a/q.gltf"}.get(what, "a/m.obj")
            cases.append(Case(f"{i}-link-{what}", "invalid", shot_text(mesh, sky=what == "sky"),
                              links={link[0]: link[1]}))
    return cases


def _valid_cases(rng: random.Random) -> list[Case]:
    cases = [Case(f"valid-{m}", "valid", shot_text(m)) for m in MESHES]
    cases += [
        Case("valid-scene", "valid", _before_tables(shot_text(None), 'scene = "a/q.gltf"')),
        Case("valid-sky", "valid", shot_text(None, sky=True)),
        Case("valid-nothing", "valid", shot_text(None).split("[[material]]")[0]
             + shot_text(None)[shot_text(None).index("[image]"):]),
        Case("valid-latin1", "valid", shot_text(), {"a/m.obj": b"# \xe9t\xe9, caf\xe9\n" + VALID_OBJ}),
        Case("valid-crlf", "valid", shot_text(), {"a/m.obj": VALID_OBJ.replace(b"\n", b"\r\n")}),
        Case("valid-1e308", "valid", shot_text(), {"a/m.obj": b"v 0 0 0\nv 1e308 0 0\nv 0 1 0\nf 1 2 3\n"}),
        Case("valid-link-inside", "valid", shot_text("b/m.obj"), links={"b": "IN:a"}),
    ]
    for i in range(40):  # legal values picked at random within each key's limits
        values = {"image.width": str(rng.randrange(1, 64)), "image.height": str(rng.randrange(1, 64)),
                  "camera.fov": f"{rng.uniform(1, 179):.3f}", "sampling.samples": str(rng.randrange(1, 9)),
                  "sampling.seed": str(rng.randrange(2**32)), "camera.shutter": f"{rng.random():.3f}",
                  "material.color": "[%.3f, %.3f, %.3f]" % (rng.random(), rng.random(), rng.random()),
                  "frames": str(rng.randrange(10000))}
        cases.append(Case(f"valid-values-{i}", "valid", shot_text(rng.choice(MESHES), **values)))
    return cases


def _either_cases(rng: random.Random, files: dict) -> list[Case]:
    """Random byte damage: the file may still be valid, or not."""
    cases = []
    for i in range(N_EITHER):
        target = rng.choice(["a/m.obj", "a/m.ply", "a/q.glb", "a/q.gltf", "a/sky.exr", "shot"])
        n = rng.randrange(1, 8)
        if target == "shot":
            raw = _damage(rng, shot_text().encode(), n)
            cases.append(Case(f"{i}-damaged-shot", "either", raw=raw))
            continue
        mesh = target if target not in ("a/sky.exr",) else None
        cases.append(Case(f"{i}-damaged-{target}", "either", shot_text(mesh, sky=mesh is None),
                          {target: _damage(rng, files[target], n)}))
    return cases


def all_cases(tmp: Path) -> tuple[list[Case], dict]:
    rng = random.Random(SEED)
    files = _base_files(tmp)
    cases = _shot_mutations(rng) + _asset_mutations(rng, files) + _valid_cases(rng) + _either_cases(rng, files)
    return cases, files


def build(case: Case, folder: Path, base: dict, outside: Path) -> Path:
    """Write the case into `folder`; returns the shot file."""
    files = dict(base)
    for rel, data in case.files.items():
        if isinstance(data, tuple):  # a sky map made here: ("SKY", kind, rgb, cut)
            _, pick, rgb, cut = data
            good = _exr(folder.parent / f"_{folder.name}.exr", {"RGB": SKY})
            data = {"text": b"a sky, in words", "png": png_bytes(np.zeros((2, 2, 4), np.uint8)),
                    "truncated": good[: min(cut, len(good) - 1)], "empty": b"",
                    "no rgb": _exr(folder.parent / f"_{folder.name}.exr", {"Y": rgb[..., 0]})}.get(pick)
            if data is None:
                data = _exr(folder.parent / f"_{folder.name}.exr", {"RGB": rgb})
        files[rel] = data
    for rel, data in files.items():
        (folder / rel).parent.mkdir(parents=True, exist_ok=True)
        (folder / rel).write_bytes(data)
    for rel, target in case.links.items():
        link = folder / rel
        if link.exists() or link.is_symlink():
            link.unlink()
        link.parent.mkdir(parents=True, exist_ok=True)
        if target.startswith("OUT:"):
            link.symlink_to(outside / target[4:] if target[4:] else outside)
        else:
            link.symlink_to(folder / target[3:])
    shot = folder / "fuzz.toml"
    shot.write_bytes(case.raw if case.raw is not None else case.text.encode())
    return shot


@contextlib.contextmanager
def deadline(seconds: float):
    """A hang becomes a failure (SIGALRM in this, the main, thread)."""
    def ring(signum, frame):
        raise TimeoutError(f"no answer within {seconds} s")

    old = signal.signal(signal.SIGALRM, ring)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)


def checked(shot: Path) -> tuple[str, str]:
    """("ok", "") or ("refused", the one line) from the check every entry point runs first; any
    other exception propagates (and fails the test)."""
    from lampyr.engine.compiler import check_shot_files
    from lampyr.engine.shot import load_shot

    try:
        check_shot_files(load_shot(shot))
    except LampyrError as err:
        assert err.exit_code == 2, str(err)
        return "refused", str(err)
    return "ok", ""


def cli_render(shot: Path, out: Path) -> tuple[int, str]:
    """`lampyr render SHOT --out OUT` through the command's entry point, in this process:
    (exit status, stderr). Only for shots the check refuses (a valid one would start a farm)."""
    from lampyr.cli import main

    err = io.StringIO()
    code = 0
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        try:
            main(["render", str(shot), "--out", str(out), "--quiet"])
        except SystemExit as stop:
            code = stop.code if isinstance(stop.code, int) else 1
    return code, err.getvalue()


@pytest.fixture(scope="module")
def fuzz_root(tmp_path_factory):
    root = tmp_path_factory.mktemp("fuzz")
    outside = root / "outside"  # files a link may lead to, outside every case's folder
    base = _base_files(root)
    for name in ("m.obj", "t.png", "q.bin", "sky.exr"):
        (outside / name).parent.mkdir(parents=True, exist_ok=True)
        (outside / name).write_bytes(base[f"a/{name}"])
    (outside / "m.mtl").write_bytes(VALID_MTL)
    return root, outside


def test_the_fuzz_is_deterministic(tmp_path):
    a, _ = all_cases(tmp_path)
    b, _ = all_cases(tmp_path)
    assert [(c.name, c.text, c.raw) for c in a] == [(c.name, c.text, c.raw) for c in b]


def test_every_fuzzed_shot_ends_in_one_line_or_passes(fuzz_root, capsys):
    root, outside = fuzz_root
    cases, base = all_cases(root)
    counts = {"valid": 0, "invalid": 0, "either": 0, "either refused": 0}
    problems = []
    for k, case in enumerate(cases):
        folder = root / f"case{k:04d}"
        shot = build(case, folder, base, outside)
        with deadline(CASE_SECONDS):
            outcome, line = checked(shot)
        counts[case.expect] += 1
        if case.expect == "valid" and outcome != "ok":
            problems.append(f"{case.name}: a valid shot was refused: {line}")
        elif case.expect == "invalid" and outcome != "refused":
            problems.append(f"{case.name}: an invalid shot passed the check")
        elif outcome == "refused":
            counts["either refused"] += case.expect == "either"
            if "\n" in line or not line.startswith(str(shot)):
                problems.append(f"{case.name}: not one line naming the shot file: {line!r}")
            with deadline(CASE_SECONDS):
                code, err = cli_render(shot, folder / "out")
            lines = err.strip().splitlines()
            if code != 2 or not 1 <= len(lines) <= 3 or "Traceback" in err:
                problems.append(f"{case.name}: lampyr render gave status {code} and {err!r}")
            if (folder / "out").exists():
                problems.append(f"{case.name}: lampyr render made its --out folder")
    with capsys.disabled():
        print(f"\nshot fuzz: {len(cases)} cases, {counts['valid']} valid, {counts['invalid']} invalid, "
              f"{counts['either']} damaged at random ({counts['either refused']} of them refused)")
    assert not problems, "\n".join(problems[:30])
    assert counts["invalid"] >= 400 and counts["valid"] >= 40


def lampyr(*args, **kw) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "lampyr.cli", *map(str, args)], capture_output=True,
                          text=True, timeout=120, **kw)


# a handful through real processes: one of each family
REAL = ["value-camera.fov", "nested", "obj-non-finite", "gltf-top-level array", "sky-", "link-mesh file"]


def _real_cases(root: Path) -> list[tuple[str, Path]]:
    cases, base = all_cases(root)
    picked = []
    for family in REAL:
        case = next((c for c in cases if family in c.name and c.expect == "invalid"), None)
        if case is not None:
            picked.append((family, build(case, root / f"real-{family.replace(' ', '_')}", base, root / "outside")))
    return picked


def test_a_handful_through_a_real_lampyr_render(fuzz_root):
    root, _ = fuzz_root
    picked = _real_cases(root)
    assert len(picked) >= 6
    for family, shot in picked:
        res = lampyr("render", shot, "--out", shot.parent / "out", "--quiet")
        lines = res.stderr.strip().splitlines()
        assert res.returncode == 2, (family, res.stderr)
        assert 1 <= len(lines) <= 3 and "Traceback" not in res.stderr, (family, res.stderr)
        assert not (shot.parent / "out").exists()


def test_a_handful_through_a_real_lampyr_submit_queue_nothing(fuzz_root, redis_url):
    import redis

    from lampyr.scheduler import protocol as P

    root, _ = fuzz_root
    r = redis.Redis.from_url(redis_url)
    r.set(P.K_PROTOCOL, P.PROTOCOL_VERSION)  # as a head sets it up
    before = set(r.keys())
    for family, shot in _real_cases(root)[:3]:
        res = lampyr("submit", shot, "--head", redis_url)
        lines = res.stderr.strip().splitlines()
        assert res.returncode == 2, (family, res.stderr)
        assert 1 <= len(lines) <= 3 and "Traceback" not in res.stderr, (family, res.stderr)
    assert set(r.keys()) == before  # nothing sent, nothing queued
