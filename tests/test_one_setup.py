"""One imaging set-up, three surfaces: the command line, the plan evaluation and the page give the same numbers.

The set-up is written three ways (depth options, a plan file, the page's set-up values); all three
are built by ``probeplan.catalog.setup.build_setup`` and judged against the skin limit by
``probeplan.study.safety.setup_skin_exposure``.  The check is that the surfaces agree with each
other and with the library called directly; the physics itself is checked in the model's tests.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pytest

from probeplan.catalog.setup import build_setup
from probeplan.cli.main import main
from probeplan.errors import AssumptionWarning
from probeplan.model.fluorescence import depth_profile
from probeplan.study import safety
from probeplan.study.evaluate import evaluate_plan
from probeplan.study.plan import parse_plan_text

ROOT = Path(__file__).resolve().parents[1]

# An invented set-up of our own: two probes, two channels, 640 nm laser, 3 mm deep target.
SETUP = dict(tissue="soft tissue", probes=["CdTe:700", "InAs:880"], filters=["700/30", "880/50"], excitation_nm=640.0,
             irradiance_mw_per_cm2=25.0, camera="si-deep-depletion", binning=2, f_number=4.0, magnification=0.1,
             exposure_s=0.05)
TARGET = dict(depth_mm=3.0, size_mm=4.0, concentration_uM=0.01, uptake_ratio=4.0)

PLAN = f"""\
[study]
title = "One set-up on three surfaces (invented)"

[animals]
species = "mouse"
body_mass_g = [20.0, 30.0]
sessions_per_animal = 1
session_interval_h = 48

[[animals.groups]]
name = "only"
size = 5

[[probes]]
name = "CdTe 700 nm"
material = "CdTe"
emission_peak_nm = 700
stock_uM = 20.0
dose_nmol_per_kg = 20
route = "iv"
injection_time_h = 0

[[probes]]
name = "InAs 880 nm"
material = "InAs"
emission_peak_nm = 880
stock_uM = 20.0
dose_nmol_per_kg = 20
route = "iv"
injection_time_h = 0

[target]
tissue = "soft tissue"
depth_mm = {TARGET['depth_mm']}
size_mm = {TARGET['size_mm']}
uptake_ratio = {TARGET['uptake_ratio']}
concentration_uM = {TARGET['concentration_uM']}

[acquisition]
source = "laser"
wavelength_nm = 640
irradiance_mw_per_cm2 = 25.0
camera = "si-deep-depletion"
f_number = 4.0
magnification = 0.1
binning = 2
positions = 1
time_points_h = [1]
overhead_min = 10

[[acquisition.channels]]
name = "700/30"
filter = "700/30"
exposure_s = 0.05

