"""agent.allocator: freed capture-sized arrays stay in the process (counted in page faults, not timed)."""

from __future__ import annotations

import platform
import subprocess
import sys

import pytest

from tests.conftest import ROOT

# A child process allocates and frees the same 2 MB arrays (a capture's
# working set is a few dozen such) 50 times and prints the minor page
# faults of the last 40 rounds (getrusage ru_minflt, POSIX).
CHILD = r"""
import resource, sys
import numpy as np
if sys.argv[1] == "tuned":
    from agent.allocator import keep_freed_memory
    assert keep_freed_memory()
def rounds(k):
    for _ in range(k):
        a = [np.ones(262144) for _ in range(8)]  # 8 × 2 MiB of float64
        del a
rounds(10)
r0 = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
rounds(40)
print(resource.getrusage(resource.RUSAGE_SELF).ru_minflt - r0)
"""


def _faults(mode: str) -> int:
    env = {"PATH": "/usr/bin:/bin", "PYTHONPATH": str(ROOT)}
    out = subprocess.run([sys.executable, "-c", CHILD, mode], capture_output=True, text=True, env=env,
                         timeout=120, check=True)
    return int(out.stdout.strip())


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="the tuning is for glibc malloc")
def test_tuned_heap_keeps_freed_arrays():
    plain = _faults("plain")
    tuned = _faults("tuned")
    # untuned glibc serves each 2 MiB block by mmap and unmaps it on free: its 512 pages fault in
    # again every round (40 × 8 × 512 ≈ 164 000); tuned, the heap reuses the same pages
    assert plain > 40 * 8 * 256, plain
    assert tuned < 2000, tuned


def test_operator_environment_is_left_alone(monkeypatch):
    import agent.allocator as al

    monkeypatch.setattr(al, "_done", False)
    monkeypatch.setenv("MALLOC_MMAP_THRESHOLD_", "1048576")
    assert al.keep_freed_memory() is False
