"""Tests of the wavelength grid, the resampling rule and spectra CSV import."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from probeplan.errors import InputError
from probeplan.model.spectra import Spectrum, WavelengthGrid, parse_spectra_text, read_spectra_csv

# ---------------------------------------------------------------- grid


def test_grid_is_hashable_value_object():
    a, b = WavelengthGrid(600, 700, 1), WavelengthGrid(600.0, 700.0, 1.0)
    assert a == b and hash(a) == hash(b) and len({a, b}) == 1
    assert len(a) == 101
    assert a.wavelengths_nm[0] == 600.0 and a.wavelengths_nm[-1] == 700.0


def test_grid_from_count_endpoint_exact():
    g = WavelengthGrid.from_count(650, 950, 301)
    assert g.step_nm == pytest.approx(1.0)
    assert g.wavelengths_nm[-1] == 950.0


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"start_nm": 700, "stop_nm": 600, "step_nm": 1}, "stop_nm"),
        ({"start_nm": 600, "stop_nm": 700, "step_nm": 0}, "step_nm"),
        ({"start_nm": 600, "stop_nm": 700, "step_nm": 3}, "does not divide"),
        ({"start_nm": 0.6, "stop_nm": 0.9, "step_nm": 0.1}, "micrometres"),
        ({"start_nm": float("nan"), "stop_nm": 700, "step_nm": 1}, "start_nm"),
    ],
)
def test_grid_refuses_bad_values(kwargs, match):
    with pytest.raises(InputError, match=match):
        WavelengthGrid(**kwargs)


def test_grid_refuses_wrong_type():
    with pytest.raises(TypeError, match="start_nm"):
        WavelengthGrid("600", 700, 1)  # type: ignore[arg-type]


# ---------------------------------------------------------------- resampling rule


@settings(max_examples=60, deadline=None)
@given(
    start=st.floats(300, 1500),
    span=st.floats(10, 500),
    n=st.integers(3, 200),
    slope=st.floats(-2, 2),
    offset=st.floats(0, 1000),
)
def test_resampling_is_exact_for_linear_functions(start, span, n, slope, offset):
    # Linear interpolation reproduces a linear function exactly (a property of the rule).
    wl = np.linspace(start, start + span, n)
    s = Spectrum(wl, offset + slope * (wl - start), kind="other")
    fine = np.linspace(start, start + span, 3 * n)
    np.testing.assert_allclose(s.values_at(fine), offset + slope * (fine - start), rtol=1e-9, atol=1e-9)


@settings(max_examples=40, deadline=None)
@given(c=st.floats(0, 1e6), lo=st.floats(300, 1000), span=st.floats(1, 700))
def test_integral_of_a_constant(c, lo, span):
    s = Spectrum([lo, lo + span], [c, c], kind="emission")
    assert s.integrate() == pytest.approx(c * span, rel=1e-12, abs=1e-9)


@settings(max_examples=40, deadline=None)
@given(n=st.integers(2, 50), seed=st.integers(0, 2**16))
def test_round_trip_onto_a_finer_grid_and_back(n, seed):
    rng = np.random.default_rng(seed)
    wl = np.arange(n) * 10.0 + 600.0
    s = Spectrum(wl, rng.random(n), kind="emission")
    fine = s.resample(WavelengthGrid(600.0, 600.0 + 10.0 * (n - 1), 1.0) if n > 1 else wl)
    back = fine.resample(wl)
    np.testing.assert_allclose(back.values, s.values, rtol=1e-12, atol=1e-12)


def test_values_at_broadcasts_any_shape():
    s = Spectrum([600, 700, 800], [0.0, 1.0, 0.0], kind="filter")
    out = s.values_at(np.full((2, 3, 4), 650.0))
    assert out.shape == (2, 3, 4)
    assert np.all(out == 0.5)


def test_values_at_refuses_nan():
    s = Spectrum([600, 700], [1.0, 1.0], kind="emission")
    with pytest.raises(InputError, match="NaN"):
        s.values_at([650.0, float("nan")])


def test_emission_is_zero_outside_with_a_note():
    s = Spectrum([600, 700], [1.0, 1.0], name="probe", kind="emission")
    r = s.resample([550.0, 650.0, 750.0])
    np.testing.assert_array_equal(r.values, [0.0, 1.0, 0.0])
    assert any("set to zero outside" in note for note in r.notes)


def test_material_refused_outside_its_range():
    s = Spectrum([600, 700], [1.0, 2.0], name="absorber", kind="material")
    with pytest.raises(InputError, match="outside the tabulated 600-700 nm"):
        s.values_at(750.0)


def test_integrate_band_and_normalise():
    s = Spectrum([600, 700, 800], [0.0, 2.0, 0.0], kind="emission")
    assert s.integrate() == pytest.approx(200.0)
    assert s.integrate(650, 750) == pytest.approx(150.0)  # trapezoid of the triangle's top
    assert s.normalised("area").integrate() == pytest.approx(1.0)
    assert s.normalised("peak").values.max() == 1.0
    assert s.peak_nm == 700.0
    with pytest.raises(InputError, match="zero"):
        Spectrum([600, 700], [0.0, 0.0], kind="emission").normalised()


def test_spectrum_refuses_negative_physical_values():
    with pytest.raises(InputError, match="negative"):
        Spectrum([600, 700], [1.0, -0.1], kind="filter")


def test_spectrum_refuses_non_increasing():
    with pytest.raises(InputError, match="not greater"):
        Spectrum([600, 600, 700], [1.0, 1.0, 1.0])


# ---------------------------------------------------------------- CSV import


def _write(tmp_path, text, name="spectra.csv"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def test_read_good_csv_with_units_and_provenance(tmp_path):
    p = _write(tmp_path, "# measured on our bench\nwavelength_nm,probe A [a.u.],probe B\n600,0,1\n700,1,0.5\n800,0,0\n")
    before = p.read_bytes()
    out = read_spectra_csv(p, kind="emission")
    assert list(out) == ["probe A", "probe B"]
    assert out["probe A"].unit == "a.u."
    assert out["probe B"].provenance == "measured on our bench"
    assert p.read_bytes() == before  # input never modified


def test_read_tsv(tmp_path):
    p = _write(tmp_path, "wavelength (nm)\tT\n600\t0.1\n700\t0.9\n", "f.tsv")
    assert read_spectra_csv(p, kind="filter")["T"].values.tolist() == [0.1, 0.9]


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("", "is empty"),
        ("600,1\n700,2\n", r"spectra.csv:1: the first row is numbers, not a header"),
        ("wavelength_um,a\n0.6,1\n0.7,2\n", r"spectra.csv:1: .*micrometres.*multiply by 1000"),
        ("wavelength_nm,a\n0.6,1\n0.7,2\n", r"spectra.csv:2: .*look like micrometres"),
        ("wavelength_nm,a\n600,1\n600,2\n", r"spectra.csv:3: wavelength 600 nm is not greater"),
        ("wavelength_nm,a\n700,1\n600,2\n", r"spectra.csv:3: .*sort rows"),
        ("wavelength_nm,a\n600,1\n700,nan\n", r"spectra.csv:3: column 'a': 'nan' is not finite"),
        ("wavelength_nm,a\n600,1\n700,x\n", r"spectra.csv:3: column 'a': 'x' is not a number"),
        ("wavelength_nm,a\n600,1\n700,-0.2\n", r"spectra.csv:3: column 'a' is negative"),
        ("wavelength_nm,a\n600,1,3\n700,1\n", r"spectra.csv:2: 3 fields where the header has 2"),
        ("wavelength_nm,a,a\n600,1,1\n700,1,1\n", r"appears twice"),
        ("wavelength_nm\n600\n700\n", r"only a wavelength column"),
        ("intensity,a\n600,1\n700,1\n", r"not a wavelength"),
        ("wavelength_nm,a\n600,1\n", r"1 data rows"),
        ("wavelength_nm,a\n100,1\n200,1\n", r"outside 200-3000 nm"),
    ],
)
def test_bad_csv_refused_with_file_line_and_fix(tmp_path, text, match):
    p = _write(tmp_path, text)
    with pytest.raises(InputError, match=match):
        read_spectra_csv(p, kind="emission")


def test_missing_file_and_folder(tmp_path):
    with pytest.raises(InputError, match="file not found"):
        read_spectra_csv(tmp_path / "nope.csv")
    with pytest.raises(InputError, match="is a folder"):
        read_spectra_csv(tmp_path)


def test_binary_file_refused(tmp_path):
    p = tmp_path / "b.csv"
    p.write_bytes(b"\xff\xfe\x00\x01garbage")
    with pytest.raises(InputError, match="not UTF-8"):
        read_spectra_csv(p)


@settings(max_examples=200, deadline=None)
@given(st.text(max_size=300))
def test_parser_fuzz_only_raises_input_error(text):
    try:
        parse_spectra_text(text, source="fuzz.csv", kind="emission")
    except InputError:
        pass
