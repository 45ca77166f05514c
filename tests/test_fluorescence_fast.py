"""The fast path of the depth curve gives the numbers of a straightforward evaluation (1e-9 relative).

The depth curve's inner loops (the Monte Carlo table corrections, the disc escape fraction
of every slice of the target at every wavelength, the slices summed on the 1 nm grid) run
compiled, and tissue coefficients and dot sizes are cached.  These tests compare them with
evaluations that share none of that: scipy's ``RegularGridInterpolator`` on the shipped
table, the documented disc-escape formula evaluated point by point with the scalar
``correction``, the numpy path, and depth curves computed one depth at a time.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.interpolate import RegularGridInterpolator

import probeplan.model.fluorescence as fl
from probeplan.catalog.resolve import tissue as resolve_tissue
from probeplan.model import dots, optics, transport, transport_kernels, transport_tables
from probeplan.units import MM_PER_CM

RTOL = 1e-9


@pytest.fixture(scope="module")
def soft():
    return resolve_tissue("soft tissue")


def _numpy_only(monkeypatch):
    """Force the numpy path everywhere and start with empty caches."""
    monkeypatch.setattr(fl, "_COMPILED_MIN_POINTS", 10**15)
    fl.clear_caches()
    dots._yu_peak_nm.cache_clear()


def test_corrections_equal_scipy_grid_interpolation():
    # bilinear in (ln mu_a/mu_s', reduced depth) on the shipped ln C tables at one g, n (scipy's
    # RegularGridInterpolator, method "linear"), for ratios varying along the last axis only and
    # depths along the others, as the depth curve asks for them
    g, n = 0.9, 1.4
    info = transport_tables.table_info()
    ratios, z = info["mu_a_over_mu_s_prime"], info["reduced_depth"]
    qs = ("escape", "exitance0", "fwhm")
    table, _ = transport_tables._stacked(qs, g, n)
    rng = np.random.default_rng(3)
    ratio = np.exp(rng.uniform(np.log(ratios[0]), np.log(ratios[-1]), 57))[None, None, :]
    depth = rng.uniform(0.0, z[-1], (40, 8))[:, :, None]
    got = transport_tables.corrections(qs, ratio, depth, g, n)
    points = np.stack(np.broadcast_arrays(np.log(ratio), depth), axis=-1)
    for k, q in enumerate(qs):
        ref = np.exp(RegularGridInterpolator((np.log(ratios), z), table[:, :, k])(points))
        np.testing.assert_allclose(got[k], ref, rtol=RTOL)


def _disc_by_formula(r_mm, d_mm, mu_a, mu_sp, n, g):
    # the documented formula, point by point: F = F_D(r/w) [C0 w^2 (1 - x) + C_esc x], x = F_D(r/w)/F_D(inf)
    mu = float(transport.mu_eff(mu_a, mu_sp)) / MM_PER_CM
    zb = float(transport.extrapolated_boundary_cm(mu_a, mu_sp, n)) * MM_PER_CM
    d2 = d_mm + 2.0 * zb
    total = 0.5 * (math.exp(-mu * d_mm) + math.exp(-mu * d2))
    red = d_mm / MM_PER_CM * mu_sp
    esc = float(transport_tables.correction("escape", mu_a / mu_sp, red, g, n))
    if math.isinf(r_mm):
        return esc * total
    c0 = float(transport_tables.correction("exitance0", mu_a / mu_sp, red, g, n))
    w = float(transport_tables.correction("fwhm", mu_a / mu_sp, red, g, n))
    rs = r_mm / w
    r1, r2 = math.hypot(d_mm, rs), math.hypot(d2, rs)
    tails = 0.5 * ((d_mm * math.exp(-mu * r1) / r1 if r1 > 0 else 0.0) + d2 * math.exp(-mu * r2) / r2)
    scaled = total - tails
    x = scaled / total
    return scaled * (c0 * w**2 * (1 - x) + esc * x)


@pytest.mark.parametrize("whole", [False, True])
def test_compiled_disc_escape_equals_formula_and_numpy_path(soft, monkeypatch, whole):
    if not transport_kernels.available():
        pytest.skip("numba not importable: only the numpy path runs")
    wl = np.arange(600.0, 1400.0, 4.0)
    mu_a, mu_sp = fl.optical_properties(soft, wl)
    nodes, _ = fl._SPHERE_NODES
    depths = np.linspace(0.0, 10.0, 200)
    z = np.maximum(depths[:, None] + 1.0 * nodes[None, :], 0.0)[:, :, None]
    rho = np.inf if whole else np.broadcast_to(np.sqrt(1 - nodes**2), z.shape[:2])[:, :, None]
    args = (rho, z, mu_a[None, None, :], mu_sp[None, None, :], soft.refractive_index)
    fast = fl.disc_escape_fraction(*args, g=0.9, model="mc_table")
    assert fast.size >= fl._COMPILED_MIN_POINTS  # the compiled loop ran
    for i, j, k in [(0, 0, 0), (3, 7, 50), (60, 2, 120), (150, 5, 10), (199, 4, 199)]:
        r = np.inf if whole else float(rho[i, j, 0])
        ref = _disc_by_formula(r, float(z[i, j, 0]), float(mu_a[k]), float(mu_sp[k]), soft.refractive_index, 0.9)
        assert fast[i, j, k] == pytest.approx(ref, rel=RTOL)
    monkeypatch.setattr(fl, "_COMPILED_MIN_POINTS", 10**15)
    slow = fl.disc_escape_fraction(*args, g=0.9, model="mc_table")
    np.testing.assert_allclose(fast, slow, rtol=RTOL, atol=0.0)


def _curve(tissue, probe, filt, depths, **kw):
    return fl.depth_profile(tissue, probe, source=optics.Laser(640.0), irradiance_mw_per_cm2=10.0,
                            emission_filter=optics.parse_filter(filt), camera=optics.camera("si-deep-depletion"),
                            lens=optics.Lens(4.0, 0.1), exposure_s=0.01, depth_mm=depths, warn=False, **kw)


FIELDS = ("signal_e", "uptake_background_e", "autofluorescence_e", "leakage_e", "sbr", "snr", "blur_fwhm_mm",
          "spectral_shift_nm", "escaped_spectrum")


@pytest.mark.parametrize("probe_absorption", [True, False])
def test_depth_curve_equals_numpy_path_and_one_depth_at_a_time(soft, monkeypatch, probe_absorption):
    probe = dots.make_probe("InAs", 880.0, extinction_at_excitation_per_M_cm=1.0e6)
    depths = np.linspace(0.0, 10.0, 200)
    fast = _curve(soft, probe, "880/50", depths, probe_absorption=probe_absorption)
    picks = [0, 17, 99, 199]
    # one depth at a time: too few points for the compiled loops, so the numpy path and fresh caches
    _numpy_only(monkeypatch)
    for i in picks:
        one = _curve(soft, probe, "880/50", depths[[i]], probe_absorption=probe_absorption)
        for name in FIELDS:
            if name == "blur_fwhm_mm":  # taken at the curve's main wavelength, which depends on all its depths
                continue
            a, b = getattr(fast, name), getattr(one, name)  # per depth, or one value (the backgrounds)
            np.testing.assert_allclose(a[i] if np.ndim(a) else a, b[0] if np.ndim(b) else b, rtol=RTOL, atol=1e-300,
                                       err_msg=name)
    whole = _curve(soft, probe, "880/50", depths, probe_absorption=probe_absorption)
    for name in FIELDS:
        np.testing.assert_allclose(getattr(fast, name), getattr(whole, name), rtol=RTOL, atol=1e-300, err_msg=name)


def test_cached_tissue_coefficients_are_copies(soft):
    wl = np.arange(650.0, 900.0)
    a, s = fl.optical_properties(soft, wl)
    a[:] = -1.0
    s[:] = -1.0
    a2, s2 = fl.optical_properties(soft, wl)
    assert np.all(a2 > 0) and np.all(s2 > 0)
    np.testing.assert_array_equal(a2, soft.mu_a_per_cm(wl))


def test_cached_dot_size_equals_the_bisection():
    # the scalar (cached) and array paths of the sizing curve's inversion agree, and invert diameter_nm
    d = np.array([3.1, 3.1, 4.2])
    arr = dots.exciton_peak_nm("CdTe", d)
    for di, peak in zip(d, arr, strict=True):
        assert dots.exciton_peak_nm("CdTe", float(di)) == peak
        assert float(dots.diameter_nm("CdTe", peak)) == pytest.approx(di, rel=1e-9)
