"""Plan schema validation: every refusal names the file, line, key path and fix."""

from __future__ import annotations

from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from probeplan.errors import InputError
from probeplan.study.plan import load_plan, parse_plan_text

DEMO = Path(__file__).resolve().parents[1] / "demo_tissue" / "plan.toml"


def demo_text() -> str:
    return DEMO.read_text(encoding="utf-8")


def test_demo_plan_parses_with_defaults():
    plan = load_plan(DEMO)
    assert plan.animals["species"] == "mouse"
    assert len(plan.probes) == 3 and len(plan.acquisition["channels"]) == 4
    assert plan.probes[0]["quantum_yield"] is None  # optional, filled from the material later
    assert plan.analysis["method"] == "nnls"
    assert plan.resolve("stack.tif") == DEMO.parent / "stack.tif"


def _mutate(old: str, new: str, *, count: int = 1) -> str:
    text = demo_text()
    assert old in text, old
    return text.replace(old, new, count)


def _third_probe_dose(value: str) -> str:
    text = demo_text()
    head, sep, tail = text.partition('name = "probe C (880)"')
    return head + sep + tail.replace("dose_nmol_per_kg = 8", f"dose_nmol_per_kg = {value}", 1)


def _line(text: str, needle: str, nth: int = 1) -> int:
    seen = 0
    for i, line in enumerate(text.splitlines(), start=1):
        if needle in line:
            seen += 1
            if seen == nth:
                return i
    raise AssertionError(needle)


def test_wrong_type_names_key_path_and_line():
    text = _third_probe_dose('"ten"')
    line = _line(text, 'dose_nmol_per_kg = "ten"')
    with pytest.raises(InputError, match=rf'^plan.toml:{line}: probes\[2\].dose_nmol_per_kg: expected a number, '
                                         rf'got "ten"; write a plain number in nmol/kg$'):
        parse_plan_text(text, source="plan.toml")


@pytest.mark.parametrize(
    ("old", "new", "match"),
    [
        ("body_mass_g = [18.0, 26.0]", "body_mass_g = [-18.0, 26.0]", r"animals.body_mass_g\[0\]: got -18, allowed above 0 up to 5000"),
        ("body_mass_g = [18.0, 26.0]", "body_mass_g = [26.0, 18.0]", r"expected \[lightest, heaviest\]"),
        ("dose_nmol_per_kg = 8", "dose_mg_per_kg = 50",
         r"probes\[0\].dose_mg_per_kg: unknown key 'dose_mg_per_kg': this plan takes 'dose_nmol_per_kg'"),
        ('species = "mouse"', 'species = "mose"', r"animals.species: got 'mose'; did you mean 'mouse'"),
        ('route = "iv"', 'route = "intravenous"', r"probes\[0\].route: got 'intravenous'"),
        ("depth_mm = 3.0", "dept_mm = 3.0", r"target.dept_mm: unknown key 'dept_mm'"),
        ("depth_mm = 3.0\n", "", r"target.depth_mm: is missing; add depth_mm"),
        ("uptake_ratio = 4.0", "uptake_ratio = 0.5", r"target.uptake_ratio: got 0.5, allowed 1 to 1e\+06"),
        ("[statistics]", "[statistic]", r"unknown key 'statistic'.*did you mean 'statistics'"),
        ("power_mw = 125", "irradiance_mw_per_cm2 = 40\npower_mw = 125", "given together with power_mw"),
        ("exposure_s = 0.05", "exposure_s = 0", r"acquisition.channels\[0\].exposure_s: got 0, allowed above 0 up to 3600"),
        ("binning = 2", "binning = 2.5", "expected a whole number"),
        ("title = ", "titel = ", r"study.titel: unknown key"),
    ],
)
def test_bad_plans_refused(old, new, match):
    with pytest.raises(InputError, match=match):
        parse_plan_text(_mutate(old, new), source="plan.toml")


def test_fewer_channels_than_probes_refused():
    text = demo_text()
    cut = text.index('[[acquisition.channels]]\nname = "780"')  # keep 2 of the 4 channels for 3 probes
    end = text.index("[analysis]")
    with pytest.raises(InputError, match="at least as many channels as probes"):
        parse_plan_text(text[:cut] + text[end:], source="plan.toml")


def test_missing_section_and_syntax_error():
    with pytest.raises(InputError, match=r"plan.toml: target: section is missing"):
        text = demo_text()
        parse_plan_text(text[: text.index("[target]")] + text[text.index("[acquisition]"):], source="plan.toml")
    with pytest.raises(InputError, match=r"plan.toml:\d+: is not valid TOML"):
        parse_plan_text("[study]\ntitle = = 1\n", source="plan.toml")


def test_file_errors(tmp_path):
    with pytest.raises(InputError, match="file not found"):
        load_plan(tmp_path / "none.toml")
    empty = tmp_path / "empty.toml"
    empty.write_text("")
    with pytest.raises(InputError, match="is empty"):
        load_plan(empty)


@settings(max_examples=150, deadline=None)
@given(st.text(max_size=400))
def test_plan_parser_fuzz_only_input_errors(text):
    try:
        parse_plan_text(text, source="fuzz.toml")
    except InputError:
        pass


@settings(max_examples=100, deadline=None)
@given(st.sampled_from(["dose_nmol_per_kg = 8", "depth_mm = 3.0", "species = \"mouse\"", "binning = 2",
                        "time_points_h = [1, 49, 97]", "size = 8"]),
       st.one_of(st.integers(-10, 10), st.floats(allow_nan=True), st.text(max_size=5), st.booleans()))
def test_plan_values_fuzz_only_input_errors(line, value):
    key = line.split(" = ")[0]
    rendered = repr(value) if not isinstance(value, bool) else str(value).lower()
    if isinstance(value, str):
        rendered = '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, float) and value != value:
        rendered = "nan"
    elif isinstance(value, float) and abs(value) == float("inf"):
        rendered = "inf" if value > 0 else "-inf"
    try:
        parse_plan_text(demo_text().replace(line, f"{key} = {rendered}", 1), source="fuzz.toml")
    except InputError:
        pass
