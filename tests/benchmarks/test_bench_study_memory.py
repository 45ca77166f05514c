"""Peak memory of a study whose stacks are larger than its memory bound, measured side by side in one run.

Run: ``python3 -m pytest tests/benchmarks/test_bench_study_memory.py -m benchmark -s -p no:cacheprovider``.
A study of two acquisitions (one 6-channel 2048 x 2048 uint16 file, 48 MiB, and the same size
as six one-channel files) runs through ``probeplan study`` in a fresh process, each with its
maps written, dark and flat applied and three ROIs.  Printed: the peak resident memory of a
tiny study (the interpreter and imports), then of the study with ``--memory-mb 8``, with the
default bound (256 MiB) and with a bound that holds each stack in one block (as the study
did before it streamed), beside the stack's and the study's sizes.  Target: with the 8 MiB
bound the memory above the baseline stays well below one stack (the blocks, not the stacks,
set it).
"""

import subprocess
import sys
import time

import numpy as np
import pytest

pytestmark = pytest.mark.benchmark

_KIB = 1024
_MIB = 1024 * 1024
CHANNELS = ["c1", "c2", "c3", "c4", "c5", "c6"]


@pytest.fixture(autouse=True)
def _only_when_asked(request):
    markexpr = request.config.getoption("-m") or ""
    if "benchmark" not in markexpr:
        pytest.skip("benchmark: run with -m benchmark")


def _child_peak_rss_mib(args):
    # a fresh interpreter that only waits for the command: RUSAGE_CHILDREN of that interpreter
    code = (
        "import resource, subprocess, sys, time\n"
        "t = time.perf_counter()\n"
        f"rc = subprocess.run({args!r}).returncode\n"
        "print(rc, time.perf_counter() - t, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.split()
    return int(out[-3]), float(out[-2]), int(out[-1]) * _KIB / _MIB


def _study(folder, n, rng):
    """Two acquisitions of n x n pixels: one multi-channel file, one file per channel; dark, flat, references."""
    import tifffile

    from probeplan.io.stacks import write_stack

    M = np.array([[0.30, 0.02], [0.30, 0.08], [0.20, 0.15], [0.10, 0.25], [0.06, 0.25], [0.04, 0.25]])
    (folder / "refs.csv").write_text("channel,dotA,dotB\n" + "".join(
        f"{c},{M[i, 0]},{M[i, 1]}\n" for i, c in enumerate(CHANNELS)))
    rows = ["animal,group,time_h,file,channel"]
    with tifffile.TiffWriter(folder / "m1.ome.tif", ome=True) as tw:  # written plane by plane
        planes = (rng.poisson(200.0 + 100.0 * (c % 3), (n, n)).astype(np.uint16) for c in range(len(CHANNELS)))
        tw.write(planes, shape=(len(CHANNELS), n, n), dtype=np.uint16, photometric="minisblack",
                 metadata={"axes": "CYX", "Channel": {"Name": CHANNELS}})
    rows.append("m1,g,1,m1.ome.tif,")
    for c, ch in enumerate(CHANNELS):
        tifffile.imwrite(folder / f"m2_{ch}.tif", rng.poisson(150.0 + 50.0 * c, (n, n)).astype(np.uint16))
        rows.append(f"m2,g,1,m2_{ch}.tif,{ch}")
    (folder / "study.csv").write_text("\n".join(rows) + "\n")
    write_stack(folder / "dark.ome.tif", np.full((len(CHANNELS), n, n), 5.0, np.float32), channel_names=CHANNELS)
    write_stack(folder / "flat.ome.tif", np.full((len(CHANNELS), n, n), 1.0, np.float32), channel_names=CHANNELS)
    return (folder / "m1.ome.tif").stat().st_size / _MIB


def test_study_memory_is_bounded_by_the_blocks(tmp_path):
    rng = np.random.default_rng(2)
    n = 2048
    big = tmp_path / "big"
    big.mkdir()
    stack_mib = _study(big, n, rng)
    tiny = tmp_path / "tiny"
    tiny.mkdir()
    _study(tiny, 16, rng)
    rois = ["--roi", "tumour:100,100,900,900", "--roi", "background:1000,0,2000,2000",
            "--roi", "ring:ellipse:1000,1000,600,300"]

    def run(folder, out, *extra):
        return _child_peak_rss_mib([sys.executable, "-m", "probeplan", "study", str(folder / "study.csv"),
                                    "--references", str(folder / "refs.csv"), "--out", str(tmp_path / out),
                                    "--dark", str(folder / "dark.ome.tif"), "--flat", str(folder / "flat.ome.tif"),
                                    *(rois if folder is big else ["--roi", "t:0,0,4,4", "--roi", "background:8,8,16,16"]),
                                    *extra])

    t = time.perf_counter()
    results = {
        "baseline: 2 x 6 x 16^2 study (interpreter, imports)": run(tiny, "o0"),
        "--memory-mb 8": run(big, "o1", "--memory-mb", "8"),
        "default bound (256 MiB)": run(big, "o2"),
        "--memory-mb 4096 (each stack in one block)": run(big, "o3", "--memory-mb", "4096"),
    }
    for rc, _, _ in results.values():
        assert rc == 0
    base = next(iter(results.values()))[2]
    print(f"\n[probeplan study] 2 acquisitions x 6 channels x {n}^2 uint16: one stack {stack_mib:.0f} MiB, "
          f"study {2 * stack_mib:.0f} MiB of pixels (maps written: 5 float32 planes per acquisition, "
          f"{2 * 5 * n * n * 4 / _MIB:.0f} MiB)")
    for name, (_, seconds, rss) in results.items():
        print(f"  {name:<52} peak {rss:7.1f} MiB, above baseline {rss - base:7.1f} MiB "
              f"({(rss - base) / stack_mib:4.2f} x one stack), {seconds:5.1f} s")
    print(f"  total {time.perf_counter() - t:.0f} s")
    bounded = results["--memory-mb 8"][2] - base
    whole = results["--memory-mb 4096 (each stack in one block)"][2] - base
    assert bounded < 0.5 * stack_mib  # the blocks, not the stacks, set the peak
    assert bounded < 0.5 * whole
