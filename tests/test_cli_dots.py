"""Tests of ``probeplan dots`` through probeplan.cli.main.main."""

from __future__ import annotations

import json

import pytest

from probeplan.cli.main import main


def _json(capsys):
    return json.loads(capsys.readouterr().out)


def test_size_from_peak_json(capsys):
    assert main(["dots", "size", "CdSe", "--peak", "550", "--json"]) == 0
    out = _json(capsys)
    # Yu et al., Chem. Mater. 15, 2854 (2003) worked point: 3.04 nm, 1.115e5 M^-1 cm^-1
    assert out["diameter_nm"] == pytest.approx(3.04, abs=0.005)
    assert out["extinction_per_M_cm"] == pytest.approx(1.115e5, rel=1e-3)
    assert "cadmium" in out["caution"] and "research use" in out["research_use"].lower()
    assert out["warnings"] == []


def test_size_from_diameter_pbs(capsys):
    # Moreels et al., ACS Nano 3, 3023 (2009): 4.61 nm <-> 1300 nm
    assert main(["dots", "size", "PbS", "--diameter", "4.61", "--json"]) == 0
    assert _json(capsys)["exciton_peak_nm"] == pytest.approx(1300.0, abs=1.0)


def test_size_from_emission_uses_stokes_shift(capsys):
    # emission 557.4 nm is the 550 nm exciton moved by the 30 meV typical Stokes shift (computed by hand)
    assert main(["dots", "size", "CdSe", "--emission", "557.418", "--json"]) == 0
    assert _json(capsys)["exciton_peak_nm"] == pytest.approx(550.0, abs=0.01)


def test_size_text_output(capsys):
    assert main(["dots", "size", "CdSe", "--peak", "550"]) == 0
    out = capsys.readouterr().out
    assert "diameter_nm" in out and "3.04" in out and "For research use only" in out


def test_size_extrapolation_warns_on_stderr(capsys):
    assert main(["dots", "size", "PbS", "--diameter", "2.5", "--json"]) == 0
    captured = capsys.readouterr()
    assert json.loads(captured.out)["warnings"]
    assert captured.err.count("warning:") == 1  # the same warning is shown once


def test_conc_worked_example(capsys):
    # Beer-Lambert: 0.1 / (1.115e5 M^-1 cm^-1 x 1 cm) = 0.897 uM
    assert main(["dots", "conc", "CdSe", "--peak", "550", "--absorbance", "0.1", "--json"]) == 0
    assert _json(capsys)["concentration_uM"] == pytest.approx(0.897, abs=0.001)
    assert main(["dots", "conc", "CdSe", "--peak", "550", "--absorbance", "0.1", "--path-cm", "0.5", "--json"]) == 0
    assert _json(capsys)["concentration_uM"] == pytest.approx(1.793, abs=0.001)


def test_dose_worked_example(capsys):
    # by hand: 100 nmol/kg x 25 g = 2.5 nmol; 2 uM = 2 nmol/mL -> 1250 uL (50 mL/kg)
    assert main(["dots", "dose", "--dose-nmol-per-kg", "100", "--mass-g", "25", "--stock-uM", "2", "--json"]) == 0
    out = _json(capsys)
    assert out["volume_ul"] == pytest.approx(1250.0)
    assert out["volume_ml_per_kg"] == pytest.approx(50.0)
    assert main(["dots", "dose", "--volume-ul", "125", "--mass-g", "25", "--stock-uM", "2", "--json"]) == 0
    assert _json(capsys)["dose_nmol_per_kg"] == pytest.approx(10.0)


def test_list(capsys):
    assert main(["dots", "list", "--json"]) == 0
    names = {r["name"] for r in _json(capsys)}
    assert {"CdSe", "PbS", "Ag2S"} <= names
    assert main(["dots", "list"]) == 0
    assert "typical, no sizing" in capsys.readouterr().out


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["dots", "size", "CdSee", "--peak", "550"], "did you mean 'CdSe'"),
        (["dots", "size", "CdSe", "--peak", "900"], "outside the CdSe sizing curve"),
        (["dots", "size", "InP", "--peak", "600"], "no published sizing curve"),
        (["dots", "conc", "CdSe", "--peak", "550", "--absorbance", "-1"], "absorbance"),
        (["dots", "dose", "--dose-nmol-per-kg", "100", "--mass-g", "0", "--stock-uM", "2"], "--mass-g: got 0, allowed above 0 up to 5000 g"),
    ],
)
def test_bad_input_exit_2(capsys, argv, message):
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert message in err and len(err.strip().splitlines()) == 1
    assert "Traceback" not in err


def test_usage_errors_exit_2(capsys):
    assert main(["dots", "size", "CdSe"]) == 2  # needs --peak, --diameter or --emission
    assert main(["dots", "size", "CdSe", "--peak", "550", "--diameter", "3"]) == 2
    assert main(["dots", "conc", "CdSe", "--peak", "abc", "--absorbance", "0.1"]) == 2
    capsys.readouterr()
