"""Benchmarks: Monte Carlo interaction rate per engine, and the diffusion depth-curve figure.

Run with ``python3 -m pytest tests/benchmarks -m benchmark -s -p no:cacheprovider``.
Figures are printed side by side from one run; the targets are printed with the
measurements (they depend on the machine, so only sanity relations are asserted).
"""

from __future__ import annotations

import math
import time

import numpy as np
import pytest

from probeplan.model import transport as tr
from probeplan.model.montecarlo import Layer, simulate_slab

#: Target rate of the fast engine, interactions per second (2 cores).
TARGET_INTERACTIONS_PER_S = 10e6
#: Target time of one depth-curve figure (3 probes x 200 depths x ~300 wavelengths), seconds.
TARGET_DEPTH_CURVE_S = 0.050

# Near-infrared soft tissue in air: mu_a 0.1, mu_s 100 cm^-1, g 0.9 (mu_s' 10), n 1.4 (docs/sources.md case).
_TISSUE = [Layer(math.inf, 0.1, 100.0, 0.9, 1.4)]
_PHOTONS = {"python": 100, "numpy": 10_000, "numba": 40_000}


def _rate(engine: str) -> tuple[float, int, float]:
    n = _PHOTONS[engine]
    start = time.perf_counter()
    res = simulate_slab(_TISSUE, n, engine=engine, seed=1)
    elapsed = time.perf_counter() - start
    return res.n_interactions / elapsed, res.n_interactions, elapsed


@pytest.mark.benchmark
def test_monte_carlo_interaction_rate():
    simulate_slab(_TISSUE, 50, engine="numba", seed=0)  # compile / load the cached loop outside the timing
    rates = {engine: _rate(engine) for engine in ("python", "numpy", "numba")}
    base = rates["python"][0]
    print("\nMonte Carlo interaction rate (semi-infinite tissue, mu_a 0.1, mu_s 100 /cm, g 0.9, n 1.4)")
    print(f"{'engine':<8} {'photons':>8} {'interactions':>13} {'seconds':>8} {'interactions/s':>15} {'x python':>9}")
    for engine, (rate, count, elapsed) in rates.items():
        print(f"{engine:<8} {_PHOTONS[engine]:>8} {count:>13} {elapsed:>8.3f} {rate:>15.3e} {rate / base:>9.1f}")
    fast = max(rates["numba"][0], rates["numpy"][0])
    verdict = "met" if fast >= TARGET_INTERACTIONS_PER_S else "NOT met"
    print(f"target for the fast engine: >= {TARGET_INTERACTIONS_PER_S:.0e} /s -> {verdict}")
    assert rates["numba"][0] > base and rates["numpy"][0] > base


def _tissue_like(wavelength_nm):
    # Magnitudes only (timing input): Jacques 2013 soft-tissue scattering power law a = 18.9, b = 1.286
    # (docs/sources.md) and a smooth absorption between 0.05 and 0.6 cm^-1.
    mu_sp = 18.9 * (wavelength_nm / 500.0) ** -1.286
    mu_a = 0.05 + 0.55 * np.exp(-(((wavelength_nm - 980.0) / 60.0) ** 2)) + 0.2 * np.exp(-(wavelength_nm - 600.0) / 40.0)
    return mu_a, mu_sp


def _depth_curve(depth_mm, emission_windows, excitation_nm):
    out = []
    mu_a_x, mu_sp_x = _tissue_like(np.asarray(excitation_nm))
    fluence = tr.broad_beam_fluence(depth_mm, mu_a_x, mu_sp_x)
    for window in emission_windows:
        mu_a, mu_sp = _tissue_like(window)
        escape = tr.point_source_escape(depth_mm[:, None], mu_a, mu_sp)
        blur = tr.point_source_blur_fwhm_mm(depth_mm[:, None], mu_a, mu_sp)
        out.append((fluence, escape, blur))
    return out


@pytest.mark.benchmark
def test_depth_curve_figure_time():
    depth_mm = np.linspace(0.0, 10.0, 200)
    windows = [np.arange(start, start + 300.0, 1.0) for start in (650.0, 800.0, 1000.0)]  # 1 nm grid, 3 probes
    _depth_curve(depth_mm, windows, 640.0)  # warm-up
    times = []
    for _ in range(7):
        start = time.perf_counter()
        result = _depth_curve(depth_mm, windows, 640.0)
        times.append(time.perf_counter() - start)
    shared = []
    for _ in range(7):
        start = time.perf_counter()
        _depth_curve(depth_mm, [np.arange(650.0, 1600.0, 1.0)[:300]], 640.0)
        shared.append(time.perf_counter() - start)
    best = min(times)
    print("\nDepth curve: broad_beam_fluence + point_source_escape + point_source_blur_fwhm_mm")
    print(
        f"3 probes x 200 depths x 300 wavelengths (own windows): best {best * 1e3:.1f} ms, median {np.median(times) * 1e3:.1f} ms"
    )
    print(f"1 shared window, 200 depths x 300 wavelengths:        best {min(shared) * 1e3:.1f} ms")
    print(f"target < {TARGET_DEPTH_CURVE_S * 1e3:.0f} ms -> {'met' if best < TARGET_DEPTH_CURVE_S else 'NOT met'}")
    assert result[0][2].shape == (200, 300)
