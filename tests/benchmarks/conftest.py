"""Shared helpers of the benchmarks (fixtures: the benchmarks are not a package)."""

from __future__ import annotations

import subprocess
import sys

import pytest


def _child_peak_rss_mib(args: list[str]) -> tuple[int, float, float]:
    """Run ``args`` in a fresh interpreter that only waits for it; (exit code, seconds, peak resident MiB).

    The peak is that interpreter's RUSAGE_CHILDREN: the command's own, not the test process's.
    """
    code = (
        "import resource, subprocess, sys, time\n"
        "t = time.perf_counter()\n"
        f"rc = subprocess.run({args!r}).returncode\n"
        "print(rc, time.perf_counter() - t, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.split()
    return int(out[-3]), float(out[-2]), int(out[-1]) / 1024.0  # ru_maxrss is in KiB on Linux


@pytest.fixture
def child_peak_rss_mib():
    """:func:`_child_peak_rss_mib`: a command's exit code, seconds and peak resident memory (MiB)."""
    return _child_peak_rss_mib
