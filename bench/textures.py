"""Texture benchmark: memory kept per texel, sharing one copy between pool processes, lookup
speed, and the accuracy of computed tangents. Prints tables; never asserts.

    python bench/textures.py [--count 40] [--size 1024] [--no-private] [--lookups 2000000]

Sections:
  1. memory: bytes kept per texel, and what `--count` textures of `--size`² take (the issue's
     case is 40 at 4096²: run with --size 4096, which writes a 2.7 GB file under the temp folder)
  2. sharing: two processes each holding the packed texels, either as a private copy (read into
     memory, as a process that decodes its own images does) or mapped from one file
     (`textures.shared_textures`); RSS, PSS, USS per process from /proc/<pid>/smaps (psutil)
  3. lookups per second of `tex_lookup`, one thread, random UVs, each wrap mode, sRGB on / off
  4. tangent accuracy: `vertex_tangents` against the analytic tangent fields of the tests' meshes,
     and against MikkTSpace (pymikktspace) when it is installed
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(Path(__file__).resolve().parent))
from tables import print_table  # noqa: E402  (bench/ is run as scripts, not a package)

GB = 1e9

CHILD = r"""
import sys, numpy as np
from lampyr.engine.textures import map_textures
mode, path = sys.argv[1], sys.argv[2]
if mode == "private":
    pixels = np.fromfile(path, np.uint8)
else:
    pixels, info = map_textures(path)
