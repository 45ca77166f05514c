"""The library lookup, the user library folder, and the CLI skeleton."""

from __future__ import annotations

import json

import pytest

from probeplan.catalog import library, resolve
from probeplan.cli.main import main
from probeplan.errors import InputError
from probeplan.model import tissue


def test_shipped_entries_carry_sources():
    rows = library.entries()
    kinds = {r.kind for r in rows}
    assert {"tissue", "chromophore"} <= kinds
    assert all(r.source for r in rows if r.kind in {"tissue", "chromophore"})
    assert "Jacques" in library.lookup("skin").source
    assert "Segelstein" in library.lookup("water").source


def test_lookup_did_you_mean():
    with pytest.raises(InputError, match="did you mean 'water'"):
        library.lookup("wter")


def test_user_folder_from_environment(_isolated_user_library):
    assert library.user_library_dir() == _isolated_user_library


def test_user_tissue_and_spectra(_isolated_user_library):
    (_isolated_user_library / "tissues").mkdir()
    (_isolated_user_library / "tissues" / "flank tumour.toml").write_text(
        'description = "our xenograft"\nsource = "our own measurement"\n'
        "blood_fraction = 0.04\nsaturation = 0.5\nwater_fraction = 0.8\na_per_cm = 12.0\nb = 1.1\n"
    )
    em = _isolated_user_library / "spectra" / "emission"
    em.mkdir(parents=True)
    (em / "mine.csv").write_text("wavelength_nm,dot 800\n700,0\n800,1\n900,0\n")
    t = resolve.tissue("flank tumour")
    assert t.blood_fraction == 0.04
    assert float(tissue.optical_properties(t, 500.0)[1]) == pytest.approx(12.0)
    names = {r.name: r for r in library.entries()}
    assert names["flank tumour"].source == "our own measurement"
    assert names["dot 800"].kind == "emission spectrum"


def test_bad_user_tissue_names_the_file(_isolated_user_library):
    (_isolated_user_library / "tissues").mkdir()
    (_isolated_user_library / "tissues" / "bad.toml").write_text(
        "blood_fraction = 5\nsaturation = 0.5\nwater_fraction = 0.8\na_per_cm = 12.0\nb = 1.1\n"
    )
    with pytest.raises(InputError, match=r"bad.toml: .*fraction must lie in 0-1"):
        resolve.tissue("bad")
    (_isolated_user_library / "tissues" / "broken.toml").write_text("blood_fraction = = 1\n")
    with pytest.raises(InputError, match=r"broken.toml:1: is not valid TOML"):
        resolve.tissue("broken")


def test_cli_library_list_and_show(capsys):
    assert main(["library", "list", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert any(r["name"] == "skin" and "Jacques" in r["source"] for r in rows)
    assert main(["library", "show", "HbO2"]) == 0
    assert "Prahl" in capsys.readouterr().out
    assert main(["library", "list", "--kind", "tissue"]) == 0
    out = capsys.readouterr().out
    assert "mouse muscle" in out and "HbO2" not in out


def test_cli_bad_input_exit_2_one_line(capsys):
    assert main(["library", "show", "skn"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "did you mean 'skin'" in err and "Traceback" not in err


def test_cli_usage_errors_exit_2(capsys):
    assert main(["no-such-command"]) == 2
    assert main([]) == 2
    assert "usage" in capsys.readouterr().out


def test_cli_debug_reraises():
    with pytest.raises(InputError):
        main(["library", "show", "skn", "--debug"])


def test_cli_help_on_every_command(capsys):
    from probeplan.cli.main import _command_modules

    assert main(["--help"]) == 0
    for name, _ in _command_modules():
        assert main([name, "--help"]) == 0, name
    out = capsys.readouterr().out
    assert "research use only" in out.lower()
