"""BSDF cost per call: sample and eval of each legacy material type and of PBR materials (pbr.py),
single thread, one jitted loop per row. Prints a table; never run by the test suite.

    python bench/bsdf.py [--n 1000000]
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import numpy as np
from numba import njit

sys.path.insert(0, str(Path(__file__).resolve().parent))
from tables import print_table  # noqa: E402

from lampyr.engine.bsdf import DIFFUSE, GLASS, METAL, PLASTIC, bsdf_eval, bsdf_sample, material_row  # noqa: E402
from lampyr.engine.pbr import pbr_row  # noqa: E402


@njit(cache=True)
def _sample_loop(params, wox, woy, woz, u):
    acc = 0.0
    for k in range(u.shape[0]):
        r = bsdf_sample(params, wox, woy, woz, u[k, 0], u[k, 1], u[k, 2])
        acc += r[3]
    return acc


@njit(cache=True)
def _eval_loop(params, wox, woy, woz, wi):
    acc = 0.0
    for k in range(wi.shape[0]):
        acc += bsdf_eval(params, wox, woy, woz, wi[k, 0], wi[k, 1], wi[k, 2])[0]
    return acc


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000)
    n = ap.parse_args().n
    rng = np.random.default_rng(0)
    u = rng.random((n, 3))
    wi = rng.normal(size=(n, 3))
    wi /= np.linalg.norm(wi, axis=1, keepdims=True)
    wi[:, 2] = np.abs(wi[:, 2])
    c = 0.7
    wo = (math.sqrt(1 - c * c), 0.0, c)
    gold = (1.0, 0.78, 0.34)
    cases = [
        ("diffuse", material_row(DIFFUSE, gold)),
        ("metal r0.4", material_row(METAL, gold, 0.4)),
        ("plastic r0.4", material_row(PLASTIC, gold, 0.4)),
        ("glass r0.4", material_row(GLASS, gold, 0.4)),
        ("pbr dielectric r0.4", pbr_row(gold, 0.0, 0.4)),
        ("pbr metal r0.4", pbr_row(gold, 1.0, 0.4)),
        ("pbr clearcoat", pbr_row(gold, 0.3, 0.5, clearcoat=1.0, clearcoat_roughness=0.2)),
        ("pbr thin pane", pbr_row(gold, 0.0, 0.0, transmission=1.0)),
        ("pbr volume r0.4", pbr_row(gold, 0.0, 0.4, transmission=1.0, thickness=1.0)),
    ]
    rows = []
    for name, p in cases:
        _sample_loop(p, *wo, u[:10])  # compile / load outside the timing
        _eval_loop(p, *wo, wi[:10])
        t = time.perf_counter()
        _sample_loop(p, *wo, u)
        ts = time.perf_counter() - t
        t = time.perf_counter()
        _eval_loop(p, *wo, wi)
        te = time.perf_counter() - t
        rows.append([name, f"{ts / n * 1e9:.0f}", f"{te / n * 1e9:.0f}"])
    print_table(f"BSDF cost, {n} calls each, wo at cos 0.7, one thread", ["material", "sample ns", "eval ns"], rows)


if __name__ == "__main__":
    main()
