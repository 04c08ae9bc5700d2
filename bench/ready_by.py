"""Ready by a time on the simulated farm: for nights of several lengths, what the forecast said early,
what it said last, and what the farm reached.

    python bench/ready_by.py [--seeds N]

The farm is tests/scheduler/farmsim.py (50 workers of different speeds on their own windows,
some leaving without notice, some joining unannounced; no rendering), running the head's own
planner, forecast and spending policy. Columns: the night's length; `fc@10%` the forecast spp at
a tenth of the night and whether it said feasible; `fc end` the last forecast; `reached` the
pixel-weighted mean spp at the ready-by time, the lowest and highest frame level; `done at` when the
whole job finished (a fraction of the night), or `-`.
"""

from __future__ import annotations

import argparse
import random
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from tests.scheduler.farmsim import FarmSim, SimJob, make_workers  # noqa: E402


def one(night: float, seed: int):
    workers = make_workers(50, random.Random(seed), 0.0, night)
    res = FarmSim(SimJob(), workers, 0.0, night, seed=seed).run()
    early = next(f for t, f in res.forecasts if t >= 0.1 * night)
    levels = {}
    for (f, _), n in res.held.items():
        levels[f] = min(levels.get(f, n), n)
    return {
        "early": early["spp_expected"], "early_ok": early["feasible"],
        "end": res.final_forecast()["spp_expected"],
        "reached": statistics.mean(res.held.values()),
        "lo": min(levels.values()), "hi": max(levels.values()),
        "done": None if res.finished_at is None else res.finished_at / night,
        "first_infeasible": res.first_infeasible(),
    }


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--seeds", type=int, default=3)
    args = ap.parse_args()
    job = SimJob()
    print(f"job: {job.frames} frames of {job.width}×{job.height}, {job.samples} spp, "
          f"tiles {job.tile} px, batches of {job.batch}; 50 workers")
    print(f"{'night h':>7} {'seed':>4} {'fc@10%':>12} {'fc end':>7} {'reached':>8} "
          f"{'frames lo-hi':>12} {'done at':>8} {'sim s':>6}")
    for hours in (0.25, 0.5, 0.75, 1.0, 1.25, 1.5, 2.0, 3.0):
        for seed in range(1, args.seeds + 1):
            t0 = time.perf_counter()
            r = one(hours * 3600, seed)
            took = time.perf_counter() - t0
            flag = "ok" if r["early_ok"] else "no"
            done = "-" if r["done"] is None else f"{r['done']:.2f}"
            print(f"{hours:7.2f} {seed:4d} {r['early']:8.1f} {flag:>3} {r['end']:7.1f} "
                  f"{r['reached']:8.1f} {r['lo']:>5}-{r['hi']:<6} {done:>8} {took:6.2f}")


if __name__ == "__main__":
    main()
