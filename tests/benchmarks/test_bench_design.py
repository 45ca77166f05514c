"""Benchmark: exhaustive design search, 3 of 20 probes × 3 of 30 filters and 4 of 20 × 4 of 30.

Run with ``python3 -m pytest tests/benchmarks/test_bench_design.py -m benchmark -s -p no:cacheprovider``.
The precomputation of the response/background tables (the forward model) is timed and printed
separately from the search.  Targets (2-core machine): 3 × 3 under 3 s, 4 × 4 under 60 s; they are
printed with the measurements, and only sanity relations are asserted.  The 3 × 3 search is also
run without pruning, side by side, to give the speed-up and to check the pruned result is the same.
"""

from __future__ import annotations

import math
import time
import warnings

import numpy as np
import pytest

from probeplan.model import dots
from probeplan.model import optics
from probeplan.design.search import design, exhaustive_search, probe_series

TARGET_S = {3: 3.0, 4: 60.0}


def _tables(scenario: str):
    """Response/background tables for 20 candidate probes × 30 filters × 1 source from the forward model."""
    if scenario == "NIR-I, 640 nm":
        # two unsized NIR-I materials, 10 peaks each; 30 bandpass filters 700-990 nm
        probes = probe_series("CdTeSe", 670, 850, 20) + probe_series("CuInS2", 660, 840, 20)
        filters = [optics.parse_filter(f"{c}/30") for c in range(700, 1000, 10)]
        source = optics.Laser(640.0, 1.0)
    else:
        # dense crosstalk: 20 CdTe peaks 4.5 nm apart (FWHM 40 nm); 15 centres × 2 widths, 660-800 nm
        probes = [dots.make_probe("CdTe", float(p)) for p in np.linspace(650.0, 735.0, 20)]
        filters = [optics.parse_filter(f"{c}/{w}") for c in range(660, 810, 10) for w in (20, 40)]
        source = optics.Laser(532.0, 1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # typical-epsilon assumptions of the unsized materials
        start = time.perf_counter()
        res = design("soft tissue", probes, filters, sources=source, camera=optics.camera("si-deep-depletion"),
                     lens=optics.Lens(2.0, 0.1), k=1, depth_mm=3.0, exposure_s=0.1, concentration_uM=0.1, top=1)
        elapsed = time.perf_counter() - start
    return res, elapsed


def _search(res, k, prune):
    start = time.perf_counter()
    out = exhaustive_search(res.response_e_per_s_per_uM, res.background_e_per_s, res.uptake_e_per_s, res.read_noise_e,
                            k=k, exposure_s=0.1, concentration_uM=0.1, top=5, prune=prune)
    return out, time.perf_counter() - start


@pytest.mark.benchmark
@pytest.mark.parametrize("scenario", ["NIR-I, 640 nm", "dense CdTe, 532 nm"])
def test_design_search_speed(scenario):
    res, pre_s = _tables(scenario)
    n_p, n_f = len(res.probe_names), len(res.filter_names)
    print(f"\n[{scenario}] precomputation of R/B/U ({n_p} probes × {n_f} filters × 1 source, forward model): "
          f"{pre_s:.2f} s")
    _search(res, 2, True)  # load or compile the search kernels outside the timing
    print(f"{'search':<31} {'combinations':>13} {'evaluated':>11} {'pruned':>13} {'seconds':>8} "
          f"{'covered/s':>10} {'evaluated/s':>11} {'target':>7}")
    results = {}
    for k, prune in ((3, True), (3, False), (4, True)):
        out, dt = _search(res, k, prune)
        results[(k, prune)] = out
        label = f"{k} of {n_p} x {k} of {n_f}" + ("" if prune else " (no pruning)")
        target = f"{TARGET_S[k]:g} s" if prune else "-"
        print(f"{label:<31} {out.total_combinations:>13,} {out.evaluated:>11,} {out.pruned:>13,} {dt:>8.3f} "
              f"{out.total_combinations / dt:>10.3g} {out.evaluated / dt:>11.3g} {target:>7}"
              + ("" if not prune else ("  met" if dt < TARGET_S[k] else "  NOT met")))
        assert out.total_combinations == math.comb(n_p, k) * math.comb(n_f, k)
    pruned, full = results[(3, True)], results[(3, False)]
    print(f"speed-up of pruning, 3 x 3, same run: {full.search_s / pruned.search_s:.3g}x; filter sets cut by their "
          f"bound (4 x 4): {results[(4, True)].filter_sets_cut:,} of {results[(4, True)].filter_sets_total:,}")
    np.testing.assert_array_equal(pruned.probes, full.probes)
    np.testing.assert_array_equal(pruned.filters, full.filters)
    np.testing.assert_array_equal(pruned.worst_snr, full.worst_snr)
    assert full.evaluated == full.total_combinations and pruned.evaluated < full.evaluated
