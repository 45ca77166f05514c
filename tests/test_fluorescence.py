"""The forward model at depth: signal, backgrounds, SBR/SNR, blur and the escaping spectrum."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.constants as const
from scipy import integrate

from probeplan.errors import InputError
from probeplan.model import dots, optics, transport
from probeplan.model.fluorescence import (
    Autofluorescence,
    depth_at_threshold,
    depth_profile,
    disc_escape_fraction,
    photons_per_s_per_mw,
    probe_rate_e_per_s,
)
from probeplan.model.tissue import Tissue, tissue_preset


@pytest.fixture(scope="module")
def setup():
    return dict(
        probe=dots.make_probe("CdTe", 700.0),
        source=optics.Laser(640.0),
        emission_filter=optics.parse_filter("700/30"),
        camera=optics.camera("si-deep-depletion").with_binning(2),
        lens=optics.Lens(4.0, 0.1),
    )


def _profile(setup, **kw):
    args = dict(irradiance_mw_per_cm2=10.0, exposure_s=0.01, depth_mm=np.linspace(0.5, 8, 31),
                target_size_mm=3.0, concentration_uM=0.2, uptake_ratio=5.0, warn=False)
    args.update(kw)
    probe = args.pop("probe", setup["probe"])
    tissue = args.pop("tissue", tissue_preset("soft tissue"))
    emission_filter = args.pop("emission_filter", setup["emission_filter"])
    return depth_profile(tissue, probe, source=setup["source"], emission_filter=emission_filter,
                         camera=setup["camera"], lens=setup["lens"], **args)


def test_photon_rate_against_scipy_constants():
    # E = h c / lambda (CODATA, via scipy.constants): photons per second in 1 mW at 800 nm.
    expected = 1e-3 / (const.h * const.c / 800e-9)
    assert float(photons_per_s_per_mw(800.0)) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(("radius", "depth", "mu_a", "mu_sp"), [(1.0, 2.0, 0.1, 10.0), (3.0, 5.0, 0.3, 12.0),
                                                                (0.5, 1.0, 0.05, 20.0)])
def test_disc_escape_equals_integral_of_farrell_exitance(radius, depth, mu_a, mu_sp):
    # Closed form against numerical integration (scipy.integrate.quad) of the image-source surface flux
    # of Farrell, Patterson & Wilson 1992 as implemented in probeplan.model.transport.
    def integrand(rho):
        return 2 * math.pi * rho * float(transport.point_source_exitance_per_mm2(rho, depth, mu_a, mu_sp, model="diffusion"))

    numeric, _ = integrate.quad(integrand, 0.0, radius, limit=200)
    assert float(disc_escape_fraction(radius, depth, mu_a, mu_sp, model="diffusion")) == pytest.approx(numeric, rel=1e-6)


@pytest.mark.parametrize("model", ["diffusion", "mc_table"])
def test_disc_escape_tends_to_total_escape(model):
    total = transport.point_source_escape(np.array([1.0, 4.0]), 0.2, 10.0, model=model)
    np.testing.assert_allclose(disc_escape_fraction(np.inf, np.array([1.0, 4.0]), 0.2, 10.0, model=model), total,
                               rtol=1e-12)


@pytest.mark.parametrize(("depth", "mu_a", "mu_sp"), [(2.0, 1.03, 5.53), (5.0, 0.3, 8.0)])
def test_small_disc_escape_is_area_times_on_axis_exitance(depth, mu_a, mu_sp):
    # With the Monte Carlo tables a small disc must get the tables' on-axis exitance (pi r^2 J(0)):
    # the blend in disc_escape_fraction is exact in that limit.
    r = 1e-3 * depth
    j0 = float(transport.point_source_exitance_per_mm2(0.0, depth, mu_a, mu_sp))
    assert float(disc_escape_fraction(r, depth, mu_a, mu_sp)) == pytest.approx(math.pi * r**2 * j0, rel=1e-4)


def test_signal_is_linear_in_concentration_and_irradiance(setup):
    kw = dict(source=setup["source"], emission_filter=setup["emission_filter"], camera=setup["camera"],
              lens=setup["lens"], depth_mm=[1.0, 3.0])
    a = probe_rate_e_per_s(tissue_preset("soft tissue"), setup["probe"], irradiance_mw_per_cm2=10.0, concentration_uM=0.1, **kw)
    b = probe_rate_e_per_s(tissue_preset("soft tissue"), setup["probe"], irradiance_mw_per_cm2=20.0, concentration_uM=0.3, **kw)
    np.testing.assert_allclose(b, 6.0 * a, rtol=1e-12)


def test_snr_and_sbr_follow_their_definitions(setup):
    p = _profile(setup)
    b = p.background_e
    np.testing.assert_allclose(p.sbr, (p.signal_e + b) / b)
    np.testing.assert_allclose(p.contrast, p.signal_e / b)
    np.testing.assert_allclose(p.snr, p.signal_e / np.sqrt(p.signal_e + b + p.read_noise_e**2))
    assert np.all(np.diff(p.signal_e) < 0)  # deeper targets are dimmer
    assert np.all(np.diff(p.blur_fwhm_mm) > 0)  # and blurrier
    assert any("breaks the surface" in n for n in p.notes)


def test_sliced_sphere_tends_to_a_point_source_for_a_small_deep_target(setup):
    # A target much smaller than its depth acts as a point source: the exitance above it per emitted
    # photon equals the image-source point exitance at rho = 0 (Farrell, Patterson & Wilson 1992).
    from probeplan.model.fluorescence import M_PER_UM, _excitation_fluence_photons
    from probeplan.model.tissue import optical_properties, tissue_preset

    tissue = tissue_preset("soft tissue")
    size, depth, conc = 0.2, 6.0, 1.0
    # The probe's own absorption is switched off: this checks the geometry against the point source.
    p = _profile(setup, depth_mm=[depth], target_size_mm=size, concentration_uM=conc, uptake_ratio=1e9,
                 probe_absorption=False)
    wl = p.wavelength_nm
    fluence = _excitation_fluence_photons(tissue, setup["source"], 10.0, np.array([depth]))[0]
    eps = float(setup["probe"].molar_extinction_per_M_cm(640.0))
    emitted = setup["probe"].quantum_yield * math.log(10) * eps * conc * M_PER_UM * fluence * math.pi / 6 * (size / 10) ** 3
    mu_a, mu_sp = optical_properties(tissue, wl)
    point = emitted * transport.point_source_exitance_per_mm2(0.0, depth, mu_a, mu_sp, 1.4) * setup["probe"].emission_per_nm(wl)
    # 2 %: the transport factor is evaluated every 4 nm and interpolated (steepest near haemoglobin's 600 nm edge)
    np.testing.assert_allclose(p.escaped_spectrum[0], point, rtol=0.02, atol=1e-12 * point.max())


def test_coarse_transport_grid_matches_a_1nm_evaluation(setup, monkeypatch):
    # The 4 nm evaluation of the target's transport, interpolated onto the 1 nm grid, changes the detected
    # signal by well under 1 % against evaluating it at every nm (a numerical check of our own).
    import probeplan.model.fluorescence as fl

    coarse = _profile(setup)
    monkeypatch.setattr(fl, "_TRANSPORT_STEP_NM", 1.0)
    fine = _profile(setup)
    np.testing.assert_allclose(coarse.signal_e, fine.signal_e, rtol=2e-3)


def test_depth_at_threshold_interpolates(setup):
    p = _profile(setup)
    d = depth_at_threshold(p, 1.2)
    i = int(np.nonzero(p.sbr < 1.2)[0][0])
    assert p.depth_mm[i - 1] <= d <= p.depth_mm[i]
    assert depth_at_threshold(p, 1.0) == math.inf
    assert depth_at_threshold(p, 1e6) == 0.0


def test_background_scales_with_uptake_ratio_and_autofluorescence_switch(setup):
    # Without the probe's own absorption the uptake background is linear in the background concentration.
    base = _profile(setup, uptake_ratio=5.0, probe_absorption=False)
    half = _profile(setup, uptake_ratio=10.0, probe_absorption=False)
    assert half.uptake_background_e == pytest.approx(base.uptake_background_e / 2, rel=1e-9)
    # With it, the probe also shades itself: doubling the uptake less than doubles the background.
    base_abs = _profile(setup, uptake_ratio=5.0)
    half_abs = _profile(setup, uptake_ratio=10.0)
    assert half_abs.uptake_background_e > base_abs.uptake_background_e / 2
    off = _profile(setup, autofluorescence=Autofluorescence(0.0))
    assert off.autofluorescence_e == 0.0 and base.autofluorescence_e > 0


def test_leakage_follows_blocking_od(setup):
    # Excitation 640 nm lies far outside a 700/30 band: transmission there is the 10^-OD floor.
    od6 = _profile(setup, emission_filter=optics.Bandpass(700.0, 30.0, blocking_od=6.0))
    od4 = _profile(setup, emission_filter=optics.Bandpass(700.0, 30.0, blocking_od=4.0))
    assert od4.leakage_e / od6.leakage_e == pytest.approx(100.0, rel=1e-3)


def test_escaping_spectrum_red_shifts_with_depth(setup):
    # Haemoglobin absorbs far more at 600 nm than at 660 nm (Prahl's table), so the escaping
    # spectrum of an orange-red probe moves to longer wavelengths as the target goes deeper.
    probe = dots.make_probe("CdSe", 630.0, fwhm_nm=40.0)
    bloody = Tissue("bloody", blood_fraction=0.05, saturation=0.7, water_fraction=0.7, a_per_cm=15.0, b=1.2)
    p = depth_profile(
        bloody, probe, source=optics.Laser(532.0), irradiance_mw_per_cm2=10.0, emission_filter=optics.Longpass(560.0),
        camera=setup["camera"], lens=setup["lens"], exposure_s=0.01, depth_mm=[1.0, 3.0, 6.0], warn=False)
    assert p.escaped_peak_nm[0] < p.escaped_peak_nm[1] < p.escaped_peak_nm[2]


@pytest.mark.parametrize(
    ("kw", "match"),
    [
        ({"depth_mm": [-1.0, 2.0]}, "depth_mm"),
        ({"depth_mm": [float("nan")]}, "NaN"),
        ({"uptake_ratio": 0.5}, "uptake_ratio"),
        ({"exposure_s": 0.0}, "exposure_s"),
        ({"irradiance_mw_per_cm2": float("nan")}, "irradiance"),
    ],
)
def test_bad_input_refused(setup, kw, match):
    with pytest.raises(InputError, match=match):
        _profile(setup, **kw)


def test_a_tissue_name_is_refused_inside_the_model(setup):
    # model functions take objects; names are resolved at the edges (probeplan.catalog, the top level)
    with pytest.raises(TypeError, match=r"probeplan\.tissue\('skn'\)"):
        _profile(setup, tissue="skn")


def test_depth_profile_from_a_channel_equals_its_parts(setup):
    # the channel carries source, filter, camera, lens and exposure: the same numbers as passing them one by one
    ch = optics.Channel("700", setup["source"], setup["emission_filter"], setup["camera"], setup["lens"], 0.01)
    tissue = tissue_preset("soft tissue")
    by_parts = _profile(setup)
    by_channel = depth_profile(tissue, setup["probe"], ch, irradiance_mw_per_cm2=10.0, depth_mm=np.linspace(0.5, 8, 31),
                               target_size_mm=3.0, concentration_uM=0.2, uptake_ratio=5.0, warn=False)
    np.testing.assert_array_equal(by_channel.sbr, by_parts.sbr)
    np.testing.assert_array_equal(by_channel.snr, by_parts.snr)
    with pytest.raises(InputError, match="source, emission_filter, camera, lens, exposure_s: not given"):
        depth_profile(tissue, setup["probe"], irradiance_mw_per_cm2=10.0, depth_mm=[1.0])
