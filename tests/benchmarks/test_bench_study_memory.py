"""Peak memory of a study whose stacks are larger than its memory bound, measured side by side in one run.

Run: ``python3 -m pytest tests/benchmarks/test_bench_study_memory.py -m benchmark -s -p no:cacheprovider``.
A study of two acquisitions (one 6-channel 2048 x 2048 uint16 file, 48 MiB, and the same size
as six one-channel files) runs through ``probeplan study`` in a fresh process, each with its
maps written, dark and flat applied, three drawn ROIs and an automatic one (Otsu).  Printed: the peak resident memory of a
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

_MIB = 1024 * 1024
#: Rows and columns of the big study's images.
_SIZE = 2048
CHANNELS = ["c1", "c2", "c3", "c4", "c5", "c6"]


@pytest.fixture(autouse=True)
def _only_when_asked(request):
    markexpr = request.config.getoption("-m") or ""
    if "benchmark" not in markexpr:
        pytest.skip("benchmark: run with -m benchmark")


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


def _big_and_tiny(tmp_path):
    """The _SIZE² study (big/) and a 16² one to warm up on (tiny/), seeded alike; the big stacks' MiB each."""
    rng = np.random.default_rng(2)
    big = tmp_path / "big"
    big.mkdir()
    stack_mib = _study(big, _SIZE, rng)
    tiny = tmp_path / "tiny"
    tiny.mkdir()
    _study(tiny, 16, rng)
    return big, tiny, stack_mib


def test_study_memory_is_bounded_by_the_blocks(tmp_path, child_peak_rss_mib):
    big, tiny, stack_mib = _big_and_tiny(tmp_path)
    rois = ["--roi", "tumour:100,100,900,900", "--roi", "background:1000,0,2000,2000",
            "--roi", "ring:ellipse:1000,1000,600,300", "--auto-roi", "found=dotA"]

    def run(folder, out, *extra):
        return child_peak_rss_mib([sys.executable, "-m", "probeplan", "study", str(folder / "study.csv"),
                                    "--references", str(folder / "refs.csv"), "--out", str(tmp_path / out),
                                    "--dark", str(folder / "dark.ome.tif"), "--flat", str(folder / "flat.ome.tif"),
                                    *(rois if folder is big else ["--roi", "t:0,0,4,4", "--roi", "background:8,8,16,16",
                                                                  "--auto-roi", "found=dotA"]),
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
    print(f"\n[probeplan study] 2 acquisitions x 6 channels x {_SIZE}^2 uint16: one stack {stack_mib:.0f} MiB, "
          f"study {2 * stack_mib:.0f} MiB of pixels (maps written: 5 float32 planes per acquisition, "
          f"{2 * 5 * _SIZE * _SIZE * 4 / _MIB:.0f} MiB)")
    for name, (_, seconds, rss) in results.items():
        print(f"  {name:<52} peak {rss:7.1f} MiB, above baseline {rss - base:7.1f} MiB "
              f"({(rss - base) / stack_mib:4.2f} x one stack), {seconds:5.1f} s")
    print(f"  total {time.perf_counter() - t:.0f} s")
    bounded = results["--memory-mb 8"][2] - base
    whole = results["--memory-mb 4096 (each stack in one block)"][2] - base
    assert bounded < 0.5 * stack_mib  # the blocks, not the stacks, set the peak
    assert bounded < 0.5 * whole


_CLUSTER_RUN = """
import resource, sys, time
from pathlib import Path
import distributed
from probeplan.study.runs import run_study

folder, out, memory_mb, tiny = Path(sys.argv[1]), Path(sys.argv[2]), float(sys.argv[3]), Path(sys.argv[4])


def peak_mib():
    import resource
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                              dashboard_address=None) as cluster, distributed.Client(cluster) as client:
    # the tiny study first: imports and compiled kernels on both sides before the peaks are read
    run_study(tiny / "study.csv", tiny / "refs.csv", out_dir=out.with_name(out.name + "_tiny"), scheduler=client,
              rois=["t:0,0,4,4", "background:8,8,16,16"], dark_path=tiny / "dark.ome.tif",
              flat_path=tiny / "flat.ome.tif")
    worker_before = list(client.run(peak_mib).values())[0]
    client_before = peak_mib()
    t = time.perf_counter()
    run_study(folder / "study.csv", folder / "refs.csv", out_dir=out, scheduler=client,
              rois=["tumour:100,100,900,900", "background:1000,0,2000,2000", "ring:ellipse:1000,1000,600,300"],
              dark_path=folder / "dark.ome.tif", flat_path=folder / "flat.ome.tif", memory_limit_mb=memory_mb)
    seconds = time.perf_counter() - t
    worker_after = list(client.run(peak_mib).values())[0]
    print(client_before, peak_mib(), worker_before, worker_after, seconds)
"""


def test_study_memory_on_a_cluster(tmp_path):
    """The same study on a LocalCluster worker process: the client's and the worker's peaks.

    A tiny study runs first on the same cluster, so that the figures "during the run" leave out
    imports and compiled kernels on both sides.
    """
    pytest.importorskip("distributed")
    big, tiny, stack_mib = _big_and_tiny(tmp_path)
    results = {}
    for memory_mb in (8.0,):  # one block per stack is shown by the local test
        out = subprocess.run([sys.executable, "-c", _CLUSTER_RUN, str(big), str(tmp_path / f"o{memory_mb:g}"),
                              str(memory_mb), str(tiny)], capture_output=True, text=True, check=True).stdout.split()
        results[memory_mb] = [float(v) for v in out[-5:]]
    print(f"\n[probeplan study on a LocalCluster, one worker process] 2 acquisitions x 6 x {_SIZE}^2 uint16, "
          f"one stack {stack_mib:.0f} MiB, study {2 * stack_mib:.0f} MiB")
    for memory_mb, (c0, c1, w0, w1, seconds) in results.items():
        print(f"  memory_limit_mb {memory_mb:6g}: client peak {c1:6.1f} MiB (+{c1 - c0:5.1f} during the run), "
              f"worker peak {w1:6.1f} MiB (+{w1 - w0:6.1f} during the run), {seconds:5.1f} s")
    c0, c1, w0, w1, _ = results[8.0]
    assert c1 - c0 < 0.5 * stack_mib  # the client holds only the small tables
    assert w1 - w0 < 0.5 * stack_mib  # the worker streams the stacks by blocks
