"""Tests of dot sizing, extinction, absorption at the excitation wavelength, emission, probes and doses."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.integrate import quad

from probeplan.model import dots
from probeplan.errors import AssumptionWarning, InputError, ModelValidityWarning
from probeplan.model.spectra import Spectrum

HC = 1239.84  # eV nm, the value docs/sources.md uses for the PbS worked point
SIZED = ("CdSe", "CdTe", "CdS", "PbS", "PbSe")


# ---------------------------------------------------------------- published sizing points


def test_cdse_worked_point_yu2003():
    # Yu et al., Chem. Mater. 15, 2854 (2003): CdSe, 550 nm -> D = 3.04 nm, eps = 1.115e5 M^-1 cm^-1
    d = dots.diameter_nm("CdSe", 550.0)
    assert round(d, 2) == 3.04
    assert dots.extinction_coefficient("CdSe", d) == pytest.approx(1.115e5, rel=1e-3)


def test_cdte_point_from_yu2003_formula():
    # Yu et al. 2003 CdTe: D = 9.8127e-7 l^3 - 1.7147e-3 l^2 + 1.0064 l - 194.84; eps = 10043 D^2.12.
    # Computed here from the published coefficients at 650 nm: D = 4.3405 nm, eps = 2.2566e5.
    lam = 650.0
    d_ref = 9.8127e-7 * lam**3 - 1.7147e-3 * lam**2 + 1.0064 * lam - 194.84
    assert d_ref == pytest.approx(4.3405, abs=1e-4)
    assert dots.diameter_nm("CdTe", lam) == pytest.approx(d_ref, rel=1e-12)
    assert dots.extinction_coefficient("CdTe", d_ref) == pytest.approx(10043 * d_ref**2.12, rel=1e-12)
    assert dots.extinction_coefficient("CdTe", d_ref) == pytest.approx(2.2566e5, rel=1e-4)


def test_cds_point_from_yu2003_formula():
    # Yu et al. 2003 CdS: D = -6.6521e-8 l^3 + 1.9557e-4 l^2 - 9.2352e-2 l + 13.29; eps = 21536 D^2.3.
    # Computed here at 400 nm: D = 3.3831 nm, eps = 3.5528e5.
    lam = 400.0
    d_ref = -6.6521e-8 * lam**3 + 1.9557e-4 * lam**2 - 9.2352e-2 * lam + 13.29
    assert d_ref == pytest.approx(3.3831, abs=1e-4)
    assert dots.diameter_nm("CdS", lam) == pytest.approx(d_ref, rel=1e-12)
    assert dots.extinction_coefficient("CdS", d_ref) == pytest.approx(21536 * d_ref**2.3, rel=1e-12)
    assert dots.extinction_coefficient("CdS", d_ref) == pytest.approx(3.5528e5, rel=1e-4)


def test_pbs_worked_point_moreels2009():
    # Moreels et al., ACS Nano 3, 3023 (2009): E0 = 0.41 + 1/(0.0252 d^2 + 0.283 d); 1300 nm -> d = 4.61 nm
    assert dots.diameter_nm("PbS", 1300.0) == pytest.approx(4.61, abs=0.005)
    d = 4.61
    assert dots.exciton_peak_nm("PbS", d) == pytest.approx(HC / (0.41 + 1 / (0.0252 * d**2 + 0.283 * d)), rel=1e-5)


def test_pbse_point_moreels2007():
    # Moreels et al., Chem. Mater. 19, 6101 (2007): E0 = 0.278 + 1/(0.016 d^2 + 0.209 d + 0.45).
    # Computed here at d = 5 nm: E0 = 0.278 + 1/1.895 = 0.80570 eV -> 1538.8 nm.
    e0 = 0.278 + 1.0 / (0.016 * 25 + 0.209 * 5 + 0.45)
    assert e0 == pytest.approx(0.80570, abs=1e-5)
    assert dots.exciton_peak_nm("PbSe", 5.0) == pytest.approx(HC / e0, rel=1e-5)
    assert dots.diameter_nm("PbSe", HC / e0) == pytest.approx(5.0, rel=1e-5)


def test_pbs_extinction_scaling_moreels2009():
    # Moreels et al. 2009: eps at the gap ~ d^1.3; at 400 nm ~ d^3 (prefactor 0.0233 per uM per cm, from memory)
    ratio = dots.extinction_coefficient("PbS", 6.0) / dots.extinction_coefficient("PbS", 4.0)
    assert ratio == pytest.approx(1.5**1.3, rel=1e-12)
    eps400 = dots.molar_extinction_at("PbS", 5.0, 400.0)
    assert eps400 == pytest.approx(0.0233 * 5.0**3 * 1e6, rel=1e-12)
    assert dots.molar_extinction_at("PbS", 6.0, 400.0) / dots.molar_extinction_at("PbS", 4.0, 400.0) == pytest.approx(
        1.5**3
    )


# ---------------------------------------------------------------- round trips and monotonicity


@pytest.mark.parametrize("material", SIZED)
def test_round_trip_diameter_peak(material):
    # inverse functions: diameter -> peak -> diameter (common practice, no source)
    props = dots.material_properties(material)
    if "valid_diameter_nm" in props:
        lo, hi = props["valid_diameter_nm"]["value"]
    else:
        lo, hi = (dots.diameter_nm(material, x) for x in props["valid_exciton_peak_nm"]["value"])
    d = np.linspace(lo, hi, 24).reshape(4, 6)
    peak = dots.exciton_peak_nm(material, d)
    assert peak.shape == (4, 6)
    np.testing.assert_allclose(dots.diameter_nm(material, peak), d, rtol=1e-9)


@settings(max_examples=40, deadline=None)
@given(st.floats(450.0, 650.0))
def test_round_trip_peak_diameter_cdse(peak):
    d = dots.diameter_nm("CdSe", peak)
    assert dots.exciton_peak_nm("CdSe", d) == pytest.approx(peak, abs=1e-6)


@pytest.mark.parametrize("material", SIZED)
def test_peak_and_extinction_rise_with_diameter(material):
    # Rule of thumb (common practice, stated in the trade): larger dots emit redder; Yu 2003 and Moreels
    # 2009: epsilon at the first exciton rises with size.
    lo, hi = (dots.diameter_nm(material, x) for x in _peak_span(material))
    d = np.linspace(lo, hi, 50)
    peaks = dots.exciton_peak_nm(material, d)
    assert np.all(np.diff(peaks) > 0)
    assert np.all(np.diff(dots.emission_peak_from_exciton_nm(material, peaks)) > 0)
    assert np.all(np.diff(dots.extinction_coefficient(material, d)) > 0)


def _peak_span(material):
    props = dots.material_properties(material)
    if "valid_exciton_peak_nm" in props:
        return props["valid_exciton_peak_nm"]["value"]
    return [dots.exciton_peak_nm(material, x) for x in props["valid_diameter_nm"]["value"]]


def test_stokes_shift_round_trip_and_direction():
    # the emission peak lies to the red of the absorption peak (Stokes shift; common practice)
    em = dots.emission_peak_from_exciton_nm("CdSe", 550.0)
    assert em > 550.0
    assert dots.exciton_peak_from_emission_nm("CdSe", em) == pytest.approx(550.0, rel=1e-12)
    # 30 meV at 550 nm: 1239.84/(2.25426 - 0.030) = 557.4 nm (computed by hand)
    assert em == pytest.approx(557.4, abs=0.05)


# ---------------------------------------------------------------- validity policy


def test_yu_polynomial_refuses_outside_range():
    with pytest.raises(InputError, match=r"exciton_peak_nm: 700 nm is outside the CdSe .*450-650"):
        dots.diameter_nm("CdSe", 700.0)
    with pytest.raises(InputError, match="diameter_nm"):
        dots.exciton_peak_nm("CdSe", 12.0)
    with pytest.raises(InputError, match="diameter_nm"):
        dots.extinction_coefficient("CdS", 10.0)


def test_lead_curve_warns_outside_measured_and_refuses_beyond_limits():
    with pytest.warns(ModelValidityWarning, match="outside the measured"):
        dots.exciton_peak_nm("PbS", 2.5)
    with pytest.raises(InputError, match="outside the diameters"):
        dots.exciton_peak_nm("PbS", 30.0)
    with pytest.raises(InputError, match="bulk PbS band gap"):
        dots.diameter_nm("PbS", 3100.0)


def test_unknown_material_did_you_mean():
    with pytest.raises(InputError, match=r"unknown material 'CdSee'; did you mean 'CdSe'\?"):
        dots.diameter_nm("CdSee", 550)
    with pytest.raises(InputError, match="did you mean 'CuInS2'"):
        dots.make_probe("CuInS", 700)
    assert dots.diameter_nm("cdse", 550) == dots.diameter_nm("CdSe", 550)  # case-only difference accepted


def test_typical_material_has_no_sizing():
    with pytest.raises(InputError, match="no published sizing curve"):
        dots.diameter_nm("InP", 600)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -5.0, 0.0])
def test_bad_numbers_refused(bad):
    with pytest.raises(InputError):
        dots.exciton_peak_nm("CdSe", bad)


def test_wrong_type_is_type_error():
    with pytest.raises(TypeError):
        dots.diameter_nm(42, 550)
    with pytest.raises(TypeError):
        dots.exciton_peak_nm("CdSe", "three")


# ---------------------------------------------------------------- Beer-Lambert


def test_beer_lambert_worked_example():
    # c = A / (eps l): A = 0.1, eps = 1.115e5 M^-1 cm^-1 (Yu 2003 worked point), l = 1 cm -> 0.897 uM
    assert dots.concentration_uM("CdSe", 550.0, 0.1) == pytest.approx(0.1 / 1.115e5 * 1e6, rel=1e-3)
    # linear in absorbance and inverse in path (Beer-Lambert)
    c = dots.concentration_uM("CdSe", 550.0, np.array([0.05, 0.1, 0.2]), path_cm=np.array([[1.0], [0.5]]))
    assert c.shape == (2, 3)
    np.testing.assert_allclose(c[1], 2 * c[0])
    np.testing.assert_allclose(c[0] / c[0, 0], [1, 2, 4])


def test_beer_lambert_input_checks():
    with pytest.raises(InputError, match="absorbance"):
        dots.concentration_uM("CdSe", 550.0, -0.1)
    with pytest.raises(InputError, match="path_cm"):
        dots.concentration_uM("CdSe", 550.0, 0.1, path_cm=0)
    with pytest.warns(ModelValidityWarning, match="dilute"):
        dots.concentration_uM("CdSe", 550.0, 1.5)  # common practice: keep A below ~1


# ---------------------------------------------------------------- absorption at the excitation wavelength


@pytest.mark.parametrize("material", SIZED)
def test_excitation_extinction_continuous_at_gap_and_rising(material):
    d = dots.diameter_nm(material, np.mean(_peak_span(material)))
    peak = dots.exciton_peak_nm(material, d)
    with pytest.warns(ModelValidityWarning, match="first exciton"):
        at_gap = dots.molar_extinction_at(material, d, peak)
    assert at_gap == pytest.approx(dots.extinction_coefficient(material, d), rel=1e-9)
    e = np.linspace(dots.HC_EV_NM / peak + 0.15, dots.HC_EV_NM / 300.0, 30)
    eps = dots.molar_extinction_at(material, d, dots.HC_EV_NM / e)
    assert np.all(np.diff(eps) >= 0) and eps[-1] > eps[0]


def test_excitation_below_gap_refused():
    with pytest.raises(InputError, match="longer than the CdSe first-exciton peak"):
        dots.molar_extinction_at("CdSe", 3.04, 600.0)


def test_cdse_ratio_model_reaches_ratio():
    # the stated assumption: 1 eV above the gap, eps = 3.5 x eps at the first exciton
    d = 3.04
    e_gap = dots.HC_EV_NM / dots.exciton_peak_nm("CdSe", d)
    eps = dots.molar_extinction_at("CdSe", d, dots.HC_EV_NM / (e_gap + 1.0))
    assert eps == pytest.approx(3.5 * dots.extinction_coefficient("CdSe", d), rel=1e-9)


# ---------------------------------------------------------------- emission spectrum


@pytest.mark.parametrize(("peak", "fwhm"), [(550.0, 30.0), (800.0, 40.0), (1300.0, 150.0), (1100.0, 250.0)])
def test_emission_unit_area_and_peak(peak, fwhm):
    # Gaussian in energy, unit area per nm (conservation check, checked by scipy quad as an independent integrator)
    area, _ = quad(lambda x: float(dots.emission_spectrum_per_nm(x, peak, fwhm)), 250.0, 2990.0, points=[peak],
                   limit=200)
    assert area == pytest.approx(1.0, abs=1e-6)
    wl = np.arange(peak - 3 * fwhm, peak + 3 * fwhm, 0.01)
    f = dots.emission_spectrum_per_nm(wl, peak, fwhm)
    assert wl[np.argmax(f)] == pytest.approx(peak, abs=0.01)
    above = wl[f >= f.max() / 2]
    assert above[-1] - above[0] == pytest.approx(fwhm, rel=0.02)  # FWHM converted at the peak


def test_emission_red_tail_longer_in_wavelength():
    # a Gaussian in energy is skewed to long wavelengths when plotted per nm
    wl = np.arange(1000.0, 1700.0, 0.1)
    f = dots.emission_spectrum_per_nm(wl, 1300.0, 200.0)
    half = wl[f >= f.max() / 2]
    assert (half[-1] - 1300.0) > (1300.0 - half[0])


def test_probe_with_measured_emission_is_unit_area():
    wl = np.arange(1000.0, 1601.0, 5.0)
    measured = Spectrum(wl, np.exp(-0.5 * ((wl - 1300) / 40) ** 2) * 123.0, "lot 7", "a.u.", "emission")
    p = dots.make_probe("PbS", 1300.0, emission=measured)
    grid = np.arange(900.0, 1700.0, 1.0)
    assert np.trapezoid(p.emission_per_nm(grid), grid) == pytest.approx(1.0, rel=1e-3)
    with pytest.raises(InputError, match="kind='emission'"):
        dots.make_probe("PbS", 1300.0, emission=Spectrum(wl, np.ones_like(wl), "x", kind="other"))


# ---------------------------------------------------------------- probes


def test_probe_brightness_is_eps_times_qy():
    p = dots.make_probe("CdSe", 600.0, quantum_yield=0.6)
    d = p.diameter_nm
    assert p.exciton_peak_nm == pytest.approx(dots.exciton_peak_from_emission_nm("CdSe", 600.0))
    eps = dots.molar_extinction_at("CdSe", d, 405.0)
    assert p.brightness(405.0) == pytest.approx(0.6 * eps)
    assert p.heavy_metal == "Cd"
    assert p.name == "CdSe 600 nm"


def test_probe_extinction_override():
    p = dots.make_probe("CdSe", 600.0, extinction_at_excitation_per_M_cm=4.0e5, name="red dot")
    assert p.molar_extinction_per_M_cm(488.0) == 4.0e5
    np.testing.assert_array_equal(p.molar_extinction_per_M_cm([405.0, 488.0]), [4.0e5, 4.0e5])
    assert p.name == "red dot"


def test_typical_material_probe_warns_assumption():
    p = dots.make_probe("Ag2S", 1100.0)
    assert p.heavy_metal is None and p.diameter_nm is None
    with pytest.warns(AssumptionWarning, match="typical epsilon"):
        assert p.molar_extinction_per_M_cm(808.0) == 2e5
    with pytest.raises(InputError, match="absorption edge"):
        p.molar_extinction_per_M_cm(1200.0)


def test_make_probe_refuses_out_of_range_peak_and_unknown_setting():
    with pytest.raises(InputError, match=r"emission_peak_nm: 900 nm is outside the CdSe emission range"):
        dots.make_probe("CdSe", 900.0)
    with pytest.raises(InputError, match="did you mean 'quantum_yield'"):
        dots.make_probe("CdSe", 600.0, quantum_yeild=0.5)
    with pytest.raises(InputError, match="quantum_yield"):
        dots.make_probe("CdSe", 600.0, quantum_yield=1.5)


def test_probe_is_frozen():
    p = dots.make_probe("PbS", 1300.0)
    with pytest.raises(AttributeError):
        p.quantum_yield = 0.9  # type: ignore[misc]


# ---------------------------------------------------------------- table and doses


def test_list_materials_and_heavy_metal_flags():
    rows = {r["name"]: r for r in dots.list_materials()}
    assert {"CdSe", "CdTe", "CdS", "PbS", "PbSe", "CdTeSe", "CuInS2", "InP", "InAs", "Ag2S"} <= set(rows)
    assert rows["PbS"]["heavy_metal"] == "Pb" and rows["CdTeSe"]["heavy_metal"] == "Cd"
    assert rows["InP"]["heavy_metal"] is None
    assert rows["InP"]["kind"] == "typical" and "no sizing" in rows["InP"]["source"]
    assert "Yu" in rows["CdSe"]["source"] and "Moreels" in rows["PbS"]["source"]


def test_material_properties_is_a_copy():
    p = dots.material_properties("CdSe")
    p["extinction_prefactor"]["value"] = 1.0
    assert dots.extinction_coefficient("CdSe", 3.04) == pytest.approx(1.115e5, rel=1e-3)


def test_every_table_value_has_a_source():
    for name in dots.material_names():
        for key, item in dots.material_properties(name).items():
            if isinstance(item, dict):
                assert item.get("source"), f"{name}.{key} has no source"


def test_dose_volume_worked_example():
    # by hand: 100 nmol/kg x 0.025 kg = 2.5 nmol; a 2 uM stock holds 2 nmol/mL -> 1.25 mL = 1250 uL
    assert dots.dose_volume_ul(100.0, 25.0, 2.0) == pytest.approx(1250.0)
    assert dots.dose_nmol_per_kg(1250.0, 25.0, 2.0) == pytest.approx(100.0)
    v = dots.dose_volume_ul(np.array([50.0, 100.0]), 20.0, 4.0)
    np.testing.assert_allclose(dots.dose_nmol_per_kg(v, 20.0, 4.0), [50.0, 100.0])
    with pytest.raises(InputError, match="body_mass_g"):
        dots.dose_volume_ul(100.0, 0.0, 2.0)