[[acquisition.channels]]
name = "880/50"
filter = "880/50"
exposure_s = 0.05
"""


@pytest.fixture(scope="module")
def direct():
    """The library called directly: SBR and SNR of each probe in its own channel at the target, and the skin check."""
    import warnings

    setup = build_setup(**SETUP)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        profiles = [depth_profile(setup.tissue, p, ch, irradiance_mw_per_cm2=setup.irradiance_mw_per_cm2,
                                  depth_mm=[TARGET["depth_mm"]], target_size_mm=TARGET["size_mm"],
                                  concentration_uM=TARGET["concentration_uM"], uptake_ratio=TARGET["uptake_ratio"])
                    for p, ch in zip(setup.probes, setup.channels, strict=True)]
    skin = safety.setup_skin_exposure(setup)
    return {"sbr": [float(p.sbr[0]) for p in profiles], "snr": [float(p.snr[0]) for p in profiles],
            "share_of_mpe": skin.ratio, "mpe": skin.mpe_mw_per_cm2}


def test_the_command_line_gives_the_library_numbers(direct, capsys):
    argv = ["depth", "--tissue", SETUP["tissue"], "--excitation-nm", "640", "--irradiance", "25", "--camera",
            SETUP["camera"], "--binning", "2", "--f-number", "4", "--magnification", "0.1", "--exposure-s", "0.05",
            "--size-mm", "4", "--concentration-uM", "0.01", "--uptake-ratio", "4", "--depth-max-mm", "6",
            "--depth-step-mm", "0.5", "--json"]
    for probe, filt in zip(SETUP["probes"], SETUP["filters"], strict=True):
        argv += ["--probe", probe, "--filter", filt]
    assert main(argv) == 0
    out = json.loads(capsys.readouterr().out)
    at_target = [r for r in out["rows"] if r["depth_mm"] == TARGET["depth_mm"]]
    np.testing.assert_allclose([r["sbr"] for r in at_target], direct["sbr"], rtol=1e-12)
    np.testing.assert_allclose([r["snr"] for r in at_target], direct["snr"], rtol=1e-12)
    assert out["skin"]["fraction_of_mpe"] == pytest.approx(direct["share_of_mpe"], rel=1e-12)
    assert out["skin"]["skin_mpe_mw_per_cm2"] == pytest.approx(direct["mpe"], rel=1e-12)


def test_the_plan_evaluation_gives_the_library_numbers(direct):
    ev = evaluate_plan(parse_plan_text(PLAN, source="plan.toml"))
    imaging = ev.table("imaging").rows
    np.testing.assert_allclose([r["sbr"] for r in imaging], direct["sbr"], rtol=1e-12)
    np.testing.assert_allclose([r["snr"] for r in imaging], direct["snr"], rtol=1e-12)
    light = ev.table("light").rows[0]
    assert light["share_of_mpe"] == pytest.approx(direct["share_of_mpe"], rel=1e-12)
    assert light["skin_mpe_mw_per_cm2"] == pytest.approx(direct["mpe"], rel=1e-12)


def test_the_page_gives_the_library_numbers(direct, monkeypatch):
    monkeypatch.syspath_prepend(str(ROOT / "app"))
    for name in [m for m in sys.modules if m.startswith("page_")]:
        monkeypatch.delitem(sys.modules, name)
    import page_model  # the page's model functions (what its depth view and sidebar call)

    page_setup = page_model.Setup(
        tissue=SETUP["tissue"], composition=(), probes=(("CdTe", 700.0, None, None), ("InAs", 880.0, None, None)),
        filters=tuple(SETUP["filters"]), excitation_nm=640.0, irradiance_mw_per_cm2=25.0, camera=SETUP["camera"],
        binning=2, f_number=4.0, magnification=0.1, exposure_s=0.05, target_depth_mm=TARGET["depth_mm"],
        target_size_mm=TARGET["size_mm"], concentration_uM=TARGET["concentration_uM"],
        uptake_ratio=TARGET["uptake_ratio"], autofluorescence_yield_per_cm=None)
    profiles, _ = page_model.depth_profiles(page_setup, 6.0, 0.5)
    at = [int(np.flatnonzero(p.depth_mm == TARGET["depth_mm"])[0]) for p in profiles]
    np.testing.assert_allclose([float(p.sbr[i]) for p, i in zip(profiles, at, strict=True)], direct["sbr"], rtol=1e-12)
    np.testing.assert_allclose([float(p.snr[i]) for p, i in zip(profiles, at, strict=True)], direct["snr"], rtol=1e-12)
    skin, _ = page_model.skin_exposure(page_setup)
    assert skin["share_of_mpe"] == pytest.approx(direct["share_of_mpe"], rel=1e-12)
    assert skin["skin_mpe_mw_per_cm2"] == pytest.approx(direct["mpe"], rel=1e-12)


def test_results_come_back_as_tables_with_units_in_the_column_names():
    # the DataFrame holds exactly the arrays of the result it comes from
    import probeplan

    setup = build_setup(**SETUP)
    prof = probeplan.depth_profile(setup.tissue, setup.probes[0], setup.channels[0], irradiance_mw_per_cm2=25.0,
                                   depth_mm=[1.0, 2.0, 3.0], warn=False)
    frame = prof.to_frame()
    assert list(frame["depth_mm"]) == [1.0, 2.0, 3.0]
    np.testing.assert_array_equal(frame["sbr"].to_numpy(), prof.sbr)
    with pytest.warns(AssumptionWarning, match="typical epsilon"):  # InAs has no published sizing curve
        rep = probeplan.channel_report("soft tissue", SETUP["probes"], setup.channels, irradiance_mw_per_cm2=25.0,
                                       depth_mm=[2.0])
    long = rep.to_frame()
    assert len(long) == 2 * 2 and {"response_e_per_s_per_uM", "crosstalk", "unmixed_snr"} <= set(long.columns)
    own = long[(long["channel"] == "700/30") & (long["probe"] == rep.probe_names[0])]
    assert float(own["response_e_per_s_per_uM"].iloc[0]) == float(rep.response_e_per_s_per_uM[0, 0, 0])
