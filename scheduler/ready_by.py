"""Spending a night's samples: which sample counts every tile should reach by a ready-by time.

Pure functions of plain data, so the head (ready_by_keeper.py) and the farm simulation
(tests/scheduler/farmsim.py) run the same policy:

1. the first pass over the whole sequence always goes first (the planner orders it so);
2. if the remaining work fits in the forecast capacity, every tile goes to its full target;
3. if not, every tile is raised to the same level — the highest step of the job's sample ladder
   (first pass, then batch after batch) whose work fits — and what is left of the capacity goes,
   one batch at a time, to the tile whose predicted noise is highest then.

Noise is predicted with the Monte Carlo error law: the standard error of a mean of n
independent samples is σ/√n, so a tile measured at noise e with m samples has e·√(m/n) at n
(any textbook on Monte Carlo integration, e.g. Owen, "Monte Carlo theory, methods and
examples", ch. 2). Work is in pixel-samples, weighted by a tile's relative cost.
"""

from __future__ import annotations

import heapq
import math
import time
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import NamedTuple

from ..errors import UsageError


class TileState(NamedTuple):
    """One tile of one frame as the policy sees it.

    key: (frame, tile); pixels: its pixel count; held: samples held or already in flight;
    steps: the sample counts its batches end at, ascending, the last one its full target;
    noise: mean relative standard error measured at `noise_at` samples (None: not known yet);
    cost: relative cost of one of its pixel-samples (1.0: the farm's average).
    """

    key: tuple
    pixels: int
    held: int
    steps: tuple
    noise: float | None = None
    noise_at: int = 0
    cost: float = 1.0

    @property
    def target(self) -> int:
        return self.steps[-1] if self.steps else self.held


@dataclass
class NightPlan:
    """targets: key → samples per pixel the tile should reach; level: the uniform level every
    tile reaches; work: pixel-samples (cost-weighted) still to render for the targets."""

    targets: dict
    level: int
    feasible: bool
    work: float
    capacity: float
    spp_expected: float
    noise_expected: float | None
    full_spp: float = 0.0
    extra: dict = field(default_factory=dict)  # key → samples above `level` from the leftover

    def admits(self, key, first: int, count: int) -> bool:
        """True when the batch [first, first + count) of tile `key` is within its target."""
        return first + count <= self.targets.get(key, 0)


def predicted_noise(t: TileState, n: int) -> float | None:
    """σ/√n from a measurement `noise` at `noise_at` samples."""
    if t.noise is None or not math.isfinite(t.noise) or t.noise_at <= 0 or n <= 0:
        return None
    return t.noise * math.sqrt(t.noise_at / n)


def work_to(tiles, level_of) -> float:
    """Cost-weighted pixel-samples to bring every tile from `held` to `level_of(tile)`."""
    return sum(t.pixels * t.cost * max(0, level_of(t) - t.held) for t in tiles)


def _step_at_or_below(steps, level: int) -> int:
    best = 0
    for s in steps:
        if s <= level:
            best = s
    return best


def plan_night(tiles, capacity: float) -> NightPlan:
    """The targets that spend at most `capacity` pixel-samples best (see the module docstring).

    The first step of every tile (its first pass) is kept even when it does not fit: a whole,
    watchable sequence is worth more than a part of one at a better level.
    """
    tiles = list(tiles)
    pixels = sum(t.pixels for t in tiles) or 1
    full_spp = sum(t.pixels * t.target for t in tiles) / pixels
    full = work_to(tiles, lambda t: t.target)
    if full <= capacity:
        targets = {t.key: max(t.held, t.target) for t in tiles}
        return _finish(tiles, targets, min((t.target for t in tiles), default=0), True, full,
                       capacity, full_spp, {})
    first = min((t.steps[0] for t in tiles if t.steps), default=0)
    ladder = sorted({s for t in tiles for s in t.steps if s >= first})
    # the work to a level grows with the level: bisect for the highest one that fits
    lo, hi = 0, len(ladder) - 1
    level = first
    while lo <= hi:
        mid = (lo + hi) // 2
        if work_to(tiles, lambda t: _step_at_or_below(t.steps, ladder[mid])) <= capacity:
            level, lo = ladder[mid], mid + 1
        else:
            hi = mid - 1
    targets = {t.key: max(t.held, _step_at_or_below(t.steps, level)) for t in tiles}
    spent = work_to(tiles, lambda t: targets[t.key])
    extra = _spend_on_noise(tiles, targets, capacity - spent)
    return _finish(tiles, targets, level, False, work_to(tiles, lambda t: targets[t.key]),
                   capacity, full_spp, extra)


def _spend_on_noise(tiles, targets: dict, left: float) -> dict:
    """Greedy: give the next step to the tile with the highest predicted noise while its cost
    fits in `left`. A tile whose noise is unknown gets the mean known noise of one sample,
    σ₁ = e·√m, scaled to its own count. Changes `targets` in place; returns key → samples added."""
    ones = [t.noise * math.sqrt(t.noise_at) for t in tiles
            if predicted_noise(t, t.noise_at) is not None]
    sigma1 = sum(ones) / len(ones) if ones else 1.0

    def noise(t, n):
        e = predicted_noise(t, n)
        return e if e is not None else sigma1 / math.sqrt(max(n, 1))

    heap = [(-noise(t, targets[t.key]), t.key) for t in tiles]
    by_key = {t.key: t for t in tiles}
    heapq.heapify(heap)
    added: dict = {}
    while heap and left > 0:
        _, key = heapq.heappop(heap)
        t = by_key[key]
        now = targets[key]
        nxt = next((s for s in t.steps if s > now), None)
        if nxt is None:
            continue
        cost = t.pixels * t.cost * (nxt - now)
        if cost > left:
            continue  # a smaller tile may still fit
        left -= cost
        targets[key] = nxt
        added[key] = added.get(key, 0) + nxt - now
        heapq.heappush(heap, (-noise(t, nxt), key))
    return added


