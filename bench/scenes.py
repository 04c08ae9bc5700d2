"""glTF scene benchmark (issue 11, "Performance"): prints tables, side by side in one run; never asserts.

    python bench/scenes.py [--small] [--only render|load|demo] [--repeats N] [--shot PATH]

Every scene is generated procedurally into a temporary folder with examples/gltf_builder.py and
loaded from its files, as a worker loads a shot (`compile_geometry`, then `compile_frame`).

Sections:
  1. samples/s of the same geometry (displaced spheres on a displaced ground, PBR materials, a sun
     and a sky) in several versions: flat (no normals, no UVs, factors only), smooth-shaded
     (vertex normals), textured (+ base colour and metallic-roughness textures), textured and
     normal-mapped (the issue's case), and that with one cut-out (alpha MASK) material, which
     turns every shadow ray into the layered `shadow_transmittance` loop. One thread and all
     cores; the ratio to the flat version, by wall time and by CPU time (on a shared machine the
     CPU seconds of this process are the steadier measure). The flat version's factors are the
     mean linear values of the textures, so paths end (Russian roulette) about as often in both.
  2. load on a worker: a torus of 1 M triangles in 10 primitives, 20 textures of 2048² (a base
     colour and a normal map per material), tangents computed (the file has none). compile_geometry
     from the .glb, split into reading (read_gltf), tangents, BVH builds, texture packing and the
     rest of assembling; then compile_frame.
  3. texture memory: bytes kept (geometry.tex_pixels.nbytes) against the 8-bit RGBA pixel count
     (sum of W·H·4 over the images); also the decoded images the geometry still holds in
     `geometry.scene.images`, the growth of this process's RSS over the loads, and what
     tracemalloc sees allocated after one more load and at its peak during it.
  4. the demo shot (examples/courtyard/courtyard.toml, or --shot) at its own size, samples and
     bounces, frame 12: one thread and all cores.
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "examples" / "courtyard" / "courtyard.toml"
sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(ROOT))
from tables import print_table  # noqa: E402  (bench/ is run as scripts, not a package)

from examples.gltf_builder import GltfBuilder, tex  # noqa: E402

THREAD_HEADER = ["version", "threads", "pixels x spp", "seconds", "k samples/s", "vs flat", "k samples/CPU-s",
                 "vs flat (CPU)"]


# ------------------------------------------------------------------------------------------------
# procedural geometry and images


def _vertex_normals(pos: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """Area-weighted vertex normals (sum of the faces' cross products, normalised)."""
    cross = np.cross(pos[faces[:, 1]] - pos[faces[:, 0]], pos[faces[:, 2]] - pos[faces[:, 0]])
    n = np.zeros_like(pos)
    for j in range(3):
        np.add.at(n, faces[:, j], cross)
    length = np.linalg.norm(n, axis=1, keepdims=True)
    return n / np.where(length > 0, length, 1.0)


def _grid_faces(rows: int, cols: int, wrap_cols: bool = False, wrap_rows: bool = False) -> np.ndarray:
    """Two triangles per quad of a rows x cols vertex grid (counter-clockwise seen from +normal
    for the parametrisations below); wrap_*: the last column / row joins the first."""
    i = np.arange(rows * cols).reshape(rows, cols)
    if wrap_cols:
        i = np.concatenate([i, i[:, :1]], axis=1)
    if wrap_rows:
        i = np.concatenate([i, i[:1]], axis=0)
    a, b, c, d = i[:-1, :-1], i[:-1, 1:], i[1:, 1:], i[1:, :-1]
    return np.stack([a, d, c, a, c, b], -1).reshape(-1, 3)


def displaced_sphere(center, radius: float, n_lon: int, n_lat: int, seed: int):
    """(positions (V, 3), faces (F, 3), uv (V, 2)) of a lat-long sphere with a bumpy radius."""
    rng = np.random.default_rng(seed)
    lon = np.linspace(0.0, 2.0 * np.pi, n_lon, endpoint=False)
    lat = np.linspace(0.02, np.pi - 0.02, n_lat)  # no pole rows: no zero-area triangles
    th, ph = np.meshgrid(lat, lon, indexing="ij")
    k1, k2 = rng.integers(4, 9, 2)
    r = radius * (1.0 + 0.04 * np.sin(k1 * ph + rng.uniform(0, 6)) * np.sin(k2 * th))
    pos = np.stack([r * np.sin(th) * np.cos(ph), r * np.cos(th), -r * np.sin(th) * np.sin(ph)], -1)
    pos = pos.reshape(-1, 3) + np.asarray(center, float)
    uv = np.stack([ph / (2 * np.pi) * 4.0, th / np.pi * 2.0], -1).reshape(-1, 2)
    return pos, _grid_faces(n_lat, n_lon, wrap_cols=True), uv


def displaced_ground(size: float, n: int):
    """(positions, faces, uv) of an n x n grid over [-size, size]² at y ≈ 0 with gentle waves."""
    x, z = np.meshgrid(np.linspace(-size, size, n), np.linspace(-size, size, n))
    y = 0.03 * np.sin(3.1 * x) * np.cos(2.3 * z) + 0.015 * np.sin(11.0 * x + 7.0 * z)
    pos = np.stack([x, y, z], -1).reshape(-1, 3)
    uv = np.stack([x, z], -1).reshape(-1, 2) * 0.75
    return pos, _grid_faces(n, n), uv


def torus(n_major: int, n_minor: int, big: float = 2.0, small: float = 0.6):
    """(positions, faces, uv) of a closed torus grid: 2 · n_major · n_minor triangles."""
    a = np.linspace(0.0, 2 * np.pi, n_major, endpoint=False)
    b = np.linspace(0.0, 2 * np.pi, n_minor, endpoint=False)
    A, B = np.meshgrid(a, b, indexing="ij")
    r = small * (1.0 + 0.05 * np.sin(12 * A) * np.sin(8 * B))
    pos = np.stack([(big + r * np.cos(B)) * np.cos(A), r * np.sin(B), (big + r * np.cos(B)) * np.sin(A)], -1)
    uv = np.stack([A / (2 * np.pi) * 16.0, B / (2 * np.pi) * 4.0], -1)
    faces = _grid_faces(n_major, n_minor, wrap_cols=True, wrap_rows=True)[:, ::-1]  # outward
    return pos.reshape(-1, 3), np.ascontiguousarray(faces), uv.reshape(-1, 2)


def height_field(size: int, seed: int) -> np.ndarray:
    """(size, size) float64 in [0, 1]: smooth waves plus blocky noise, tiling over REPEAT."""
    rng = np.random.default_rng(seed)
    t = np.linspace(0.0, 2 * np.pi, size, endpoint=False)
    x, y = np.meshgrid(t, t)
    h = np.zeros((size, size))
    for _ in range(4):
        kx, ky = rng.integers(1, 9, 2)
        h += np.sin(kx * x + rng.uniform(0, 6)) * np.cos(ky * y + rng.uniform(0, 6))
    block = max(size // 64, 1)
    noise = rng.uniform(-1, 1, (size // block, size // block))
    h += 0.5 * np.kron(noise, np.ones((block, block)))[:size, :size]
    return (h - h.min()) / (h.max() - h.min())


def texture_set(size: int, seed: int, tint) -> dict:
    """Images (H, W, 4) uint8 of one material: base colour (sRGB), metallic-roughness, normal map."""
    h = height_field(size, seed)
    lo, hi = np.asarray(tint[0], float), np.asarray(tint[1], float)
    col = lo + (hi - lo) * h[..., None]  # linear colour
    srgb = np.where(col <= 0.0031308, 12.92 * col, 1.055 * col ** (1 / 2.4) - 0.055)  # IEC 61966-2-1 encode
    base = np.concatenate([srgb * 255.0, np.full((size, size, 1), 255.0)], -1)
    mr = np.stack([np.zeros_like(h), 0.35 + 0.5 * h, 0.2 * (h > 0.7), np.ones_like(h)], -1) * 255.0
    gy, gx = np.gradient(h * size / 16.0)
    n = np.stack([-gx, -gy, np.ones_like(h)], -1)
    n /= np.linalg.norm(n, axis=-1, keepdims=True)
    nrm = np.concatenate([(n * 0.5 + 0.5) * 255.0, np.full((size, size, 1), 255.0)], -1)
    return {k: np.clip(np.round(v), 0, 255).astype(np.uint8) for k, v in
            (("base", base), ("mr", mr), ("normal", nrm))}


def _srgb_decode(byte: np.ndarray) -> np.ndarray:
    c = byte / 255.0
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)  # IEC 61966-2-1


# ------------------------------------------------------------------------------------------------
# 1. flat vs textured

VERSIONS = ("flat", "smooth", "textured", "textured+normal map", "textured+normal map+cut-out")


def render_scene_parts(small: bool):
    """Meshes [(positions, faces, uv, material index)] and texture sets of the render scene."""
    n_lon, n_lat, n_ground = (64, 32, 60) if small else (256, 128, 200)
    meshes = [displaced_ground(4.0, n_ground) + (0,)]
    for i, (cx, cz, r) in enumerate(((-1.6, 0.2, 0.7), (0.0, -0.4, 0.9), (1.6, 0.3, 0.7), (0.6, 1.4, 0.45))):
        meshes.append(displaced_sphere((cx, r, cz), r, n_lon, n_lat, seed=i) + (1 + i % 3,))
    size = 128 if small else 1024
    sets = [texture_set(size, 10, ((0.25, 0.22, 0.2), (0.6, 0.55, 0.48))),  # flagstone
            texture_set(size, 11, ((0.6, 0.45, 0.2), (0.95, 0.8, 0.5))),  # brass
            texture_set(size, 12, ((0.1, 0.25, 0.2), (0.2, 0.5, 0.4))),  # glaze
            texture_set(size, 13, ((0.5, 0.1, 0.08), (0.8, 0.3, 0.2)))]  # clay
    return meshes, sets


MATERIALS = [  # name, metallic factor, roughness factor
    ("ground", 0.0, 1.0), ("brass", 1.0, 0.6), ("glaze", 0.0, 0.4), ("clay", 0.0, 1.0)]


def write_render_scene(folder: Path, version: str, meshes, sets) -> Path:
    """The render scene's .glb in one of VERSIONS (same positions and faces in all)."""
    b = GltfBuilder()
    smooth = version != "flat"
    textured = version.startswith("textured")
    mapped = "normal map" in version
    cutout = "cut-out" in version
    mats = []
    for (name, metallic, roughness), images in zip(MATERIALS, sets):
        base_lin = _srgb_decode(images["base"][..., :3].astype(float))
        mr = images["mr"].astype(float) / 255.0
        if textured:
            kw = dict(base_color=(1, 1, 1, 1), metallic=metallic, roughness=roughness,
                      base_color_tex=tex(b.add_texture(b.add_image(images["base"] if not (cutout and name == "ground")
                                                                    else _holes(images["base"])))),
                      metallic_roughness_tex=tex(b.add_texture(b.add_image(images["mr"]))))
            if mapped:
                kw["normal_tex"] = tex(b.add_texture(b.add_image(images["normal"])), scale=1.0)
            if cutout and name == "ground":
                kw.update(alpha_mode="MASK", alpha_cutoff=0.5)
        else:  # the textures' mean linear values as factors
            kw = dict(base_color=tuple(base_lin.reshape(-1, 3).mean(axis=0)) + (1.0,),
                      metallic=metallic * float(mr[..., 2].mean()), roughness=roughness * float(mr[..., 1].mean()))
        mats.append(b.add_material(name, **kw))
    for i, (pos, faces, uv, m) in enumerate(meshes):
        prim = b.primitive(pos, normals=_vertex_normals(pos, faces) if smooth else None,
                           uv0=uv if textured else None, indices=faces, material=mats[m])
        b.add_node(f"mesh{i}", mesh=b.add_mesh([prim]))
    return b.save(folder / f"{version.replace(' ', '_').replace('+', '_')}.glb")


def _holes(base: np.ndarray) -> np.ndarray:
    """The base colour with alpha 0 in a few small squares (about 1 % of the texels)."""
    out = base.copy()
    s = base.shape[0]
    step, hole = max(s // 8, 2), max(s // 80, 1)
    for y in range(step // 2, s, step):
        for x in range(step // 2, s, step):
            out[y:y + hole, x:x + hole, 3] = 0
    return out


def render_shot_text(glb: str, w: int, h: int, spp: int) -> str:
    return f"""
name = "bench"
frames = 1
scene = "{glb}"
[image]
width = {w}
height = {h}
[sampling]
samples = {spp}
bounces = 6
[camera]
position = [0.3, 2.2, 5.5]
target = [0.0, 0.5, 0.0]
fov = 45.0
[environment]
color = [0.45, 0.5, 0.6]
[[light]]
name = "sun"
type = "directional"
direction = [-0.4, -1.0, -0.3]
intensity = 3.0
"""


def thread_rates(renderers: dict, w: int, h: int, spp: int, repeats: int = 1) -> dict:
    """{name: {threads: (seconds, samples/s, samples per CPU-second)}} for the whole w x h image,
    one thread and all cores; the renderers take turns (so a change in the shared machine's load
    hits all alike) and each keeps its best of `repeats`. CPU seconds (time.process_time, all
    threads of this process) do not count the time other programs take the cores away."""
    import numba

    from lampyr.engine.render import Tile

    for r in renderers.values():
        r.render(Tile(0, 0, 4, 4), 0, 1)  # load the kernels first
    all_threads = numba.config.NUMBA_NUM_THREADS
    out = {name: {} for name in renderers}
    for _ in range(repeats):
        for threads in sorted({1, all_threads}):
            numba.set_num_threads(threads)
            for name, r in renderers.items():
                t0, c0 = time.perf_counter(), time.process_time()
                film = r.render(Tile(0, 0, w, h), 0, spp)
                dt, cpu = time.perf_counter() - t0, time.process_time() - c0
                n = film.n.sum()
                best = out[name].get(threads, (math.inf, 0.0, 0.0))
                out[name][threads] = (min(dt, best[0]), max(n / dt, best[1]), max(n / cpu, best[2]))
    numba.set_num_threads(all_threads)
    return out


def render_section(small: bool, versions, repeats: int) -> None:
    from lampyr.engine.compiler import compile_geometry
    from lampyr.engine.render import FrameRenderer
    from lampyr.engine.shot import load_shot

    w, h, spp = (64, 36, 4) if small else (192, 108, 32)
    meshes, sets = render_scene_parts(small)
    renderers, tris = {}, 0
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        for version in versions:
            glb = write_render_scene(folder, version, meshes, sets)
            shot_path = folder / f"{glb.stem}.toml"
            shot_path.write_text(render_shot_text(glb.name, w, h, spp))
            shot = load_shot(shot_path)
            geom = compile_geometry(shot)
            tris = geom.triangle_count
            renderers[version] = FrameRenderer(shot, 1, geom)
    rates = thread_rates(renderers, w, h, spp, repeats)
    rows = []
    first = next(iter(rates.values()))
    for threads in sorted(first):
        _, base, base_cpu = rates.get("flat", first)[threads]
        for version, by in rates.items():
            dt, rate, cpu_rate = by[threads]
            rows.append([version, threads, f"{w}x{h}x{spp}", f"{dt:.2f}", f"{rate / 1e3:,.1f}", f"{rate / base:.2f}",
                         f"{cpu_rate / 1e3:,.1f}", f"{cpu_rate / base_cpu:.2f}"])
    size = sets[0]["base"].shape[0]
    print_table(f"1. samples/s, flat vs textured ({tris:,} triangles, 4 PBR materials, textures {size}², "
                f"sun + sky, 6 bounces; best of {repeats}, versions taking turns)", THREAD_HEADER, rows)


# ------------------------------------------------------------------------------------------------
# 2-3. loading a big scene


def write_big_scene(folder: Path, small: bool) -> tuple[Path, int]:
    """The 1 M-triangle torus (10 primitives sharing one vertex set) with 20 textures of 2048²."""
    n_major, n_minor, size, n_mats = (200, 50, 256, 10) if small else (1000, 500, 2048, 10)
    pos, faces, uv = torus(n_major, n_minor)
    b = GltfBuilder()
    mats = []
    for k in range(n_mats):
        images = texture_set(size, 100 + k, ((0.2, 0.2, 0.2), (0.4 + 0.05 * k, 0.5, 0.6)))
        mats.append(b.add_material(f"m{k}", roughness=0.7,
                                   base_color_tex=tex(b.add_texture(b.add_image(images["base"][..., :3]))),
                                   normal_tex=tex(b.add_texture(b.add_image(images["normal"][..., :3])))))
    parts = np.array_split(faces, n_mats)
    first = b.primitive(pos, normals=_vertex_normals(pos, faces), uv0=uv, indices=parts[0], material=mats[0])
    prims = [first]
    for k, part in enumerate(parts[1:], start=1):
        prims.append(dict(first, indices=b.add_accessor(part.ravel(), 5125, "SCALAR"), material=mats[k]))
    b.add_node("torus", mesh=b.add_mesh(prims))
    path = b.save(folder / "big.glb")
    (folder / "big.toml").write_text(render_shot_text(path.name, 64, 36, 1))
    return folder / "big.toml", len(faces)


class _Timers:
    """Wraps engine functions in their modules' namespaces and adds up the seconds spent in them."""

    def __init__(self):
        self.seconds: dict[str, float] = {}
        self._undo = []

    def wrap(self, owner, attr: str, label: str) -> None:
        fn = getattr(owner, attr)

        def timed(*args, **kwargs):
            t0 = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                self.seconds[label] = self.seconds.get(label, 0.0) + time.perf_counter() - t0

        setattr(owner, attr, timed)
        self._undo.append((owner, attr, fn))

    def restore(self) -> None:
        for owner, attr, fn in reversed(self._undo):
            setattr(owner, attr, fn)
        self._undo.clear()


def load_section(small: bool, repeats: int) -> None:
    import psutil

    import lampyr.engine.compiler as compiler
    import lampyr.engine.mesh_table as mesh_table
    import lampyr.engine.scene_import as scene_import
    from lampyr.engine.render import warm_up
    from lampyr.engine.shot import load_shot

    warm_up()  # a worker loads its kernels at start-up
    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        shot_path, n_tris = write_big_scene(Path(tmp), small)
        written = time.perf_counter() - t0
        glb_mb = (Path(tmp) / "big.glb").stat().st_size / 1e6
        shot = load_shot(shot_path)
        rows, geom = [], None
        rss_before = psutil.Process().memory_info().rss
        for run in range(repeats):
            geom = None  # let the previous geometry go before loading again
            timers = _Timers()
            timers.wrap(compiler, "read_shot_files", "read")
            timers.wrap(scene_import, "vertex_tangents", "tangents")
            timers.wrap(mesh_table, "build_bvh", "bvh")
            timers.wrap(scene_import, "pack_images", "pack")
            timers.wrap(mesh_table.MeshTableBuilder, "build", "concat")
            try:
                t0 = time.perf_counter()
                geom = compiler.compile_geometry(shot)
                total = time.perf_counter() - t0
            finally:
                timers.restore()
            s = timers.seconds
            rest = total - sum(s.values())
            t0 = time.perf_counter()
            compiler.compile_frame(shot, geom, 1)
            frame_s = time.perf_counter() - t0
            rss_after = psutil.Process().memory_info().rss
            rows.append([run + 1, f"{s.get('read', 0):.2f}", f"{s.get('tangents', 0):.2f}", f"{s.get('bvh', 0):.2f}",
                         f"{s.get('pack', 0):.2f}", f"{s.get('concat', 0):.2f}", f"{rest:.2f}", f"{total:.2f}",
                         f"{frame_s:.3f}"])
        info = geom.tex_info
        size = int(info[0, 1])
        print_table(f"2. load on a worker: {n_tris:,} triangles, {len(info)} textures of {size}² "
                    f"(.glb {glb_mb:.0f} MB, written in {written:.0f} s); seconds",
                    ["run", "read_gltf", "tangents", "BVH build", "texture packing", "mesh concat",
                     "rest of assembling", "compile_geometry", "compile_frame"], rows)
        pixels = int((info[:, 1] * info[:, 2] * 4).sum())
        kept = geom.tex_pixels.nbytes
        held = sum(im.rgba.nbytes for im in geom.scene.images)  # decoded images the geometry keeps too
        # one more, untimed load under tracemalloc (numpy reports its array buffers to it): the
        # bytes still allocated with the geometry alive, and the peak while loading
        import tracemalloc

        geom = None
        tracemalloc.start()
        geom = compiler.compile_geometry(shot)
        traced_now, traced_peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        print_table("3. texture memory (bytes; RSS from psutil: this process, after the timed loads; traced: "
                    "tracemalloc over one more load, everything it allocates, not only textures)",
                    ["images", "8-bit RGBA pixel count P (sum W·H·4)", "tex_pixels.nbytes", "kept / P",
                     "decoded images held by geometry.scene", "(both) / P", "RSS growth / P",
                     "traced after load / P", "traced peak during load / P"],
                    [[len(info), f"{pixels:,}", f"{kept:,}", f"{kept / pixels:.3f}", f"{held:,}",
                      f"{(kept + held) / pixels:.3f}", f"{(rss_after - rss_before) / pixels:.3f}",
                      f"{traced_now / pixels:.3f}", f"{traced_peak / pixels:.3f}"]])


# ------------------------------------------------------------------------------------------------
# 4. the demo shot


def demo_section(shot_path: Path, frame: int, repeats: int) -> None:
    from lampyr.engine.compiler import compile_geometry
    from lampyr.engine.render import FrameRenderer
    from lampyr.engine.shot import load_shot

    shot = load_shot(shot_path)
    t0 = time.perf_counter()
    geom = compile_geometry(shot)
    load_s = time.perf_counter() - t0
    by = thread_rates({"demo": FrameRenderer(shot, frame, geom)}, shot.width, shot.height, shot.samples,
                      repeats)["demo"]
    rows = []
    base = by[1][1]
    for threads, (dt, rate, cpu_rate) in by.items():
        rows.append([threads, f"{shot.width}x{shot.height}x{shot.samples}", f"{dt:.2f}", f"{rate / 1e3:,.1f}",
                     f"{rate / base:.2f}", f"{cpu_rate / 1e3:,.1f}"])
    print_table(f"4. {shot_path.name} frame {frame} at its own settings ({geom.triangle_count:,} triangles, "
                f"{len(geom.tex_info)} images, {shot.bounces} bounces; compile_geometry {load_s:.2f} s)",
                ["threads", "pixels x spp", "seconds", "k samples/s", "speed-up", "k samples/CPU-s"], rows)


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description="lampyr glTF scene benchmark")
    ap.add_argument("--small", action="store_true", help="quick, smaller sizes")
    ap.add_argument("--only", choices=["render", "load", "demo"], default=None)
    ap.add_argument("--versions", default=",".join(VERSIONS),
                    help="comma-separated subset of: " + ", ".join(VERSIONS))
    ap.add_argument("--repeats", type=int, default=2,
                    help="runs of each measurement (the best is kept); loads of the big scene")
    ap.add_argument("--shot", type=Path, default=DEMO, help="the demo shot of section 4")
    ap.add_argument("--frame", type=int, default=12)
    args = ap.parse_args(argv)
    versions = [v for v in VERSIONS if v in args.versions.split(",")]
    if args.only in (None, "render"):
        render_section(args.small, versions, args.repeats)
    if args.only in (None, "load"):
        load_section(args.small, args.repeats)
    if args.only in (None, "demo"):
        demo_section(args.shot, args.frame, args.repeats)


if __name__ == "__main__":
    main()
