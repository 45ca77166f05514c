"""``probeplan plan`` and ``probeplan check``: exit codes, outputs, and bad input that leaves nothing behind."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import pytest

from probeplan import RESEARCH_USE_CAUTION
from probeplan.cli.main import main
from probeplan.report.document import HEAVY_METAL_CAUTION, LASER_CAUTION


def _evaluation_tests():
    """The invented base plan and its helpers live in test_evaluate.py (tests is not a package)."""
    import importlib.util

    spec = importlib.util.spec_from_file_location("_evaluate_test_plans", Path(__file__).with_name("test_evaluate.py"))
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


_shared = _evaluation_tests()
BASE, DEMO_PLAN, DEMO_RULES, plan_text = _shared.BASE, _shared.DEMO_PLAN, _shared.DEMO_RULES, _shared.plan_text


def write_plan(tmp_path: Path, *edits: tuple[str, str], name: str = "plan.toml") -> Path:
    path = tmp_path / name
    path.write_text(plan_text(*edits), encoding="utf-8")
    return path


# The base plan passes every default rule (d = 2 needs 6 animals per group; 10 are planned).
# ---------------------------------------------------------------------------- check


def test_check_demo_passes_with_exit_0(capsys):
    assert main(["check", str(DEMO_PLAN), "--rules", str(DEMO_RULES)]) == 0
    out = capsys.readouterr().out
    assert RESEARCH_USE_CAUTION in out
    assert "rule checks pass" in out and " FAIL " not in out


def test_check_marks_example_only_defaults(tmp_path, capsys):
    assert main(["check", str(write_plan(tmp_path))]) == 0
    out = capsys.readouterr().out
    assert "example only" in out  # no rules file: the anaesthesia, sessions, ... limits are examples
    assert "Diehl" in out  # injection limits from the published table


def test_check_fails_with_exit_1_and_names_the_rule(tmp_path, capsys):
    # 50 nmol/kg from a 4 µM stock is 12.5 mL/kg, over the 5 mL/kg mouse i.v. bolus limit (Diehl et al. 2001).
    plan = write_plan(tmp_path, ("stock_uM = 20.0\ndose_nmol_per_kg = 20", "stock_uM = 4.0\ndose_nmol_per_kg = 50"))
    assert main(["check", str(plan)]) == 1
    out = capsys.readouterr().out
    assert "2 of 12 rule checks FAIL: injection.mouse.iv\n" in out
    failing = [line for line in out.splitlines() if " FAIL " in line]
    # the probe alone (12.5 mL/kg) and together with the other probe given at the same time (12.5 + 1 mL/kg)
    assert [line.split()[0] for line in failing] == ["injection.mouse.iv"] * 2
    assert " 12.5 " in failing[0] and " 13.5 " in failing[1]


def test_check_json_parses(tmp_path, capsys):
    plan = write_plan(tmp_path, ("tumour_diameter_mm = 10.0", "tumour_diameter_mm = 20.0"))
    assert main(["check", str(plan), "--json"]) == 1
    data = json.loads(capsys.readouterr().out)
    assert data["passed"] is False and data["failed"] == ["endpoint.tumour_max_diameter"]
    assert data["caution"] == RESEARCH_USE_CAUTION
    row = next(c for c in data["checks"] if c["rule"] == "endpoint.tumour_max_diameter")
    assert (row["value"], row["limit"], row["unit"], row["passed"]) == (20.0, 15.0, "mm", False)


# ---------------------------------------------------------------------------- plan


def test_plan_writes_a_self_contained_report(tmp_path, capsys):
    out = tmp_path / "report"
    assert main(["plan", str(DEMO_PLAN), "--rules", str(DEMO_RULES), "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert f"report: {out / 'report.html'}" in printed
    html = (out / "report.html").read_text(encoding="utf-8")
    for text in (RESEARCH_USE_CAUTION, LASER_CAUTION, "cadmium", "<h2>Protocol</h2>", "<h2>Assumptions</h2>", "Rules checked"):
        assert text.replace("'", "&#x27;") in html, text
    assert html.count("data:image/png;base64,") == 2
    assert "http://" not in html and "https://" not in html and "<script" not in html and "<link" not in html
    data = json.loads((out / "report.json").read_text(encoding="utf-8"))
    names = set(data["tables"])
    assert names == {"checks", "injection", "light", "timing", "heavy_metal", "imaging", "channels", "animals"}
    # abundances compared across depths carry a caution (the depth model's spectral shift and attenuation)
    from probeplan.unmixing.pipeline import DEPTH_COMPARISON_CAUTION

    assert DEPTH_COMPARISON_CAUTION in data["cautions"]
    for name in names:
        with open(out / f"{name}.csv", newline="", encoding="utf-8") as fh:
            rows = list(csv.DictReader(fh))
        assert len(rows) == len(data["tables"][name]["rows"]) > 0
    assert any("Each time point" in a for a in data["assumptions"])


def test_plan_exits_0_when_rules_fail_and_shows_them(tmp_path, capsys):
    plan = write_plan(tmp_path, ('material = "CdTe"', 'material = "InP"'),
                      ("tumour_diameter_mm = 10.0", "tumour_diameter_mm = 20.0"))
    out = tmp_path / "out"
    assert main(["plan", str(plan), "--out", str(out), "--json", "--pdf"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["passed"] is False and data["failed"] == ["endpoint.tumour_max_diameter"]
    assert str(out / "report.pdf") in data["files"]
    assert (out / "report.pdf").read_bytes().startswith(b"%PDF")
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "FAIL" in html
    assert HEAVY_METAL_CAUTION.split("{metals}")[0] not in html  # no Cd- or Pb-containing probe


# ---------------------------------------------------------------------------- bad input: exit 2, nothing written


@pytest.mark.parametrize(
    ("old", "new", "match"),
    [
        ("title = ", "titel = ", r"study\.titel: unknown key"),  # wrong key
        ("depth_mm = 2.0\n", "", r"target\.depth_mm: is missing"),  # missing key
        ("size = 10", 'size = "ten"', r"animals\.groups\[0\]\.size: expected a number"),  # wrong type
        # a negative mass
        ("body_mass_g = [20.0, 30.0]", "body_mass_g = [-20.0, 30.0]", r"animals\.body_mass_g\[0\]: got -20, allowed above 0 up to 5000"),
        # a dose in the wrong unit
        ("dose_nmol_per_kg = 20", "dose_mg_per_kg = 20",
         r"probes\[0\]\.dose_mg_per_kg: unknown key 'dose_mg_per_kg': this plan takes 'dose_nmol_per_kg'"),
        ('filter = "700/30"', 'filter = "Red-7"', r"acquisition\.channels\[0\]\.filter: cannot read 'Red-7'"),
        ('material = "CdTe"', 'material = "CdTx"', r"probes\[0\]\.material: unknown material 'CdTx'; did you mean 'CdTe'"),
    ],
)
@pytest.mark.parametrize("command", ["plan", "check"])
def test_bad_plan_exit_2_one_line_nothing_written(tmp_path, capsys, command, old, new, match):
    import re

    plan = write_plan(tmp_path, (old, new))
    out = tmp_path / "never"
    argv = [command, str(plan)] + (["--out", str(out)] if command == "plan" else [])
    assert main(argv) == 2
    captured = capsys.readouterr()
    err = captured.err.strip()
    assert "\n" not in err and "Traceback" not in err
    assert re.fullmatch(rf"probeplan {command}: error: {re.escape(str(plan))}:\d+: {match}.*", err), err
    assert not out.exists()
    assert captured.out == ""


def test_bad_plan_leaves_an_existing_folder_empty(tmp_path, capsys):
    plan = write_plan(tmp_path, ('camera = "si-deep-depletion"', 'camera = "no-such-camera"'))
    out = tmp_path / "existing"
    out.mkdir()
    assert main(["plan", str(plan), "--out", str(out)]) == 2
    assert "acquisition.camera: unknown camera 'no-such-camera'" in capsys.readouterr().err
    assert list(out.iterdir()) == []


def test_bad_rules_file_exit_2(tmp_path, capsys):
    rules = tmp_path / "rules.toml"
    rules.write_text('[injection.mouse]\niv = { value = 0.1, unit = "mL" }\n', encoding="utf-8")
    out = tmp_path / "none"
    assert main(["plan", str(write_plan(tmp_path)), "--rules", str(rules), "--out", str(out)]) == 2
    assert "injection.mouse.iv.unit: got 'mL', but this rule is in 'mL/kg'" in capsys.readouterr().err
    assert not out.exists()


def test_out_that_is_a_file_or_an_input_is_refused(tmp_path, capsys):
    plan = write_plan(tmp_path)
    assert main(["plan", str(plan), "--out", str(plan)]) == 2
    assert "is a file" in capsys.readouterr().err
    clash = tmp_path / "report.json"  # an input named like an output, in the output folder
    clash.write_text(BASE, encoding="utf-8")
    before = clash.read_text(encoding="utf-8")
    assert main(["plan", str(clash), "--out", str(tmp_path)]) == 2
    assert "is also an input" in capsys.readouterr().err
    assert clash.read_text(encoding="utf-8") == before


def test_failure_while_writing_removes_the_folders_it_created(tmp_path, capsys, monkeypatch):
    import probeplan.report.document
    from probeplan.errors import input_error

    def failing_write(report, out_dir):
        Path(out_dir).mkdir(parents=True)
        (Path(out_dir) / "checks.csv").write_text("half", encoding="utf-8")
        raise input_error(str(out_dir), "no space left on the device", "free some space")

    monkeypatch.setattr(probeplan.report.document, "write_report", failing_write)
    out = tmp_path / "new" / "report"
    assert main(["plan", str(write_plan(tmp_path)), "--out", str(out)]) == 2
    assert "no space left" in capsys.readouterr().err
    assert not (tmp_path / "new").exists()
