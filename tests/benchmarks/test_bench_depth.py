"""Benchmark: a depth curve for 3 probes × 200 depths on a 1 nm emission grid (target: under 50 ms).

Timed side by side in one run for each transport model: the default Monte Carlo tables
(``"mc_table"``) and plain diffusion theory, with the ratio printed.  Every timed curve is
computed: the model's caches (tissue coefficients, fluence, escape fractions) are emptied
before each run; what stays are the one-time costs (the shipped tables read, the compiled
loops loaded), paid in the warm-up.  Beside it, a curve after only the irradiance moved
(the transport cached, as on the page).  Timings on a shared machine vary: compare the
ratios printed in one run.

Run with ``python3 -m pytest tests/benchmarks/test_bench_depth.py -m benchmark -s -p no:cacheprovider``.
"""

from __future__ import annotations

import time

import numpy as np
import pytest

from probeplan.catalog.resolve import tissue as resolve_tissue
from probeplan.model import dots, optics
from probeplan.model.fluorescence import clear_caches, depth_profile

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
    tissue = resolve_tissue("soft tissue")

    def run(model="auto", probe_absorption=True, irradiance=10.0):
        return [depth_profile(tissue, p, source=source, irradiance_mw_per_cm2=irradiance, emission_filter=f,
                              camera=cam, lens=lens, exposure_s=0.01, depth_mm=depths, warn=False,
                              probe_absorption=probe_absorption, transport_model=model)
                for p, f in zip(probes, filters, strict=True)]

    def timed(cached=False, **kw):
        times = []
        for i in range(7):
            if not cached:
                clear_caches()
            t0 = time.perf_counter()
            run(irradiance=10.0 + i, **kw) if cached else run(**kw)
            times.append(time.perf_counter() - t0)
        return min(times), float(np.median(times))

    medians = {}
    for model in ("mc_table", "diffusion"):
        profiles = run(model)  # warm-up: table loading and caches
        n_wl = sum(p.wavelength_nm.size for p in profiles)
        best, medians[model] = timed(model=model)
        print(f"\ndepth curve ({model}): 3 probes x 200 depths x {n_wl // 3} wavelengths (1 nm grid): "
              f"best {best * 1e3:.1f} ms, median {medians[model] * 1e3:.1f} ms; target {TARGET_S * 1e3:.0f} ms "
              f"-> {TARGET_S / medians[model]:.2f}x the target budget")
        assert all(p.signal_e.shape == (200,) and p.transport_model == model for p in profiles)
    print(f"Monte Carlo tables / diffusion time: {medians['mc_table'] / medians['diffusion']:.2f}x")
    _, moved = timed(cached=True)
    print(f"only the irradiance moved (transport cached): median {moved * 1e3:.1f} ms, "
          f"{moved / medians['mc_table']:.2f}x a computed curve")
    # the probe's own absorption (background uptake and the target's self-attenuation), measured side by side
    _, without = timed(probe_absorption=False)
    print(f"without the probe's own absorption: median {without * 1e3:.1f} ms; with it "
          f"{medians['mc_table'] / without:.2f}x that")
