"""The probe absorbs too; the spectral shift with depth has its true sign; saturation per binned pixel.

Sources named beside each check:
[IUPAC] decadic absorbance A = epsilon c l (Beer-Lambert, IUPAC Gold Book "absorbance"), so the natural
        absorption coefficient of a solute is ln(10) epsilon c.
[S81]   Segelstein's water table (shipped): water absorbs far more at 1450 nm than at 1300 nm.
[P99]   Prahl's haemoglobin table (shipped): blood absorbs far more at 600 nm than at 660 nm.
[FPW92] Farrell, Patterson & Wilson 1992: broad-beam fluence falls faster when mu_a rises (mu_eff).
Binning and full wells: charge binning sums in the output node, digital binning after read-out
(common practice, EMVA 1288 characterisation and camera makers' notes).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest

from probeplan.errors import InputError, ModelValidityWarning, ProbeAbsorptionWarning
from probeplan.model import dots, optics, transport
from probeplan.model.fluorescence import (
    PROBE_ABSORPTION_WARN_FRACTION,
    _excitation_fluence_photons,
    depth_profile,
    probe_mu_a_per_cm,
)
from probeplan.model.tissue import Tissue, tissue_preset


@pytest.fixture(scope="module")
def nir2():
    return dict(
        probe=dots.make_probe("PbS", 1300.0),
        source=optics.Laser(808.0),
        emission_filter=optics.Longpass(1100.0),
        camera=optics.camera("ingaas"),
        lens=optics.Lens(4.0, 0.1),
    )


def _nir2_profile(nir2, **kw):
    args = dict(irradiance_mw_per_cm2=10.0, exposure_s=0.01, depth_mm=[1.0, 3.0, 6.0], target_size_mm=2.0,
                concentration_uM=1.0, uptake_ratio=5.0, warn=False)
    args.update(kw)
    tissue = args.pop("tissue", tissue_preset("soft tissue"))
    return depth_profile(tissue, nir2["probe"], source=nir2["source"], emission_filter=nir2["emission_filter"],
                         camera=nir2["camera"], lens=nir2["lens"], **args)


def test_probe_absorption_is_ln10_epsilon_c(nir2):
    # [IUPAC]: mu_a = ln(10) * epsilon * c, epsilon in M^-1 cm^-1 and c in M.
    probe = nir2["probe"]
    eps = float(probe.molar_extinction_per_M_cm(808.0))
    assert float(probe_mu_a_per_cm(probe, 808.0, 0.2)) == pytest.approx(math.log(10.0) * eps * 0.2e-6, rel=1e-12)
    # Beyond the first exciton (the Stokes-shifted emission side) the model says nothing: taken as 0.
    assert float(probe_mu_a_per_cm(probe, probe.exciton_peak_nm + 20.0, 1.0)) == 0.0
    for bad in (float("nan"), -1.0):
        with pytest.raises(InputError):
            probe_mu_a_per_cm(probe, bad, 1.0)
    with pytest.raises(InputError, match="concentration_uM"):
        probe_mu_a_per_cm(probe, 808.0, float("inf"))


def test_background_uptake_lowers_the_fluence_as_a_higher_mu_a_does(nir2):
    # [FPW92]: the fluence at depth is that of a tissue whose mu_a carries the probe's absorption too.
    tissue = tissue_preset("soft tissue")
    probe = nir2["probe"]
    depth = np.array([3.0])
    with_probe = _excitation_fluence_photons(tissue, nir2["source"], 10.0, depth, ((probe, 0.2),))[0]
    without = _excitation_fluence_photons(tissue, nir2["source"], 10.0, depth)[0]
    added = float(probe_mu_a_per_cm(probe, 808.0, 0.2))
    mu_a, mu_sp = tissue.mu_a_per_cm(808.0), tissue.mu_s_prime_per_cm(808.0)
    expected = (transport.broad_beam_fluence(3.0, mu_a + added, mu_sp, 1.4)
                / transport.broad_beam_fluence(3.0, mu_a, mu_sp, 1.4))
    # the laser's narrow line is integrated over 15 wavelengths: equal to the 808 nm ratio within 0.5 %
    assert with_probe / without == pytest.approx(float(expected), rel=5e-3)
    assert with_probe < without


def test_one_micromolar_pbs_background_rivals_the_tissue_at_808nm_and_warns(nir2):
    # At 1 uM in the target and an uptake ratio of 5, the background probe (0.2 uM) absorbs about as
    # much as soft tissue at 808 nm: more than the 10 % that triggers the warning.
    tissue_mu_a = float(tissue_preset("soft tissue").mu_a_per_cm(808.0))
    probe_mu_a = float(probe_mu_a_per_cm(nir2["probe"], 808.0, 0.2))
    assert probe_mu_a / tissue_mu_a > PROBE_ABSORPTION_WARN_FRACTION
    with pytest.warns(ProbeAbsorptionWarning, match="raises the tissue's absorption"), warnings.catch_warnings():
        warnings.simplefilter("ignore", ModelValidityWarning)  # diffusion's own validity: not what this checks
        p = _nir2_profile(nir2, warn=True)
    assert p.probe_absorption_fraction == pytest.approx(probe_mu_a / tissue_mu_a, rel=0.05)
    off = _nir2_profile(nir2, probe_absorption=False)
    # the deeper the target, the more the probe's own absorption costs
    ratio = p.signal_e / off.signal_e
    assert np.all(ratio < 1.0) and ratio[-1] < ratio[0]


def test_dilute_probe_does_not_warn(nir2):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ModelValidityWarning)  # shallow depths: not what this checks
        warnings.simplefilter("error", ProbeAbsorptionWarning)
        p = _nir2_profile(nir2, concentration_uM=0.001, warn=True)
    assert p.probe_absorption_fraction < PROBE_ABSORPTION_WARN_FRACTION


def test_pbs_1300_spectrum_moves_blue_with_depth(nir2):
    # [S81]: water absorbs ~1.35 cm^-1 at 1300 nm and ~31 cm^-1 at 1450 nm, so the red side of a 1300 nm
    # emission is lost faster with depth: the escaping spectrum moves towards the blue (negative shift).
    water = Tissue("watery", blood_fraction=0.0, saturation=0.0, water_fraction=0.8, a_per_cm=10.0, b=1.0)
    p = _nir2_profile(nir2, tissue=water, depth_mm=[1.0, 4.0, 8.0], probe_absorption=False)
    assert p.spectral_shift_nm[0] > p.spectral_shift_nm[1] > p.spectral_shift_nm[2]
    assert p.spectral_shift_nm[2] < 0
    assert any("towards the blue" in n for n in p.notes)
    assert all("red-shift" not in n for n in p.notes)


def test_orange_probe_under_blood_moves_red_with_depth():
    # [P99]: haemoglobin absorbs far more at 600 nm than at 660 nm: the shift is positive (towards the red).
    probe = dots.make_probe("CdSe", 630.0, fwhm_nm=40.0)
    bloody = Tissue("bloody", blood_fraction=0.05, saturation=0.7, water_fraction=0.7, a_per_cm=15.0, b=1.2)
    p = depth_profile(bloody, probe, source=optics.Laser(532.0), irradiance_mw_per_cm2=10.0,
                      emission_filter=optics.Longpass(560.0), camera=optics.camera("si-back"),
                      lens=optics.Lens(4.0, 0.1), exposure_s=0.01, depth_mm=[1.0, 3.0, 6.0], warn=False,
                      probe_absorption=False)
    assert 0 < p.spectral_shift_nm[0] < p.spectral_shift_nm[2]
    assert any("towards the red" in n for n in p.notes)


def test_binned_full_well_digital_and_charge():
    si = optics.camera("si-back")  # digital binning
    assert si.with_binning(2).binned_full_well_e == 4 * si.full_well_e
    ccd = optics.camera("si-front")  # charge binning with an output node twice the pixel well
    assert ccd.output_node_full_well_e == 2 * ccd.full_well_e
    assert ccd.with_binning(1).binned_full_well_e == ccd.full_well_e
    assert ccd.with_binning(4).binned_full_well_e == ccd.output_node_full_well_e  # min(16 x well, node)
    from dataclasses import replace
    unknown = replace(ccd, output_node_full_well_e=None).with_binning(4)
    assert unknown.binned_full_well_e == ccd.full_well_e
    assert "conservatively" in unknown.binned_full_well_note


def test_saturation_uses_the_binned_pixel(nir2):
    cam = optics.camera("si-back").with_binning(4)
    probe = dots.make_probe("CdTe", 700.0)
    p = depth_profile(tissue_preset("soft tissue"), probe, source=optics.Laser(640.0), irradiance_mw_per_cm2=100.0,
                      emission_filter=optics.parse_filter("700/30"), camera=cam, lens=optics.Lens(4.0, 0.1),
                      exposure_s=1.0, depth_mm=[0.5, 2.0, 8.0], warn=False)
    assert p.full_well_e == 16 * cam.full_well_e
    np.testing.assert_array_equal(p.saturated, p.signal_e + p.background_e > 16 * cam.full_well_e)
