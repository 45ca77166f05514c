"""Benchmark: a depth curve for 3 probes × 200 depths on a 1 nm emission grid (target: under 50 ms).

Run with ``python3 -m pytest tests/benchmarks/test_bench_depth.py -m benchmark -s -p no:cacheprovider``.
"""

from __future__ import annotations

import time

import numpy as np
import pytest

from probeplan.model import dots
from probeplan.model import optics
from probeplan.model.fluorescence import depth_profile

TARGET_S = 0.050


@pytest.mark.benchmark
def test_depth_curve_three_probes_200_depths():
    source = optics.Laser(640.0)
    cam = optics.camera("si-deep-depletion").with_binning(2)
    lens = optics.Lens(4.0, 0.1)
    probes = [dots.make_probe("CdTe", 700.0),
              dots.make_probe("CdTeSe", 780.0, extinction_at_excitation_per_M_cm=1.5e6),
              dots.make_probe("InAs", 880.0, extinction_at_excitation_per_M_cm=1.0e6)]
    filters = [optics.parse_filter(f) for f in ("700/30", "780/40", "880/50")]
    depths = np.linspace(0.0, 10.0, 200)

    def run(probe_absorption=True):
        return [depth_profile("soft tissue", p, source=source, irradiance_mw_per_cm2=10.0, emission_filter=f,
                              camera=cam, lens=lens, exposure_s=0.01, depth_mm=depths, warn=False,
                              probe_absorption=probe_absorption)
                for p, f in zip(probes, filters, strict=True)]

    profiles = run()  # warm-up: table loading and caches
    n_wl = sum(p.wavelength_nm.size for p in profiles)
    times = []
    for _ in range(7):
        t0 = time.perf_counter()
        run()
        times.append(time.perf_counter() - t0)
    best, median = min(times), float(np.median(times))
    print(f"\ndepth curve: 3 probes x 200 depths x {n_wl // 3} wavelengths (1 nm grid): "
          f"best {best * 1e3:.1f} ms, median {median * 1e3:.1f} ms; target {TARGET_S * 1e3:.0f} ms "
          f"-> {TARGET_S / median:.2f}x the target budget")
    # the probe's own absorption (background uptake and the target's self-attenuation), measured side by side
    without = []
    for _ in range(7):
        t0 = time.perf_counter()
        run(probe_absorption=False)
        without.append(time.perf_counter() - t0)
    print(f"without the probe's own absorption: median {float(np.median(without)) * 1e3:.1f} ms; with it "
          f"{median / float(np.median(without)):.2f}x that")
    assert all(p.signal_e.shape == (200,) for p in profiles)
