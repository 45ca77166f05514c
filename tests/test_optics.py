"""Tests of filters, sources, cameras, the lens and channels."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import quad

from probeplan.model import optics
from probeplan.errors import InputError
from probeplan.model.spectra import Spectrum

# ---------------------------------------------------------------- parameterised filters


def test_bandpass_half_maximum_at_band_edges_and_floor():
    f = optics.Bandpass(820.0, 40.0, peak_transmission=0.9, edge_width_nm=4.0, blocking_od=6.0)
    floor = 1e-6
    half = floor + (0.9 - floor) / 2
    # FWHM definition: half of the peak at centre -/+ FWHM/2 (edges 40 nm apart, 4 nm wide: product ~ 1 there)
    np.testing.assert_allclose(f.transmission([800.0, 840.0]), half, rtol=1e-6)
    assert f.transmission(820.0) == pytest.approx(0.9, rel=1e-6)
    # out of band the transmission is floored at 10^-OD (blocking OD definition)
    np.testing.assert_allclose(f.transmission([500.0, 1200.0]), floor, rtol=1e-9)


def test_logistic_edge_is_10_90_over_edge_width():
    # 10-90 % edge width: the logistic goes from 10 % to 90 % over 2 s ln 9 (definition used by the module)
    f = optics.Longpass(1000.0, peak_transmission=1.0, edge_width_nm=10.0, blocking_od=12)
    np.testing.assert_allclose(f.transmission([995.0, 1000.0, 1005.0]), [0.1, 0.5, 0.9], rtol=1e-9)
    s = optics.Shortpass(750.0, peak_transmission=1.0, edge_width_nm=10.0, blocking_od=12)
    np.testing.assert_allclose(s.transmission([745.0, 755.0]), [0.9, 0.1], rtol=1e-9)


def test_bandpass_equivalent_width_closed_form():
    # Closed form (derived for the logistic edges): sigma(x) - sigma(x - c) = sigma(x) sigma(c - x) (1 - e^-c),
    # so int sigma((l - lo)/s) sigma((hi - l)/s) dl = w / (1 - exp(-w/s)), w = hi - lo.  Plus the floor times
    # the span (the band product is negligible at the span's ends).
    w, edge, od, tp = 40.0, 6.0, 5.0, 0.9
    s = edge / (2 * math.log(9))
    f = optics.Bandpass(800.0, w, peak_transmission=tp, edge_width_nm=edge, blocking_od=od)
    lo, hi = 600.0, 1000.0
    floor = 10.0**-od
    expected = floor * (hi - lo) + (tp - floor) * w / (1 - math.exp(-w / s))
    assert optics.equivalent_width_nm(f, lo, hi) == pytest.approx(expected, rel=1e-7)


def test_flat_spectrum_through_filter_integrates_to_equivalent_width():
    # a flat spectrum (1 per nm) through the filter gives the filter's equivalent width (definition)
    f = optics.parse_filter("840/40")
    wl = np.arange(700.0, 1000.001, 0.05)
    flat = Spectrum(wl, np.ones_like(wl), "flat", "1/nm", "emission")
    through = Spectrum(wl, flat.values * f.transmission(wl), "through", "1/nm", "emission")
    assert through.integrate() == pytest.approx(optics.equivalent_width_nm(f, 700.0, 1000.0), rel=1e-9)
    assert through.integrate() == pytest.approx(0.93 * 40.0, rel=0.01)


def test_dichroic_reflection_plus_transmission_is_one():
    d = optics.Dichroic(900.0, reflect="short")
    wl = np.linspace(700, 1100, 81)
    np.testing.assert_allclose(d.reflection(wl) + d.transmission(wl), 1.0)
    long = optics.Dichroic(900.0, reflect="long")
    assert long.transmission(800.0) > 0.9 and long.reflection(1000.0) > 0.9


def test_filter_stack_multiplies():
    a, b = optics.Longpass(1000.0), optics.Shortpass(1400.0)
    stack = optics.FilterStack((a, b))
    wl = np.array([950.0, 1200.0, 1500.0])
    np.testing.assert_allclose(stack.transmission(wl), a.transmission(wl) * b.transmission(wl))


def test_filter_arrays_keep_shape():
    f = optics.Bandpass(700.0, 40.0)
    assert f.transmission(np.full((3, 4), 700.0)).shape == (3, 4)


def test_filter_parameter_checks():
    with pytest.raises(InputError, match="peak_transmission"):
        optics.Bandpass(800.0, 40.0, peak_transmission=1.2)
    with pytest.raises(InputError, match="edge_width_nm"):
        optics.Bandpass(800.0, 10.0, edge_width_nm=20.0)
    with pytest.raises(InputError, match="blocking_od"):
        optics.Longpass(900.0, peak_transmission=0.5, blocking_od=0.1)
    with pytest.raises(TypeError):
        optics.Bandpass("800", 40.0)


# ---------------------------------------------------------------- trade notation


@pytest.mark.parametrize(
    ("text", "cls", "attrs"),
    [
        ("820/40", optics.Bandpass, {"centre_nm": 820.0, "fwhm_nm": 40.0, "blocking_od": 6.0}),
        ("BP 1300/50 OD4", optics.Bandpass, {"centre_nm": 1300.0, "fwhm_nm": 50.0, "blocking_od": 4.0}),
        ("LP 850", optics.Longpass, {"cut_on_nm": 850.0}),
        ("1100LP", optics.Longpass, {"cut_on_nm": 1100.0}),
        ("sp750", optics.Shortpass, {"cut_off_nm": 750.0}),
    ],
)
def test_parse_filter_forms(text, cls, attrs):
    f = optics.parse_filter(text)
    assert isinstance(f, cls)
    for key, value in attrs.items():
        assert getattr(f, key) == value


@pytest.mark.parametrize("text", ["820-40", "LP", "bandpass 800", "820/40/3", ""])
def test_parse_filter_refuses(text):
    with pytest.raises(InputError, match="write centre/FWHM"):
        optics.parse_filter(text)


def test_list_filters_all_parse():
    rows = optics.list_filters()
    assert rows and all(optics.parse_filter(r["name"]).name == r["name"] for r in rows)
    assert all(r["source"] for r in rows)


# ---------------------------------------------------------------- filter CSV


def test_filter_csv_fraction_accepted(tmp_path):
    p = tmp_path / "filters.csv"
    p.write_text("# bench measurement\nwavelength_nm,em_1300\n1200,0.001\n1300,0.9\n1400,0.001\n")
    before = p.read_bytes()
    filters = optics.read_filter_csv(p)
    assert filters["em_1300"].transmission(1300.0) == pytest.approx(0.9)
    assert filters["em_1300"].transmission(1100.0) == 0.0  # outside the table: zero (spectra rule)
    assert p.read_bytes() == before  # input never modified


def test_filter_csv_percent_refused(tmp_path):
    p = tmp_path / "pct.csv"
    p.write_text("wavelength_nm,em\n700,1.0\n800,92.5\n900,1.0\n")
    with pytest.raises(InputError, match="look like percent; divide by 100"):
        optics.read_filter_csv(p)
    q = tmp_path / "pct_unit.csv"
    q.write_text("wavelength_nm,em [%]\n700,0.1\n800,0.9\n900,0.1\n")
    with pytest.raises(InputError, match="percent; divide by 100"):
        optics.read_filter_csv(q)


def test_filter_csv_od_values_without_od_label_refused(tmp_path):
    p = tmp_path / "od.csv"
    p.write_text("wavelength_nm,em\n700,6.0\n800,0.05\n900,6.0\n")
    with pytest.raises(InputError, match="look like optical density.*name the column 'OD'"):
        optics.read_filter_csv(p)


def test_filter_csv_od_column_converted(tmp_path):
    p = tmp_path / "od.csv"
    p.write_text("wavelength_nm,em_OD\n700,6.0\n800,0.0\n900,6.0\n")
    filters = optics.read_filter_csv(p)
    (f,) = filters.values()
    np.testing.assert_allclose(f.transmission([700.0, 800.0]), [1e-6, 1.0])
    q = tmp_path / "od2.csv"
    q.write_text("wavelength_nm,em [OD]\n700,3.0\n800,1.0\n")
    np.testing.assert_allclose(optics.read_filter_csv(q)["em"].transmission(800.0), 0.1)


# ---------------------------------------------------------------- sources


@pytest.mark.parametrize("source", [optics.Laser(808.0, 2.0), optics.LED(730.0, 30.0)])
def test_source_spectrum_unit_area(source):
    wl = np.linspace(source.centre_nm - 200, source.centre_nm + 200, 40001)
    assert np.trapezoid(source.spectrum_per_nm(wl), wl) == pytest.approx(1.0, rel=1e-6)
    assert source.spectral_average(lambda x: x) == pytest.approx(source.centre_nm, abs=1e-6)


def test_source_cleanup_renormalised_and_shifts_mean():
    led = optics.LED(730.0, 40.0, cleanup=optics.Shortpass(730.0, edge_width_nm=4.0))
    wl = np.linspace(500.0, 1000.0, 50001)
    spec = led.spectrum_per_nm(wl)
    assert np.trapezoid(spec, wl) == pytest.approx(1.0, rel=1e-4)
    assert led.spectral_average(lambda x: x) < 730.0  # the clean-up cuts the red half
    assert led.spectrum_per_nm(800.0) < 1e-6


def test_source_checks():
    with pytest.raises(InputError, match="linewidth_nm"):
        optics.Laser(808.0, 0.0)
    with pytest.raises(TypeError):
        optics.Laser(808.0, cleanup="LP 800")


# ---------------------------------------------------------------- cameras


def test_silicon_back_illuminated_qe_figures():
    # docs/sources.md (camera noise): back-illuminated silicon QE > 90 % at 490-700 nm, ~0 by 1100 nm
    cam = optics.camera("si-back")
    assert np.all(cam.qe(np.arange(490.0, 701.0, 5.0)) > 0.9)
    assert cam.qe(1100.0) == pytest.approx(0.0, abs=1e-3)


def test_ingaas_qe_figures():
    # docs/sources.md: InGaAs > 80 % over 960-1600 nm, cut-off about 1.7 um
    cam = optics.camera("ingaas")
    assert np.all(cam.qe(np.arange(960.0, 1601.0, 5.0)) > 0.8)
    assert cam.qe(1750.0) == 0.0 and cam.qe(1800.0) == 0.0
    assert cam.qe(1700.0) < 0.5


def test_every_camera_is_generic_and_physical():
    rows = optics.list_cameras()
    assert {r["name"] for r in rows} == {"si-front", "si-back", "si-deep-depletion", "ingaas", "ingaas-extended"}
    for r in rows:
        assert "generic" in r["description"] and r["source"]
        assert 0 < r["peak_qe"] <= 1
    # silicon sees nothing at 1300 nm; InGaAs nothing at 600 nm (band gaps; common practice)
    assert optics.camera("si-deep-depletion").qe(1300.0) == 0.0
    assert optics.camera("ingaas").qe(600.0) == 0.0


def test_camera_lookup_did_you_mean_and_binning():
    with pytest.raises(InputError, match="did you mean 'ingaas'"):
        optics.camera("ingas")
    cam = optics.camera("si-back").with_binning(2)
    assert cam.effective_pixel_um == 22.0
    assert cam.read_noise_per_binned_px_e == pytest.approx(3.2)  # digital sum of 4 reads: 2 sigma
    assert cam.dark_current_e_per_binned_px_s == pytest.approx(1.2)
    ccd = optics.camera("si-front").with_binning(2)
    assert ccd.read_noise_per_binned_px_e == ccd.read_noise_e  # charge binning: one read


def test_camera_qe_percent_refused():
    qe = Spectrum([400, 800], [50.0, 90.0], "qe", kind="qe")
    with pytest.raises(InputError, match="divide percent by 100"):
        optics.Camera("x", qe, 1.0, 0.1, 1e4, 16, 6.5)
    with pytest.raises(InputError, match="pixel_pitch_um"):
        optics.camera_from_dict("y", {"qe_wavelength_nm": [400, 800], "qe": [0.5, 0.9], "read_noise_e": 1,
                                      "dark_current_e_per_px_s": 0, "full_well_e": 1e4, "bit_depth": 12})


# ---------------------------------------------------------------- lens


def test_lambertian_cone_fraction_by_integration():
    # fraction of a Lambertian exitance inside half-angle theta: int_0^theta cos t sin t dt / int_0^pi/2 = sin^2
    lens = optics.Lens(2.0, 0.5)
    theta = math.asin(lens.object_sin_theta())
    num, _ = quad(lambda t: math.cos(t) * math.sin(t), 0.0, theta)
    den, _ = quad(lambda t: math.cos(t) * math.sin(t), 0.0, math.pi / 2)
    assert lens.collection_efficiency() == pytest.approx(num / den, rel=1e-10)


def test_lens_limiting_cases():
    # distant object (m -> 0): sin(theta) -> pupil half-angle D/(2u) = m/(2N) (thin lens, paraxial)
    lens = optics.Lens(2.0, 1e-4)
    assert lens.object_sin_theta() / (1e-4 / (2 * 2.0)) == pytest.approx(1.0, rel=2e-4)
    # m -> infinity (microscope-like): sin(theta) -> 1/(2N)
    assert optics.Lens(1.0, 1e6).object_sin_theta() == pytest.approx(0.5, rel=1e-5)
    # unit magnification: 1/(4N)
    assert optics.Lens(2.0, 1.0).object_sin_theta() == pytest.approx(1 / 8)
    with pytest.raises(InputError, match="sin"):
        optics.Lens(0.2, 100.0)


def test_object_pixel_area():
    lens = optics.Lens(1.4, 0.2)
    cam = optics.camera("ingaas").with_binning(2)  # 30 um binned pixel
    assert lens.object_pixel_area_mm2(cam) == pytest.approx((0.030 / 0.2) ** 2)


def test_channel_type_checks():
    ch = optics.Channel("ch1", optics.Laser(808.0), optics.parse_filter("LP 1000"), optics.camera("ingaas"),
                        optics.Lens(1.4, 0.1), exposure_s=0.1)
    assert ch.exposure_s == 0.1
    with pytest.raises(TypeError):
        optics.Channel("ch1", optics.Laser(808.0), "LP 1000", optics.camera("ingaas"), optics.Lens(1.4, 0.1))
    with pytest.raises(InputError, match="exposure_s"):
        optics.Channel("ch1", optics.Laser(808.0), optics.parse_filter("LP 1000"), optics.camera("ingaas"),
                       optics.Lens(1.4, 0.1), exposure_s=-1.0)