touched = int(pixels[::4096].sum())  # read one byte of every 4 KiB page
print("ready", touched, flush=True)
sys.stdin.readline()  # stay alive until the parent has measured
"""


def memory_rows(count: int, size: int) -> list[list]:
    from lampyr.engine.scene_data import Image
    from lampyr.engine.textures import pack_images

    small = [Image(f"t{i}", np.zeros((64, 64, 4), np.uint8)) for i in range(count)]
    pixels, info = pack_images(small)
    per_texel = pixels.nbytes / (count * 64 * 64)
    rows = []
    for n in sorted({size, 4096}):
        texels = count * n * n
        rows.append([f"{count} x {n}²", f"{per_texel:g}", f"{texels * per_texel / GB:.2f}",
                     f"{texels * 16 / GB:.2f}", f"{texels * 32 / GB:.2f}"])
    return rows


def sharing_rows(path: Path, modes) -> list[list]:
    import psutil

    rows = []
    for mode in modes:
        t0 = time.perf_counter()
        kids = [subprocess.Popen([sys.executable, "-c", CHILD, mode, str(path)], stdin=subprocess.PIPE,
                                 stdout=subprocess.PIPE, text=True) for _ in range(2)]
        for k in kids:
            k.stdout.readline()
        ready = time.perf_counter() - t0
        for i, k in enumerate(kids):
            mem = psutil.Process(k.pid).memory_full_info()
            rows.append([mode, i, f"{mem.rss / GB:.3f}", f"{mem.pss / GB:.3f}", f"{mem.uss / GB:.3f}",
                         f"{ready:.1f}"])
        for k in kids:
            k.stdin.write("\n")
            k.stdin.flush()
            k.wait()
    return rows


def lookup_rows(n: int) -> list[list]:
    from numba import njit

    from lampyr.engine.scene_data import WRAP_CLAMP, WRAP_MIRROR, WRAP_REPEAT, Image, TexRef
    from lampyr.engine.textures import pack_images, srgb_table, tex_lookup, texref_row

    @njit(cache=False)
    def many(pixels, info, refs, lut, ref, uv):
        acc = 0.0
        for k in range(uv.shape[0]):
            r, g, b, a = tex_lookup(pixels, info, refs, lut, ref, uv[k, 0], uv[k, 1])
            acc += r + g + b + a
        return acc

    rng = np.random.default_rng(0)
    img = Image("t", rng.integers(0, 256, (1024, 1024, 4), dtype=np.uint8))
    pixels, info = pack_images([img])
    uv = rng.uniform(-2, 2, (n, 2))
    lut = srgb_table()
    rows = []
    for name, mode in (("REPEAT", WRAP_REPEAT), ("CLAMP_TO_EDGE", WRAP_CLAMP), ("MIRRORED_REPEAT", WRAP_MIRROR)):
        for srgb in (True, False):
            ref = TexRef(0, wrap_s=mode, wrap_t=mode)
            refs = texref_row(ref, srgb).reshape(1, -1)
            many(pixels, info, refs, lut, 0, uv[:10])  # compile
            t0 = time.perf_counter()
            many(pixels, info, refs, lut, 0, uv)
            dt = time.perf_counter() - t0
            rows.append([name, "sRGB" if srgb else "linear", f"{n / dt / 1e6:.1f}", f"{dt / n * 1e9:.0f}"])
    return rows


def tangent_rows() -> list[list]:
    sys.path.insert(0, str(ROOT))
    from tests.engine.test_tangents import angle_deg, bumpy_sheet, gram_schmidt, skewed_sphere

    from lampyr.engine.tangents import vertex_tangents

    try:
        import mikktspace
    except ImportError:
        mikktspace = None
    rows = []
    meshes = [("sphere 16x32, sheared UVs", lambda: skewed_sphere(16, 32)),
              ("sphere 32x64, sheared UVs", lambda: skewed_sphere(32, 64)),
              ("sphere 64x128, sheared UVs", lambda: skewed_sphere(64, 128)),
              ("bumpy sheet 24², jittered, affine UVs", lambda: bumpy_sheet(24)),
              ("bumpy sheet 64², jittered, affine UVs", lambda: bumpy_sheet(64))]
    for name, make in meshes:
        pos, nrm, uv, faces, dpdu, dpdv, inner = make()
        t0 = time.perf_counter()
        t = vertex_tangents(pos, nrm, uv, faces)
        dt = time.perf_counter() - t0
        err = angle_deg(t[:, :3], gram_schmidt(dpdu, nrm))[inner]
        row = [name, len(faces), f"{dt * 1e3:.1f}", f"{err.max():.3f}", f"{err.mean():.4f}"]
        if mikktspace is not None:
            flipped = np.stack([uv[:, 0], 1.0 - uv[:, 1]], 1)
            ref = np.array(mikktspace.gen_default(
                faces.reshape(-1).astype(int).tolist(), pos.astype(np.float32).reshape(-1),
                nrm.astype(np.float32).reshape(-1), flipped.astype(np.float32).reshape(-1))).reshape(-1, 4)
            em = angle_deg(t[:, :3], ref[:, :3])[inner]
            ea = angle_deg(ref[:, :3], gram_schmidt(dpdu, nrm))[inner]
            row += [f"{em.max():.4f}", f"{em.mean():.5f}", f"{np.mean(t[inner, 3] == ref[inner, 3]):.4f}",
                    f"{ea.max():.3f}"]
        else:
            row += ["-"] * 4
        rows.append(row)
    return rows


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--count", type=int, default=40)
    ap.add_argument("--size", type=int, default=1024)
    ap.add_argument("--no-private", action="store_true", help="measure only the mapped file (saves memory)")
    ap.add_argument("--lookups", type=int, default=2_000_000)
    args = ap.parse_args()

    from lampyr.engine.textures import save_textures

    print_table("1. memory kept (8 bits per channel; float alternatives for comparison)",
                ["textures", "bytes/texel kept", "GB kept", "GB as float32 RGBA", "GB as float64 RGBA"],
                memory_rows(args.count, args.size))

    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "textures.rgba8"
        n = args.count * args.size * args.size * 4
        pixels = np.full(n, 7, np.uint8)  # the values do not matter, the pages do
        info = np.array([[i * args.size * args.size * 4, args.size, args.size, 0] for i in range(args.count)])
        t0 = time.perf_counter()
        save_textures(pixels, info, path)
        write_s = time.perf_counter() - t0
        del pixels
        modes = ["mapped"] if args.no_private else ["private", "mapped"]
        print_table(f"2. two processes holding {args.count} x {args.size}² ({n / GB:.2f} GB; file written in "
                    f"{write_s:.1f} s; psutil memory_full_info)",
                    ["kind", "process", "RSS GB", "PSS GB", "USS GB", "s until both ready"],
                    sharing_rows(path, modes))

    print_table("3. tex_lookup, bilinear, one thread, random UVs in [-2, 2)² (3/4 outside the image) over a 1024² texture",
                ["wrap", "decode", "M lookups/s", "ns/lookup"], lookup_rows(args.lookups))

    print_table("4. vertex_tangents: angle to the analytic tangent (off the pole rings) and to MikkTSpace",
                ["mesh", "triangles", "ms", "max ° analytic", "mean ° analytic", "max ° vs Mikk",
                 "mean ° vs Mikk", "w agrees", "Mikk max ° analytic"],
                tangent_rows())


if __name__ == "__main__":
    os.environ.setdefault("NUMBA_NUM_THREADS", "1")
    main()
