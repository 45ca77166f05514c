"""The default light-transport model (diffusion × Monte Carlo correction tables) against Monte Carlo.

References: the package's own photon-packet Monte Carlo (probeplan.model.montecarlo, validated against
iadpython adding-doubling in tests/test_montecarlo.py), as precomputed values in
tests/data/transport_mc_reference.csv (script, seeds, packet counts and standard errors beside them,
tests/data/make_transport_reference.py) and as a few small live runs here.  The target is 5 %.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from probeplan.errors import InputError
from probeplan.model import transport as tr
from probeplan.model import transport_tables as tt
from probeplan.model.montecarlo import Layer, simulate_point_source, simulate_slab


def _load_reference():
    import importlib.util

    spec = importlib.util.spec_from_file_location("_transport_reference", Path(__file__).parent / "data" /
                                                  "transport_reference.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


#: The reference rows and the model's value for each (tests/data/transport_reference.py, shared with docs/).
_REF = _load_reference()
#: The accuracy the default model claims against Monte Carlo.
TOLERANCE = 0.05

_ROWS = _REF.reference_rows()


@pytest.mark.parametrize("row", _ROWS, ids=[f"{r['quantity']}-g{r['g']:g}-a{r['mu_a_per_cm'] / r['mu_s_prime_per_cm']:.3g}"
                                            f"-d{r['depth_mm']:g}" for r in _ROWS])
def test_default_model_within_five_percent_of_monte_carlo(row):
    # Monte Carlo reference (precomputed, see the module docstring); allowance: 5 % + 2 standard errors.
    value = _REF.model_value(row, "auto")
    allowed = TOLERANCE + 2.0 * row["se"] / row["value"]
    assert value / row["value"] - 1.0 == pytest.approx(0.0, abs=allowed)


def test_reference_spans_the_claimed_range():
    ratios = [r["mu_a_per_cm"] / r["mu_s_prime_per_cm"] for r in _ROWS]
    assert min(ratios) <= 0.0011 and max(ratios) >= 0.49
    assert min(r["g"] for r in _ROWS) == 0.8 and max(r["g"] for r in _ROWS) == 0.95
    assert min(r["n"] for r in _ROWS) == 1.33 and max(r["n"] for r in _ROWS) == 1.45
    assert min(r["depth_mm"] for r in _ROWS) <= 0.5 and max(r["depth_mm"] for r in _ROWS) >= 10.0
    assert {r["quantity"] for r in _ROWS} == {"escape", "exitance_bin", "fwhm_mm", "broad_beam"}


def test_diffusion_misses_where_absorption_is_high():
    # The reason for the tables: at mu_a/mu_s' = 0.19 (about 1300 nm) diffusion overestimates the escape
    # from 1 mm by more than 15 % against the same Monte Carlo reference.
    row = next(r for r in _ROWS if r["quantity"] == "escape" and r["mu_a_per_cm"] == 1.03 and r["depth_mm"] == 1.0)
    assert _REF.model_value(row, "diffusion") / row["value"] > 1.15


def test_live_point_source_escape_and_peak():
    # A small live Monte Carlo run (numba engine, 20 000 packets, seed 31): escape within 5 % + 3 sigma.
    g, n, mua, musp, d = 0.9, 1.4, 1.5, 6.0, 2.0
    res = simulate_point_source([Layer(math.inf, mua, musp / (1 - g), g, n)], d, 20_000, seed=31,
                                rho_bins_mm=[0.0, 1.0], engine="numba")
    esc = float(tr.point_source_escape(d, mua, musp, n, g=g))
    assert esc / res.escape - 1 == pytest.approx(0.0, abs=TOLERANCE + 3 * res.escape_std / res.escape)


def test_live_broad_beam_fluence():
    # Pencil beam in a semi-infinite medium: the depth tally is the broad-beam fluence (Monte Carlo, seed 32).
    g, n, mua, musp = 0.85, 1.37, 2.0, 8.0
    edges = np.array([0.45, 0.55, 1.95, 2.05])
    res = simulate_slab([Layer(math.inf, mua, musp / (1 - g), g, n)], 20_000, seed=32, depth_bins_mm=edges,
                        rho_bins_mm=[], engine="numba")
    for b, d in ((0, 0.5), (2, 2.0)):
        z = np.linspace(edges[b], edges[b + 1], 21)
        model = float(np.trapezoid(tr.broad_beam_fluence(z, mua, musp, n, g=g), z) / (z[-1] - z[0]))
        mc, se = float(res.fluence[b]), float(res.fluence_std[b])
        assert model / mc - 1 == pytest.approx(0.0, abs=TOLERANCE + 3 * se / mc)


def test_white_monte_carlo_agrees_with_the_packet_monte_carlo():
    # The tables' generator (absorption applied afterwards by path length, escape by reciprocity) against
    # the ordinary weighted-packet Monte Carlo, both live and small.
    from probeplan.model.montecarlo_white import simulate_white

    g, n, ratio = 0.9, 1.4, 0.2
    white = simulate_white("diffuse", g, n, 6000, ratios=[ratio], z_edges=[1.9, 2.1], max_reduced_path=300.0,
                           n_batches=4, seed=3)
    escape_white = white.fluence[:, 0, 0] / (4 * n * n)
    musp = 10.0  # reduced depth 2 = 2 mm
    res = simulate_point_source([Layer(math.inf, ratio * musp, musp / (1 - g), g, n)], 2.0, 20_000, seed=33,
                                rho_bins_mm=[], engine="numba")
    se = math.hypot(escape_white.std(ddof=1) / 2.0, res.escape_std)
    assert escape_white.mean() == pytest.approx(res.escape, abs=3 * se + 0.02 * res.escape)


def test_model_registry_and_errors():
    assert tr.resolve_model("auto") == "mc_table" == next(iter(tr.TRANSPORT_MODELS))
    with pytest.raises(InputError, match=r"model: got 'mcx'; choose one of 'auto', 'mc_table', 'diffusion'"):
        tr.point_source_escape(1.0, 0.1, 10.0, model="mcx")
    with pytest.raises(InputError, match=r"method: got 'polynomial' with model 'mc_table'"):
        tr.broad_beam_fluence(1.0, 0.1, 10.0, method="polynomial")
    with pytest.raises(InputError, match=r"g: got 1\.0"):
        tr.point_source_blur_fwhm_mm(1.0, 0.1, 10.0, g=1.0)


def test_limits_and_broadcasting():
    # Without absorption every packet leaves a half-space: the tables keep escape = 1 exactly.
    np.testing.assert_allclose(tr.point_source_escape([0.5, 5.0], 0.0, 10.0), 1.0, rtol=1e-12)
    depth = np.linspace(0.5, 10, 5)[:, None]
    mua = np.array([0.01, 0.5, 3.0])
    for f in (tr.point_source_escape, tr.point_source_blur_fwhm_mm, tr.broad_beam_fluence):
        out = f(depth, mua, 8.0)
        assert out.shape == (5, 3) and np.all(np.isfinite(out)) and np.all(out > 0)
    assert tr.point_source_exitance_per_mm2(np.zeros((2, 1, 1)), depth, mua, 8.0).shape == (2, 5, 3)
    # deeper sources escape less, with either model
    esc = tr.point_source_escape(np.linspace(0.5, 10, 40), 1.0, 6.0)
    assert np.all(np.diff(esc) < 0)


def test_tables_carry_their_provenance_and_ranges():
    info = tt.table_info()
    assert "tools/make_transport_tables.py" in info["provenance"] and "seed" in info["provenance"]
    assert tt.TABLE_RANGES["g"] == (0.8, 0.95) and tt.TABLE_RANGES["n"] == (1.33, 1.45)
    assert tt.out_of_range(0.3, 0.9, 1.4) == []
    assert tt.out_of_range(2.0, 0.9, 1.4) and tt.out_of_range(0.3, 0.5, 1.4)
