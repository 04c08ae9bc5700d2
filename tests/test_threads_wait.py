"""lampyr/__init__.py: numba's OpenMP threads sleep between parallel loops instead of spinning.

The behaviour is GNU libgomp's as the OpenMP API specification describes OMP_WAIT_POLICY: ACTIVE
(or unset, for libgomp a spin before sleeping) keeps waiting threads on their cores; PASSIVE
lets them sleep. Measured as CPU seconds per thread (psutil) over many short parallel loops
with serial work between them, in a fresh process each time."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

_PROBE = """
import json, sys, threading, time
if sys.argv[1] == "lampyr":
    import lampyr  # sets the wait policy unless the environment has one
import numba, numpy as np

@numba.njit(parallel=True)
def touch(a):
    for i in numba.prange(a.shape[0]):
        a[i] += 1.0

a = np.zeros(2)
try:
    touch(a)
except ValueError as err:  # numba: "No threading layer could be loaded" (no libgomp here)
    print(json.dumps({"layer": None, "error": str(err)}))
    sys.exit(0)
layer = numba.threading_layer()
import psutil
me = threading.get_native_id()
def by_thread():  # (the main thread's, the other threads') CPU seconds so far
    main = others = 0.0
    for t in psutil.Process().threads():
        if t.id == me:
            main += t.user_time + t.system_time
        else:
            others += t.user_time + t.system_time
    return main, others
m0, o0 = by_thread()
start = time.perf_counter()
for _ in range(400):
    touch(a)
    t = time.perf_counter()
    while time.perf_counter() - t < 0.001:  # 1 ms of serial work between parallel loops
        pass
wall = time.perf_counter() - start
m1, o1 = by_thread()
print(json.dumps({"layer": layer, "wall": wall, "main": m1 - m0, "others": o1 - o0}))
"""


def _run(mode: str, policy: str | None) -> dict:
    env = {k: v for k, v in os.environ.items() if k not in ("OMP_WAIT_POLICY", "GOMP_SPINCOUNT")}
    env.update(NUMBA_NUM_THREADS="2", NUMBA_THREADING_LAYER="omp")
    if policy:
        env["OMP_WAIT_POLICY"] = policy
    out = subprocess.run([sys.executable, "-c", _PROBE, mode], capture_output=True, text=True,
                         env=env, timeout=300, check=True)
    result = json.loads(out.stdout.strip().splitlines()[-1])
    if result["layer"] is None:  # only this; any other failure of the probe fails the test
        pytest.skip(f"numba's OpenMP layer is not available here: {result['error'][:300]}")
    return result


def test_importing_lampyr_sets_a_passive_wait_and_keeps_the_users_own():
    code = "import os, lampyr; print(os.environ['OMP_WAIT_POLICY'])"
    for given, expected in ((None, "PASSIVE"), ("ACTIVE", "ACTIVE")):
        env = {k: v for k, v in os.environ.items() if k != "OMP_WAIT_POLICY"}
        if given:
            env["OMP_WAIT_POLICY"] = given
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                             env=env, check=True, timeout=60)
        assert out.stdout.strip() == expected


@pytest.mark.skipif((os.cpu_count() or 1) < 2, reason="needs a second core to spin on")
def test_openmp_threads_sleep_between_parallel_loops_once_lampyr_is_imported():
    spinning = _run("plain", "ACTIVE")
    passive = _run("lampyr", None)
    assert spinning["layer"] == passive["layer"] == "omp"
    # ACTIVE: the second thread spins through the 400 ms of serial work, about one more core
    # second a wall second (measured here: 0.80 CPU s in 0.40 s, the same with the policy unset);
    # PASSIVE: it sleeps (0.41 CPU s in 0.42 s). A loaded machine takes cores from both threads
    # alike (a CI run at 0.93 wall s spun only 1.10 CPU s, and failed a judge of CPU against
    # wall), so the judge is the OpenMP thread's CPU against the main thread's (psutil, per
    # thread), which starving does not change (so no retrying of starved runs either). Measured
    # here, quiet: spinning 0.41 against
    # 0.41 s, sleeping 0.00 against 0.41 s; with two busy processes on both cores: spinning
    # 1.31 against 1.24 s, sleeping 0.00 against 0.42 s. Tolerances: rule of thumb.
    assert spinning["others"] > 0.5 * spinning["main"], spinning
    assert passive["others"] < 0.25 * passive["main"], passive
