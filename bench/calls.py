"""The cost of one call of a scene kernel, counted against borrowed (engine/borrowing.py).

    python bench/calls.py [--rays N]

numba adds and removes a reference count on every array a compiled function is given; the
compiled scene holds some 45 arrays. This bench compiles the same kernels twice in one run —
as plain `njit` (counting) and as `borrowing` does (no counts) — and calls each from a compiled
loop over the same random rays through the courtyard demo (examples/courtyard), one thread:
  * intersect_instance on the demo's glass ball (a sphere: the call is nearly all of the cost),
  * intersect_scene (the top level, which calls intersect_instance for each instance it enters),
  * env_radiance (a map lookup).
The renderer's own numbers (samples/s of the whole demo) are in bench/scenes.py, section 4.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import numpy as np
from numba import njit

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(Path(__file__).resolve().parent))
from tables import print_table  # noqa: E402  (bench/ is run as scripts, not a package)


def _compiled_pair(fn):
    """(counting, borrowing) fresh compiles of a kernel's Python source."""
    return njit(fn.py_func), njit(_nrt=False)(fn.py_func)


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rays", type=int, default=400_000)
    args = ap.parse_args(argv)
    import numba

    from lampyr.engine import lights, scene
    from lampyr.engine.render import FrameRenderer
    from lampyr.engine.shot import load_shot
    from lampyr.engine.wide_traversal import traversal_stack

    numba.set_num_threads(1)
    shot = load_shot(ROOT / "examples" / "courtyard" / "courtyard.toml")
    S = FrameRenderer(shot, 12).scene
    ball = int(np.flatnonzero(S.inst_kind == scene.KIND_SPHERE)[0])
    rng = np.random.default_rng(1)
    n = args.rays
    O = np.array(shot.camera.position, np.float64) + rng.normal(0.0, 0.3, (n, 3))
    D = rng.normal(size=(n, 3))
    D /= np.linalg.norm(D, axis=1)[:, None]

    rows = []
    for label, kernel in (("intersect_instance (the ball)", scene.intersect_instance),
                          ("intersect_scene", scene.intersect_scene),
                          ("env_radiance", lights.env_radiance)):
        times = []
        for compiled in _compiled_pair(kernel):
            if kernel is scene.intersect_instance:
                @njit
                def loop(S, O, D, k=compiled):
                    stack = traversal_stack()
                    hits = 0
                    for j in range(O.shape[0]):
                        t, tri, u, v = k(S, ball, O[j, 0], O[j, 1], O[j, 2], D[j, 0], D[j, 1], D[j, 2],
                                         math.inf, 0.5, stack)
                        hits += tri >= 0
                    return hits
            elif kernel is scene.intersect_scene:
                @njit
                def loop(S, O, D, k=compiled):
                    top = np.empty(64, np.int32)
                    stack = traversal_stack()
                    hits = 0
                    for j in range(O.shape[0]):
                        t, inst, tri, u, v = k(S, O[j, 0], O[j, 1], O[j, 2], D[j, 0], D[j, 1], D[j, 2],
                                               math.inf, 0.5, top, stack)
                        hits += inst >= 0
                    return hits
            else:
                @njit
                def loop(S, O, D, k=compiled):
                    acc = 0.0
                    for j in range(O.shape[0]):
                        r, g, b = k(S, D[j, 0], D[j, 1], D[j, 2])
                        acc += r + g + b
                    return acc
            first = loop(S, O[:16], D[:16])  # compile
            best = math.inf
            result = None
            for _ in range(3):
                t0 = time.process_time()
                result = loop(S, O, D)
                best = min(best, time.process_time() - t0)
            times.append((best, result))
            del first
        (tc, rc), (tb, rb) = times
        rows.append([label, f"{tc / n * 1e9:,.1f}", f"{tb / n * 1e9:,.1f}", f"{tc / tb:.1f}",
                     "yes" if rc == rb else "NO"])
    print_table(f"ns per call, one thread, {n:,} rays from the demo's camera ({len(S)} arrays in the scene)",
                ["kernel", "counting", "borrowing", "speed-up", "same results"], rows)


if __name__ == "__main__":
    main()
