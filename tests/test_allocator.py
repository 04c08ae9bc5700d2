"""lampyr/allocator.py: large buffers reused instead of page-faulted in again at every use.

The behaviour checked is glibc's, as mallopt(3) documents it: above the mmap threshold a block is
mapped fresh (its pages fault in, zeroed, at first touch) and the heap's free top is handed back
above the trim threshold. Counted here with the kernel's own minor page-fault counter
(getrusage(2), ru_minflt), in a fresh process each time so the test's own heap does not count."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

# a tile's film encoded as the head encoded it when the thresholds were measured (a body joined
# from parts, then a copy with a checksum appended): two 688 KB buffers alive at once and freed
# at once, 200 times
_PROBE = """
import json, resource, sys
from lampyr.allocator import keep_large_blocks
tuned = keep_large_blocks() if sys.argv[1] == "tuned" else None
parts = [bytes(98304) for _ in range(7)]  # 688 KB in all, as a 64 x 64 tile's float64 sums
def encode():
    body = b"".join(parts)
    return body + b"crc!"
encode()
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for _ in range(200):
    encode()
print(json.dumps({"tuned": tuned,
                  "faults": resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before}))
"""


def _faults(mode: str) -> dict:
    out = subprocess.run([sys.executable, "-c", _PROBE, mode], capture_output=True, text=True,
                         check=True, timeout=60)
    return json.loads(out.stdout)


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's malloc: Linux only")
def test_keep_large_blocks_stops_a_tiles_buffers_from_faulting_in_again_at_every_use():
    plain, tuned = _faults("plain"), _faults("tuned")
    assert tuned["tuned"] is True  # mallopt accepted both thresholds
    # untuned: each encode maps 2 × 688 KB fresh, 336 pages of 4 KiB, so 200 encodes fault in
    # tens of thousands of pages; tuned: the heap keeps them, next to none fault
    assert plain["faults"] > 200 * 100, plain
    assert tuned["faults"] < 200, tuned


@pytest.mark.parametrize("platform", ["darwin", "win32"])
def test_keep_large_blocks_does_nothing_and_says_so_where_there_is_no_glibc(monkeypatch, platform):
    from lampyr import allocator

    monkeypatch.setattr(allocator.sys, "platform", platform)
    assert allocator.keep_large_blocks() is False
