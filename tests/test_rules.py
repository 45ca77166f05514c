"""Tests of probeplan.study.rules: the shipped defaults, the institution file, validation and checks."""

from __future__ import annotations

import math
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from probeplan.study import rules as rules_module
from probeplan.errors import InputError
from probeplan.study.rules import (
    Rule,
    RuleCheck,
    Rules,
    check_value,
    default_rules,
    load_rules,
    parse_rules_text,
)

DEMO_RULES = Path(__file__).resolve().parents[1] / "demo_tissue" / "rules.toml"


def write(tmp_path: Path, text: str, name: str = "rules.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_public_names_exist():
    for name in rules_module.__all__:
        assert hasattr(rules_module, name), name


# ---------------------------------------------------------------------------
# Defaults
# ---------------------------------------------------------------------------


def test_defaults_cite_a_source_or_say_example_only():
    rules = default_rules()
    assert len(rules) == 25
    for rule in rules:
        assert rule.unit and rule.description and rule.source
        if rule.example_only:
            assert rule.source == "example only: the institution must set this"
        else:
            assert "Diehl et al. 2001" in rule.source or "ANSI Z136.1" in rule.source, rule.id


def test_defaults_carry_the_published_values():
    # Diehl et al., J. Appl. Toxicol. 21, 15 (2001), doi:10.1002/jat.727: blood volumes and sampling shares.
    rules = default_rules()
    assert rules.value("blood.mouse.circulating_volume") == 72.0
    assert rules.value("blood.rat.circulating_volume") == 64.0
    assert [rules.value(f"blood.sample_percent.recovery_{p}") for p in ("1_week", "2_weeks", "4_weeks")] == [
        7.5,
        10.0,
        15.0,
    ]
    # ANSI Z136.1 / IEC 60825-1: skin limiting aperture 3.5 mm.
    assert rules.value("laser.limiting_aperture") == 3.5
    assert rules.unit("injection.mouse.im") == "mL" and rules.unit("injection.rat.iv") == "mL/kg"


def test_limits_without_a_published_value_are_marked_examples():
    rules = default_rules()
    examples = {rule.id for rule in rules if rule.example_only}
    assert examples == {
        "anaesthesia.max_session_duration",
        "imaging.max_sessions_per_animal",
        "imaging.min_interval_between_sessions",
        "probe.heavy_metal.max_cumulative_dose",
        "probe.heavy_metal.max_cumulative_metal_dose",
        "endpoint.tumour_max_diameter",
    }
    assert rules["imaging.min_interval_between_sessions"].limit == "min"
    assert isinstance(rules.value("imaging.max_sessions_per_animal"), int)


def test_load_rules_without_a_path_is_the_defaults():
    assert load_rules() is default_rules()
    assert load_rules(None).files == ()


# ---------------------------------------------------------------------------
# The Rules object
# ---------------------------------------------------------------------------


def test_rules_lookup_iteration_and_accessors():
    rules = default_rules()
    rule = rules["injection.rat.sc"]
    assert isinstance(rule, Rule)
    assert (rules.value(rule.id), rules.unit(rule.id)) == (5.0, "mL/kg")
    assert rules.source(rule.id).startswith("Diehl et al. 2001")
    assert [r.id for r in rules] == list(rules.ids())
    assert "injection.rat.sc" in rules and "injection.rat.xx" not in rules
    assert rules.get("nope") is None
    assert "25 rules" in repr(rules)


def test_unknown_id_lookup_suggests_the_closest():
    with pytest.raises(InputError, match="rules: unknown rule 'injection.mouse.ivv'; did you mean 'injection.mouse.iv'"):
        default_rules().value("injection.mouse.ivv")
    with pytest.raises(InputError, match="see default_rules.toml for the rule ids"):
        default_rules()["zzzz"]


def test_with_values_validates_and_records_the_source():
    rules = default_rules().with_values({"imaging.max_sessions_per_animal": 4}, source="policy 9")
    assert rules.value("imaging.max_sessions_per_animal") == 4
    assert not rules["imaging.max_sessions_per_animal"].example_only
    with pytest.raises(InputError, match="cannot be negative"):
        default_rules().with_values({"injection.mouse.iv": -1.0}, source="x")
    with pytest.raises(TypeError):
        Rules(["not a rule"])


# ---------------------------------------------------------------------------
# Loading an institution file
# ---------------------------------------------------------------------------


def test_demo_rules_file_loads_and_overrides(tmp_path):
    before = DEMO_RULES.read_bytes()
    rules = load_rules(DEMO_RULES)
    assert DEMO_RULES.read_bytes() == before  # the input file is never modified
    assert rules.value("laser.skin_mpe_fraction") == 0.5
    assert rules.value("injection.mouse.ip") == 10.0
    assert rules.value("injection.mouse.sc") == 10.0  # not in the file: default kept
    assert rules["injection.mouse.sc"].origin == "probeplan defaults"
    assert rules["imaging.max_sessions_per_animal"].origin == str(DEMO_RULES)
    assert not any(rule.example_only for rule in rules)
    assert "fictional" in rules.about["institution"]
    assert rules.files == (str(DEMO_RULES),)


def test_demo_rules_file_says_values_are_examples():
    head = DEMO_RULES.read_text(encoding="utf-8")[:1200].lower()
    for phrase in ("example", "research use only", "animal care committee", "laser safety officer", "regulations"):
        assert phrase in head


def test_table_and_inline_layouts_are_equivalent(tmp_path):
    table = load_rules(write(tmp_path, '[injection.mouse.iv]\nvalue = 3\nunit = "mL/kg"\nsource = "p"\n', "a.toml"))
    inline = load_rules(write(tmp_path, '[injection.mouse]\niv = { value = 3, unit = "mL/kg", source = "p" }\n', "b.toml"))
    dotted = load_rules(write(tmp_path, 'injection.mouse.iv = { value = 3, unit = "mL/kg", source = "p" }\n', "c.toml"))
    assert table.value("injection.mouse.iv") == inline.value("injection.mouse.iv") == dotted.value("injection.mouse.iv")
    assert table.source("injection.mouse.iv") == "p"


def test_source_defaults_to_the_file_and_note_is_kept(tmp_path):
    path = write(tmp_path, '[endpoint.tumour_max_diameter]\nvalue = 12\nunit = "mm"\nnote = "per policy"\n')
    rule = load_rules(path)["endpoint.tumour_max_diameter"]
    assert rule.source == f"institution rules file {path}"
    assert rule.note == "per policy" and rule.value == 12.0


def test_unit_spelling_is_case_insensitive(tmp_path):
    rules = load_rules(write(tmp_path, '[injection.mouse]\nip = { value = 10, unit = "ml/kg" }\n'))
    assert rules.value("injection.mouse.ip") == 10.0 and rules.unit("injection.mouse.ip") == "mL/kg"


# Each case: file text, the expected message (regex).  Messages read "file:line: key.path: problem; fix".
BAD_FILES = [
    (
        '[injection.mouse]\niv = { value = 0.1, unit = "mL" }\n',
        r"rules\.toml:2: injection\.mouse\.iv\.unit: got 'mL', but this rule is in 'mL/kg'; "
        r'write unit = "mL/kg" and give the value in mL/kg',
    ),
    (
        '[injection.mouse.ivv]\nvalue = 5\nunit = "mL/kg"\n',
        r"rules\.toml:1: injection\.mouse\.ivv: unknown rule 'injection\.mouse\.ivv'; did you mean 'injection\.mouse\.iv'",
    ),
    (
        '[injection.mose]\niv = { value = 5, unit = "mL/kg" }\n',
        r"rules\.toml:2: injection\.mose\.iv: unknown rule .*did you mean 'injection\.mouse\.iv'",
    ),
    (
        '[anaesthesia.max_session_duraton]\nvalue = 30\nunit = "min"\n',
        r"did you mean 'anaesthesia\.max_session_duration'",
    ),
    (
        '[injection.mouse.iv]\nvalue = "five"\nunit = "mL/kg"\n',
        r"rules\.toml:2: injection\.mouse\.iv\.value: got 'five' \(text\); give a number in mL/kg",
    ),
    ('[injection.mouse.iv]\nvalue = true\nunit = "mL/kg"\n', r"injection\.mouse\.iv\.value: got True \(true/false\)"),
    (
        '[injection.mouse.iv]\nvalue = -2\nunit = "mL/kg"\n',
        r"injection\.mouse\.iv\.value: got -2, a limit cannot be negative; give a value >= 0",
    ),
    ('[injection.mouse.iv]\nvalue = nan\nunit = "mL/kg"\n', r"injection\.mouse\.iv\.value: got nan; give a finite number"),
    ('[injection.mouse.iv]\nvalue = inf\nunit = "mL/kg"\n', r"got inf; give a finite number"),
    (
        '[laser.skin_mpe_fraction]\nvalue = 1.5\nunit = "1"\n',
        r"laser\.skin_mpe_fraction\.value: got 1\.5, outside 0-1; give a value in that range",
    ),
    ('[imaging.max_sessions_per_animal]\nvalue = 2.5\nunit = "count"\n', r"got 2\.5, this rule is a count; give a whole number"),
    ("[injection.mouse.iv]\nvalue = 5\n", r"rules\.toml:1: injection\.mouse\.iv: no unit given; add unit = \"mL/kg\""),
    ('[injection.mouse.iv]\nunit = "mL/kg"\n', r"injection\.mouse\.iv: no value given; add value = <number in mL/kg>"),
    (
        "[injection.mouse]\niv = 5\n",
        r"rules\.toml:2: injection\.mouse\.iv: a bare number has no unit; write iv = \{ value = 5, unit = \"mL/kg\" \}",
    ),
    (
        '[injection.mouse.iv]\nvalue = 5\nunit = "mL/kg"\nunits = "x"\n',
        r"injection\.mouse\.iv\.units: unknown key 'units'; a rule takes only note, source, unit, value",
    ),
    ("[injection.mouse.iv]\nvalue = 5\nunit = 5\n", r"injection\.mouse\.iv\.unit: got a number; write unit = \"mL/kg\""),
    (
        '[injection.mouse.iv]\nvalue = 5\nunit = "mL/kg"\nsource = 3\n',
        r"injection\.mouse\.iv\.source: got a number; write text in quotes",
    ),
    ("[about]\ninstitution = 3\n", r"about\.institution: got a number; write text in quotes"),
    ('about = "x"\n', r"rules\.toml:1: about: got a text; make \[about\] a table"),
    ("[injection.mouse.iv\nvalue = 5\n", r"rules\.toml:1: is not valid TOML \(.*line 1.*\); fix the syntax there"),
    ('value = 5\nunit = "mL/kg"\n', r"^\S*rules\.toml: value outside any rule table; put it under the rule's table"),
    ("schema = 1\n", r"rules\.toml:1: schema: unknown rule 'schema'"),
    (
        '[[injection.mouse.iv]]\nvalue = 5\nunit = "mL/kg"\n',
        r"injection\.mouse\.iv: a list or an array of tables \(\[\[\.\.\.\]\]\) is not a rule; write one table per rule",
    ),
    ("[nothing.here]\n", r"rules\.toml:1: nothing\.here: unknown rule 'nothing\.here'"),
    ('[injection.mouse.iv]\nvalue = 1e400\nunit = "mL/kg"\n', r"got inf; give a finite number"),
    (
        '[injection.mouse.iv]\nvalue = 123456789012345678901234567890\nunit = "mL/kg"\n',
        r"(number too large|outside|not valid TOML)",
    ),
]


@pytest.mark.parametrize(("text", "match"), BAD_FILES)
def test_bad_rules_files_are_refused_with_a_one_line_message(tmp_path, text, match):
    path = write(tmp_path, text)
    with pytest.raises(InputError, match=match) as info:
        load_rules(path)
    message = str(info.value)
    assert "\n" not in message and message.startswith(str(path))


def test_empty_prefix_table_is_allowed(tmp_path):
    rules = load_rules(write(tmp_path, "[injection.mouse]\n"))
    assert rules.value("injection.mouse.iv") == 5.0


def test_missing_unreadable_and_non_utf8_files(tmp_path):
    with pytest.raises(InputError, match="nope.toml: rules file not found; check the path"):
        load_rules(tmp_path / "nope.toml")
    bad = tmp_path / "latin1.toml"
    bad.write_bytes(b'[about]\nname = "caf\xe9"\n')
    with pytest.raises(InputError, match="latin1.toml: not UTF-8 text"):
        load_rules(bad)
    with pytest.raises(InputError, match="cannot read"):
        load_rules(tmp_path)  # a folder
    with pytest.raises(TypeError):
        load_rules(42)
    bom = tmp_path / "bom.toml"
    bom.write_bytes(b'\xef\xbb\xbf[about]\nname = "x"\n')  # a byte-order mark, as some editors write
    assert load_rules(bom).about["name"] == "x"


def test_line_numbers_point_at_the_offending_key():
    text = (
        "# header\n[about]\ninstitution = 'x'\n\n[injection.rat]\nsc = { value = 5, unit = 'mL/kg' }\n"
        "ip = { value = 10, unit = 'mL' }\n"
    )
    with pytest.raises(InputError, match=r"^r\.toml:7: injection\.rat\.ip\.unit"):
        parse_rules_text(text, filename="r.toml")


def test_files_merge_in_order():
    first = parse_rules_text('[injection.mouse]\niv = { value = 4, unit = "mL/kg" }', filename="a.toml")
    second = parse_rules_text('[injection.mouse]\nip = { value = 9, unit = "mL/kg" }', filename="b.toml", base=first)
    assert (second.value("injection.mouse.iv"), second.value("injection.mouse.ip")) == (4.0, 9.0)
    assert second.files == ("a.toml", "b.toml")


# ---------------------------------------------------------------------------
# Checking values against rules
# ---------------------------------------------------------------------------


def test_check_value_uses_the_rule_direction():
    rules = default_rules()
    ok = check_value(rules, "injection.mouse.iv", 5.0)
    assert isinstance(ok, RuleCheck) and ok.passed and ok.comparison == "<=" and ok.limit == 5.0
    assert not check_value(rules, "injection.mouse.iv", 5.01).passed
    interval = check_value(rules, "imaging.min_interval_between_sessions", 24.0)
    assert interval.passed and interval.comparison == ">=" and interval.example_only
    assert not check_value(rules, "imaging.min_interval_between_sessions", 23.9).passed
    assert not check_value(rules, "injection.mouse.iv", 5.0, comparison="<").passed


def test_check_value_row_for_the_rule_table():
    row = check_value(default_rules(), "injection.rat.im", 0.08, description="i.m. volume, left leg").as_row()
    assert row == {
        "rule": "injection.rat.im",
        "description": "i.m. volume, left leg",
        "value": 0.08,
        "comparison": "<=",
        "limit": 0.1,
        "unit": "mL",
        "passed": True,
        "source": default_rules().source("injection.rat.im"),
        "example_only": False,
    }


def test_check_value_refuses_bad_requests():
    rules = default_rules()
    with pytest.raises(InputError, match="comparison: got '=='; use one of"):
        check_value(rules, "injection.mouse.iv", 1.0, comparison="==")
    with pytest.raises(InputError, match="value for injection.mouse.iv: got NaN"):
        check_value(rules, "injection.mouse.iv", math.nan)
    with pytest.raises(InputError, match="did you mean 'injection.mouse.iv'"):
        check_value(rules, "injection.mouse.i", 1.0)
    with pytest.raises(TypeError):
        check_value(rules, "injection.mouse.iv", "1.0")


# ---------------------------------------------------------------------------
# Fuzzing the parser: any text either parses or raises InputError
# ---------------------------------------------------------------------------


def _parse_or_input_error(text: str) -> None:
    try:
        result = parse_rules_text(text, filename="fuzz.toml")
    except InputError as exc:
        assert str(exc).startswith("fuzz.toml") and "\n" not in str(exc)
    else:
        assert isinstance(result, Rules) and len(result) == len(default_rules())


@settings(max_examples=300, deadline=None)
@given(st.text())
def test_fuzz_arbitrary_text(text):
    _parse_or_input_error(text)


_IDS = list(default_rules().ids())
_KEYS = st.sampled_from(["value", "unit", "source", "note", "units", "description"])
_VALUES = st.one_of(
    st.integers(min_value=-(10**20), max_value=10**20).map(str),
    st.floats(allow_nan=True, allow_infinity=True).map(lambda x: repr(x).replace("nan", "nan").replace("inf", "inf")),
    st.sampled_from(['"mL/kg"', '"mL"', '"%"', '"count"', '"h"', "true", "[1, 2]", "{ a = 1 }", "1979-05-27", '""']),
)
_LINES = st.one_of(
    st.sampled_from(_IDS).map(lambda rule_id: f"[{rule_id}]"),
    st.sampled_from(_IDS).map(lambda rule_id: f"[{rule_id.rsplit('.', 1)[0]}]"),
    st.sampled_from(["[about]", "[[injection.mouse.iv]]", "[injection]", ""]),
    st.tuples(_KEYS, _VALUES).map(lambda kv: f"{kv[0]} = {kv[1]}"),
    st.tuples(st.sampled_from([i.rsplit(".", 1)[1] for i in _IDS]), _VALUES, _VALUES).map(
        lambda kv: f"{kv[0]} = {{ value = {kv[1]}, unit = {kv[2]} }}"
    ),
)


@settings(max_examples=400, deadline=None)
@given(st.lists(_LINES, max_size=12).map("\n".join))
def test_fuzz_rules_like_text(text):
    # Text built from real headers, keys and values reaches the validation, not only the TOML parser.
    _parse_or_input_error(text)
