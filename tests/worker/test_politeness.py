"""The busy verdict from load samples (injected times), and the priority a worker takes."""

from __future__ import annotations

import subprocess
import sys

import pytest

from lampyr.worker.politeness import BusyWatch


def verdicts(samples, threshold=0.25, seconds=3.0):
    """Feed (t, load) samples one per second; the verdict after each."""
    w = BusyWatch(threshold, seconds)
    return [w.update(float(t), load) for t, load in enumerate(samples)]


@pytest.mark.parametrize("loads, expected", [
    # a quiet machine stays quiet
    ([0.0] * 6, [False] * 6),
    # busy only once watched for `seconds`, then as long as the mean stays above
    ([0.9] * 6, [False, False, False, True, True, True]),
    # a short burst does not pause: its mean over 3 s stays under the threshold
    ([0.0, 0.0, 0.0, 0.6, 0.0, 0.0, 0.0], [False] * 7),
    # busy, then quiet: resumes once the mean of the last 3 s (samples t-2, t-1, t) falls to the
    # threshold — at t=5 it is still (0.9 + 0 + 0) / 3 = 0.3
    ([0.9, 0.9, 0.9, 0.9, 0.0, 0.0, 0.0, 0.0], [False, False, False, True, True, True, False, False]),
])
def test_busy_means_the_mean_load_over_the_last_seconds_is_above_the_threshold(loads, expected):
    assert verdicts(loads) == expected


def test_busy_since_marks_when_the_pause_began():
    w = BusyWatch(0.25, 2.0)
    for t in range(5):
        w.update(float(t), 0.9)
    assert w.busy_since == 2.0


@pytest.mark.skipif(sys.platform == "win32", reason="nice values are POSIX")
def test_lowest_priority_is_nice_19_and_children_inherit_it():
    # nice 19 is the lowest priority of the POSIX range (setpriority(2), from memory)
    code = ("import os, subprocess, sys; from lampyr.worker.politeness import lower_priority; "
            "print(lower_priority()); "
            "print(subprocess.run([sys.executable, '-c', 'import os; print(os.nice(0))'], "
            "capture_output=True, text=True).stdout.strip())")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.stdout.split() == ["19", "19"], out.stderr


def test_the_load_meter_does_not_count_the_workers_own_processes():
    import os
    import time

    import psutil

    from lampyr.worker.politeness import LoadMeter, _machine_busy_seconds

    hog = subprocess.Popen([sys.executable, "-c", "while True: pass"])  # in this process's tree
    try:
        meter = LoadMeter(os.getpid())
        busy0, total0 = _machine_busy_seconds()
        time.sleep(1.5)
        others = meter.sample()
        busy1, total1 = _machine_busy_seconds()
        machine = (busy1 - busy0) / (total1 - total0)
        hog_share = sum(psutil.Process(hog.pid).cpu_times()[:2]) / (total1 - total0)
    finally:
        hog.kill()
        hog.wait()
    # what the hog used (the very psutil counters, read independently) is taken off the
    # machine's load; sampled a moment apart, so within a few hundredths
    assert hog_share > 0.1  # enough that counting it would show
    assert others == pytest.approx(max(0.0, machine - hog_share), abs=0.05)