def _finish(tiles, targets, level, feasible, work, capacity, full_spp, extra) -> NightPlan:
    pixels = sum(t.pixels for t in tiles) or 1
    spp = sum(t.pixels * targets[t.key] for t in tiles) / pixels
    noises = [(t.pixels, predicted_noise(t, targets[t.key])) for t in tiles]
    noises = [(p, e) for p, e in noises if e is not None]
    noise = (sum(p * e for p, e in noises) / sum(p for p, _ in noises)) if noises else None
    return NightPlan(targets, int(level), bool(feasible), float(work), float(capacity),
                     float(spp), noise, float(full_spp), extra)


def reached(now: float, ready_by: float | None) -> bool:
    return ready_by is not None and now >= ready_by


def usable_until(ready_by: float, batch_pixel_samples: float, speed: float) -> float:
    """The end of the time the plan may count on: a batch still rendering when the ready-by time
    comes is lost, so the capacity is counted until one batch (at `speed`) before it."""
    return ready_by - (batch_pixel_samples / speed if speed > 0 else 0.0)


def night_forecast(tiles, fc, now: float, ready_by: float, batch_pixel_samples: float,
                   spent_before: float = 0.0, horizon: float = 36 * 3600.0):
    """(plan, forecast fields) for one job from a `forecast.Forecaster`-like `fc`.

    spent_before: pixel-samples of the capacity already taken (work of the jobs ahead, and
    this job's batches in flight, which `tiles` count as held)."""
    tiles = list(tiles)
    speed = fc.default_speed(now)
    cap = fc.capacity(now, usable_until(ready_by, batch_pixel_samples, speed))
    plan = plan_night(tiles, max(0.0, cap - spent_before))
    finish = fc.finish_time(now, spent_before + work_to(tiles, lambda t: t.target), horizon)
    fields = forecast_fields(plan, now, finish)
    fields["hosts"] = len(fc.hosts)
    fields["hosts_measured"] = sum(1 for h in fc.hosts if h.speed is not None)
    return plan, fields


def forecast_fields(plan: NightPlan, now: float, finish: float | None = None) -> dict:
    """The `forecast` object of a job's status (the web page and `status` read these names)."""
    return {
        "spp_expected": round(plan.spp_expected, 1),
        "spp_full": round(plan.full_spp, 1),
        "noise_expected": None if plan.noise_expected is None else round(plan.noise_expected, 5),
        "feasible": plan.feasible,
        "capacity_pixel_samples": round(plan.capacity),
        "work_pixel_samples": round(plan.work),
        "level": plan.level,
        "finish_expected": None if finish is None else round(finish, 1),
        "updated": round(now, 1),
    }


def parse_until(text: str, now: float | None = None) -> float:
    """`--until` → epoch seconds: "07:00" is the next time the local clock shows 07:00; an ISO
    date-time ("2026-12-03T07:00", local unless it names its offset) is taken as it is."""
    now = time.time() if now is None else now
    raw = (text or "").strip()
    try:
        if "T" in raw or "-" in raw or " " in raw:
            when = datetime.fromisoformat(raw)
            epoch = when.timestamp()  # a naive date-time is local time
        else:
            clock = datetime.strptime(raw, "%H:%M:%S" if raw.count(":") == 2 else "%H:%M").time()
            today = datetime.fromtimestamp(now).date()
            epoch = datetime.combine(today, clock).timestamp()
            if epoch <= now:
                epoch = datetime.combine(today + timedelta(days=1), clock).timestamp()
    except ValueError:
        raise UsageError(f"--until: expected a time like 07:00 or a date-time like "
                         f"2026-12-03T07:00, got {text!r}") from None
    if epoch <= now:
        raise UsageError(f"--until: {text} is in the past; expected a time still to come")
    return epoch


def _clock(epoch: float, now: float) -> str:
    when = datetime.fromtimestamp(epoch)
    if abs(epoch - now) < 20 * 3600:
        return when.strftime("%H:%M")
    return when.strftime("%Y-%m-%d %H:%M")


def ready_by_line(st: dict, now: float | None = None) -> str:
    """One readable line from a job status' `ready_by`, `ready_by_reached` and `forecast`:
    "ready by 07:00 — forecast 212 spp, noise 1.8 %, will finish about 05:40"."""
    now = time.time() if now is None else now
    head = f"ready by {_clock(st['ready_by'], now)}"
    fc = st.get("forecast")
    full = st.get("samples")
    if st.get("ready_by_reached"):
        tail = f"reached: stopped at {fc['spp_expected']:.0f} of {full} spp" if fc else "reached"
        return f"{head} {tail}"
    if st.get("state") == "done":
        return f"{head} — finished before it"
    if not fc:
        return f"{head} — no forecast yet"
    noise = ("" if fc.get("noise_expected") is None
             else f", noise {100 * fc['noise_expected']:.1f} %")
    if fc["feasible"]:
        at = fc.get("finish_expected")
        when = f" about {_clock(at, now)}" if at else ""
        return f"{head} — forecast {fc['spp_expected']:.0f} spp{noise}, will finish{when}"
    return (f"{head} — cannot finish: expect {fc['spp_expected']:.0f} of {full} spp{noise} "
            f"(every frame at {fc['level']} or more)")
