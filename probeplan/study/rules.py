"""The institution rules file: limits a study plan is checked against.

Every limit probeplan checks (injection volumes, blood sampling, the share of
the skin maximum permissible exposure allowed, anaesthesia time, imaging
sessions, heavy-metal probe dose, tumour size) is a *rule* with an id, a value,
a unit and a source.  Defaults ship in ``probeplan/data/default_rules.toml``:
published values where a published table exists, clearly marked example values
where none does.  An institution writes its own TOML file; :func:`load_rules`
merges it over the defaults and refuses anything it cannot use.

For research use only: the institution's animal care committee, laser safety
officer and local regulations decide what the limits are.

File layout
-----------
One table per rule, keyed by the rule id (a dotted path), either as a table::

    [injection.mouse.iv]
    value = 5
    unit = "mL/kg"
    source = "Animal care committee policy 12, 2024"

or inline, grouped under a common prefix::

    [injection.mouse]
    iv = { value = 5, unit = "mL/kg", source = "policy 12" }
    ip = { value = 10, unit = "mL/kg" }

``value`` and ``unit`` are required: the unit must be the rule's own unit, so a
value in the wrong unit is refused rather than silently misread.  ``source``
(defaults to the file name) and ``note`` are optional.  A free-form ``[about]``
table (strings only: institution, contact, date, ...) is kept with the rules.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, replace
from importlib import resources
from pathlib import Path
from types import MappingProxyType
from typing import Any

from probeplan.errors import InputError, did_you_mean, input_error
from probeplan.io.tomlsource import MAX_TOML_BYTES, line_of, parse_toml_text

__all__ = [
    "Rule",
    "Rules",
    "RuleCheck",
    "rule_checks_frame",
    "COMPARISONS",
    "DEFAULT_RULES_FILE",
    "default_rules",
    "load_rules",
    "parse_rules_text",
    "check_value",
]

#: Package-data name of the shipped defaults.
DEFAULT_RULES_FILE = "default_rules.toml"
_DEFAULTS_ORIGIN = "probeplan defaults"

#: Comparisons accepted by :func:`check_value`: the measured value on the left, the limit on the right.
COMPARISONS: Mapping[str, Any] = MappingProxyType(
    {
        "<=": lambda value, limit: value <= limit,
        "<": lambda value, limit: value < limit,
        ">=": lambda value, limit: value >= limit,
        ">": lambda value, limit: value > limit,
    }
)
_LIMIT_COMPARISON = {"max": "<=", "min": ">="}

_USER_KEYS = frozenset({"value", "unit", "source", "note"})
_DEFAULT_KEYS = _USER_KEYS | {"description", "limit", "range", "integer", "example_only"}
_ABOUT_TABLE = "about"


@dataclass(frozen=True)
class Rule:
    """One limit: id, value, unit and where the value comes from.

    Attributes
    ----------
    id : str
        Dotted rule id, e.g. ``"injection.mouse.iv"``.
    description : str
        What the limit is, one line.
    value : float
        The limit, in :attr:`unit` (an ``int`` for counts).
    unit : str
        The rule's one unit.
    source : str
        Citation, or the institution file that set it.
    limit : {"max", "min"}
        ``"max"``: a checked quantity must not exceed the value; ``"min"``: must not fall below it.
    example_only : bool
        True while the value is the shipped example of a limit with no universal published value.
    origin : str
        ``"probeplan defaults"`` or the path of the rules file that set the value.
    note : str
        Free text from the rules file (may be empty).
    valid_range : tuple of float
        Inclusive range of values an override may take.
    integer : bool
        True when the value is a count.
    """

    id: str
    description: str
    value: float
    unit: str
    source: str
    limit: str = "max"
    example_only: bool = False
    origin: str = _DEFAULTS_ORIGIN
    note: str = ""
    valid_range: tuple[float, float] = (0.0, math.inf)
    integer: bool = False


@dataclass(frozen=True)
class RuleCheck:
    """The result of checking one value against one rule (a row of the plan's rule table).

    Attributes
    ----------
    rule_id, description, unit, source : str
        Copied from the rule.
    value : float
        The planned or measured quantity, in ``unit``.
    limit : float
        The rule's value.
    comparison : str
        How ``value`` was compared with ``limit`` (``"<="`` etc.).
    passed : bool
        True when the comparison holds.
    example_only : bool
        True when the limit is a shipped example the institution has not set.
    """

    rule_id: str
    description: str
    value: float
    limit: float
    unit: str
    passed: bool
    source: str
    comparison: str = "<="
    example_only: bool = False

    def as_row(self) -> dict[str, Any]:
        """Return the check as a flat dict (for tables, CSV and JSON)."""
        return {
            "rule": self.rule_id,
            "description": self.description,
            "value": self.value,
            "comparison": self.comparison,
            "limit": self.limit,
            "unit": self.unit,
            "passed": self.passed,
            "source": self.source,
            "example_only": self.example_only,
        }


def rule_checks_frame(checks: Sequence[RuleCheck]):
    """Rule checks as a :class:`pandas.DataFrame`, one row per check (:meth:`RuleCheck.as_row` columns).

    Examples
    --------
    >>> c = RuleCheck("skin", "skin exposure", 0.2, 1.0, "fraction of MPE", True, "ANSI Z136.1")
    >>> rule_checks_frame([c])[["rule", "value", "passed"]].values.tolist()
    [['skin', 0.2, True]]
    """
    import pandas as pd

    columns = ["rule", "description", "value", "comparison", "limit", "unit", "passed", "source", "example_only"]
    return pd.DataFrame.from_records([c.as_row() for c in checks], columns=columns)


class Rules:
    """An immutable, ordered set of :class:`Rule`, looked up by id.

    Iterating yields :class:`Rule` objects in the defaults' order.  Looking up an
    unknown id raises :class:`~probeplan.errors.InputError` with the closest ids.

    Examples
    --------
    >>> rules = default_rules()
    >>> rules.value("injection.mouse.iv"), rules.unit("injection.mouse.iv")
    (5.0, 'mL/kg')
    >>> rules["injection.mouse.im"].unit
    'mL'
    >>> "laser.skin_mpe_fraction" in rules
    True
    """

    def __init__(self, rules: Iterable[Rule], *, files: Iterable[str] = (), about: Mapping[str, str] | None = None):
        table: dict[str, Rule] = {}
        for rule in rules:
            if not isinstance(rule, Rule):
                raise TypeError(f"rules: expected Rule objects, got {type(rule).__name__}")
            table[rule.id] = rule
        self._rules = MappingProxyType(table)
        self.files: tuple[str, ...] = tuple(files)
        self.about: Mapping[str, str] = MappingProxyType(dict(about or {}))

    def __getitem__(self, rule_id: str) -> Rule:
        try:
            return self._rules[rule_id]
        except (KeyError, TypeError):
            raise _unknown_rule("rules", rule_id, self._rules) from None

    def __contains__(self, rule_id: object) -> bool:
        return rule_id in self._rules

    def __iter__(self) -> Iterator[Rule]:
        return iter(self._rules.values())

    def __len__(self) -> int:
        return len(self._rules)

    def __repr__(self) -> str:
        origin = ", ".join(self.files) if self.files else _DEFAULTS_ORIGIN
        return f"Rules({len(self)} rules from {origin})"

    def ids(self) -> tuple[str, ...]:
        """All rule ids, in order."""
        return tuple(self._rules)

    def get(self, rule_id: str, default: Rule | None = None) -> Rule | None:
        """The rule with this id, or ``default``."""
        return self._rules.get(rule_id, default)

    def value(self, rule_id: str) -> float:
        """The limit's value, in :meth:`unit`."""
        return self[rule_id].value

    def unit(self, rule_id: str) -> str:
        """The rule's unit."""
        return self[rule_id].unit

    def source(self, rule_id: str) -> str:
        """Where the rule's value comes from."""
        return self[rule_id].source

    def with_values(self, values: Mapping[str, float], *, source: str, origin: str = "<program>") -> Rules:
        """Return a copy with some values replaced (units stay the rules' own).

        Parameters
        ----------
        values : mapping of str to float
            Rule id to new value, in the rule's unit.
        source : str
            Where the new values come from (recorded on each rule).
        origin : str
            Name recorded as the values' origin.

        Examples
        --------
        >>> strict = default_rules().with_values({"injection.mouse.iv": 2.0}, source="committee policy")
        >>> strict.value("injection.mouse.iv"), strict.source("injection.mouse.iv")
        (2.0, 'committee policy')
        """
        updated = dict(self._rules)
        for rule_id, raw in values.items():
            rule = self[rule_id]
            value = _checked_value(raw, rule, where=f"{origin}: {rule_id}")
            updated[rule_id] = replace(rule, value=value, source=source, origin=origin, example_only=False)
        return Rules(updated.values(), files=(*self.files, origin), about=self.about)


# ---------------------------------------------------------------------------
# Loading
# ---------------------------------------------------------------------------


@functools.lru_cache(maxsize=1)
def default_rules() -> Rules:
    """The shipped default rules (published values and marked examples).

    Returns
    -------
    Rules
        Immutable; cached.

    Examples
    --------
    >>> rules = default_rules()
    >>> rules["anaesthesia.max_session_duration"].example_only
    True
    """
    text = resources.files("probeplan.data").joinpath(DEFAULT_RULES_FILE).read_text(encoding="utf-8")
    return _parse(text, filename=DEFAULT_RULES_FILE, base=None)


def load_rules(path: str | Path | None = None) -> Rules:
    """Load an institution rules file and merge it over the defaults.

    Parameters
    ----------
    path : str or Path, optional
        The institution's TOML rules file.  ``None`` returns the defaults.

    Returns
    -------
    Rules
        Defaults with the file's values in place.

    Raises
    ------
    InputError
        The file is missing, not UTF-8, not valid TOML, names an unknown rule
        (the message suggests the closest ids), gives a value of the wrong type,
        a negative or out-of-range value, a unit other than the rule's own, or
        an unknown key.  Messages read ``file:line: key.path: problem; fix``.

    Notes
    -----
    The input file is only read, never modified.  Rules the file does not
    mention keep their defaults; example-only defaults stay marked as such.
    """
    if path is None:
        return default_rules()
    from probeplan.io.text import read_text_input

    text = read_text_input(path, what="rules file", max_bytes=MAX_TOML_BYTES)
    if not any(line.strip() and not line.lstrip().startswith("#") for line in text.splitlines()):
        # an empty copy must not pass silently for the institution's rules
        raise input_error(str(path), "holds no rules (empty or only comments)",
                          "write the institution's limits in it (see demo_tissue/rules.toml), or use the default rules")
    return parse_rules_text(text, filename=str(path))


def parse_rules_text(text: str, *, filename: str = "<rules>", base: Rules | None = None) -> Rules:
    """Parse rules-file text and merge it over ``base`` (the defaults when ``None``).

    Parameters
    ----------
    text : str
        TOML text in the layout described in the module docstring.
    filename : str
        Name used in error messages and recorded as the rules' origin.
    base : Rules, optional
        Rules to merge over; defaults to :func:`default_rules`.

    Returns
    -------
    Rules

    Raises
    ------
    InputError
        As :func:`load_rules`.
    TypeError
        If ``text`` is not a str.

    Examples
    --------
    >>> rules = parse_rules_text('[injection.mouse]\\niv = { value = 4, unit = "mL/kg" }', filename="r.toml")
    >>> rules.value("injection.mouse.iv"), rules.source("injection.mouse.iv")
    (4.0, 'institution rules file r.toml')
    >>> parse_rules_text('[injection.mouse]\\niv = { value = 0.1, unit = "mL" }', filename="r.toml")
    Traceback (most recent call last):
    ...
    probeplan.errors.InputError: r.toml:2: injection.mouse.iv.unit: got 'mL', but this rule is in 'mL/kg'; \
write unit = "mL/kg" and give the value in mL/kg
    """
    if not isinstance(text, str):
        raise TypeError(f"text: expected str, got {type(text).__name__}")
    return _parse(text, filename=filename, base=default_rules() if base is None else base)


# ---------------------------------------------------------------------------
# Checking
# ---------------------------------------------------------------------------


def check_value(
    rules: Rules,
    rule_id: str,
    value: float,
    *,
    comparison: str | None = None,
    description: str | None = None,
) -> RuleCheck:
    """Check one planned quantity against one rule.

    Parameters
    ----------
    rules : Rules
        The rules in force.
    rule_id : str
        The rule to check against.
    value : float
        The planned quantity, in the rule's unit (``rules.unit(rule_id)``).
    comparison : {"<=", "<", ">=", ">"}, optional
        How ``value`` must relate to the limit.  Default: the rule's own
        direction, ``"<="`` for a maximum and ``">="`` for a minimum.
    description : str, optional
        Text for the table row; defaults to the rule's description.

    Returns
    -------
    RuleCheck

    Raises
    ------
    InputError
        Unknown rule id (with suggestions), unknown comparison, or a NaN value.

    Examples
    --------
    >>> rules = default_rules()
    >>> check_value(rules, "injection.mouse.iv", 4.0).passed
    True
    >>> check_value(rules, "imaging.min_interval_between_sessions", 12.0).passed
    False
    """
    rule = rules[rule_id]
    if comparison is None:
        comparison = _LIMIT_COMPARISON[rule.limit]
    if comparison not in COMPARISONS:
        raise input_error("comparison", f"got {comparison!r}", f"use one of {', '.join(repr(c) for c in COMPARISONS)}")
    if isinstance(value, bool) or not isinstance(value, (int, float)) and not hasattr(value, "__float__"):
        raise TypeError(f"value: expected a number in {rule.unit}, got {type(value).__name__}")
    number = float(value)
    if math.isnan(number):
        raise input_error(f"value for {rule_id}", "got NaN", f"give a number in {rule.unit}")
    return RuleCheck(
        rule_id=rule.id,
        description=description if description is not None else rule.description,
        value=number,
        limit=float(rule.value),
        unit=rule.unit,
        passed=bool(COMPARISONS[comparison](number, rule.value)),
        source=rule.source,
        comparison=comparison,
        example_only=rule.example_only,
    )


# ---------------------------------------------------------------------------
# Parsing internals
# ---------------------------------------------------------------------------


def _unknown_rule(where: str, rule_id: object, known: Iterable[str]) -> InputError:
    fix = did_you_mean(rule_id, known, cutoff=0.6, listing="see default_rules.toml for the rule ids")
    return input_error(where, f"unknown rule {str(rule_id)!r}", fix)


def _parse(text: str, *, filename: str, base: Rules | None) -> Rules:
    defaults_mode = base is None
    try:
        data = parse_toml_text(text, source=filename)
    except RecursionError:
        raise input_error(filename, "nested too deeply", "write one table per rule") from None
    parser = _Parser(text, filename, base, defaults_mode)
    parser.walk(data, ())
    return parser.result()


class _Parser:
    """Walks the parsed TOML, validating each rule table and collecting the rules."""

    def __init__(self, text: str, filename: str, base: Rules | None, defaults_mode: bool):
        self.text = text
        self.filename = filename
        self.base = base
        self.defaults_mode = defaults_mode
        self.known: dict[str, Rule] = {} if base is None else {rule.id: rule for rule in base}
        self.found: dict[str, Rule] = {}
        self.about: dict[str, str] = dict(base.about) if base is not None else {}

    # -- messages ---------------------------------------------------------
    def where(self, key_path: str) -> str:
        line = line_of(self.text, tuple(key_path.split("."))) if key_path else None
        location = f"{self.filename}:{line}" if line else self.filename
        return f"{location}: {key_path}" if key_path else location

    def unknown(self, key_path: str) -> InputError:
        return _unknown_rule(self.where(key_path), key_path, self.known)

    # -- walking ----------------------------------------------------------
    def walk(self, node: Any, path: tuple[str, ...]) -> None:
        key_path = ".".join(path)
        if path == (_ABOUT_TABLE,) and not self.defaults_mode:
            self.read_about(node)
        elif isinstance(node, dict) and "value" in node:
            self.read_rule(key_path, node)
        elif isinstance(node, dict):
            if not node and path:
                if not any(rule_id == key_path or rule_id.startswith(key_path + ".") for rule_id in self.known):
                    if not self.defaults_mode:
                        raise self.unknown(key_path)
            for key, child in node.items():
                self.walk(child, (*path, key))
        elif self.defaults_mode:
            raise self.where_error(key_path, "not a rule table", "give description, value, unit, source")
        elif isinstance(node, list):
            raise self.where_error(
                key_path,
                "a list or an array of tables ([[...]]) is not a rule",
                f"write one table per rule: [{key_path}] with value and unit",
            )
        elif key_path in self.known:
            rule = self.known[key_path]
            raise self.where_error(
                key_path,
                f"a bare {_type_name(node)} has no unit",
                f'write {path[-1]} = {{ value = {_show(node)}, unit = "{rule.unit}" }}',
            )
        elif len(path) > 1 and ".".join(path[:-1]) in self.known:
            parent = ".".join(path[:-1])
            if path[-1] in _USER_KEYS:
                raise self.where_error(parent, "no value given", f"add value = <number in {self.known[parent].unit}>")
            raise self.where_error(key_path, f"unknown key {path[-1]!r}", f"a rule takes only {', '.join(sorted(_USER_KEYS))}")
        else:
            raise self.unknown(key_path)

    def where_error(self, key_path: str, problem: str, fix: str) -> InputError:
        return input_error(self.where(key_path), problem, fix)

    def read_about(self, node: Any) -> None:
        if not isinstance(node, dict):
            raise self.where_error(_ABOUT_TABLE, f"got a {_type_name(node)}", "make [about] a table of text entries")
        for key, value in node.items():
            if not isinstance(value, str):
                raise self.where_error(f"{_ABOUT_TABLE}.{key}", f"got a {_type_name(value)}", "write text in quotes")
            self.about[key] = value

    def read_rule(self, rule_id: str, table: dict[str, Any]) -> None:
        if not rule_id:
            raise self.where_error("", "value outside any rule table", "put it under the rule's table, e.g. [injection.mouse.iv]")
        allowed = _DEFAULT_KEYS if self.defaults_mode else _USER_KEYS
        for key in table:
            if key not in allowed:
                raise self.where_error(
                    f"{rule_id}.{key}", f"unknown key {key!r}", f"a rule takes only {', '.join(sorted(allowed))}"
                )
        if self.defaults_mode:
            rule = self.default_rule(rule_id, table)
        else:
            if rule_id not in self.known:
                raise self.unknown(rule_id)
            rule = self.override(self.known[rule_id], table)
        self.found[rule_id] = rule

    def text_field(self, rule_id: str, table: dict[str, Any], key: str, default: str | None = None) -> str:
        if key not in table:
            if default is None:
                raise self.where_error(rule_id, f"no {key} given", f'add {key} = "..."')
            return default
        value = table[key]
        if not isinstance(value, str):
            raise self.where_error(f"{rule_id}.{key}", f"got a {_type_name(value)}", "write text in quotes")
        return value

    def override(self, rule: Rule, table: dict[str, Any]) -> Rule:
        rid = rule.id
        if "unit" not in table:
            raise self.where_error(rid, "no unit given", f'add unit = "{rule.unit}" (the rule\'s unit)')
        unit = table["unit"]
        if not isinstance(unit, str):
            raise self.where_error(f"{rid}.unit", f"got a {_type_name(unit)}", f'write unit = "{rule.unit}"')
        if unit.strip().casefold() != rule.unit.casefold():
            raise self.where_error(
                f"{rid}.unit",
                f"got {unit!r}, but this rule is in {rule.unit!r}",
                f'write unit = "{rule.unit}" and give the value in {rule.unit}',
            )
        value = _checked_value(table["value"], rule, where=self.where(f"{rid}.value"))
        source = self.text_field(rid, table, "source", default=f"institution rules file {self.filename}")
        note = self.text_field(rid, table, "note", default="")
        return replace(rule, value=value, source=source, note=note, origin=self.filename, example_only=False)

    def default_rule(self, rule_id: str, table: dict[str, Any]) -> Rule:
        limit = self.text_field(rule_id, table, "limit", default="max")
        if limit not in _LIMIT_COMPARISON:
            raise self.where_error(f"{rule_id}.limit", f"got {limit!r}", 'write "max" or "min"')
        raw_range = table.get("range", [0.0, math.inf])
        if (
            not isinstance(raw_range, list)
            or len(raw_range) != 2
            or not all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in raw_range)
            or not 0 <= raw_range[0] <= raw_range[1]
        ):
            raise self.where_error(f"{rule_id}.range", f"got {raw_range!r}", "write [low, high] with 0 <= low <= high")
        for key in ("integer", "example_only"):
            if not isinstance(table.get(key, False), bool):
                raise self.where_error(f"{rule_id}.{key}", "not true/false", "write true or false")
        template = Rule(
            id=rule_id,
            description=self.text_field(rule_id, table, "description"),
            value=0.0,
            unit=self.text_field(rule_id, table, "unit"),
            source=self.text_field(rule_id, table, "source"),
            limit=limit,
            example_only=table.get("example_only", False),
            note=self.text_field(rule_id, table, "note", default=""),
            valid_range=(float(raw_range[0]), float(raw_range[1])),
            integer=table.get("integer", False),
        )
        return replace(template, value=_checked_value(table["value"], template, where=self.where(f"{rule_id}.value")))

    def result(self) -> Rules:
        if self.defaults_mode:
            ids = list(self.found)
            for rule_id in ids:
                if any(other.startswith(rule_id + ".") for other in ids):
                    raise self.where_error(rule_id, "is a prefix of another rule id", "rename it")
            return Rules(self.found.values(), about=self.about)
        merged = {rule_id: self.found.get(rule_id, rule) for rule_id, rule in self.known.items()}
        files = self.base.files if self.base is not None else ()
        return Rules(merged.values(), files=(*files, self.filename), about=self.about)


def _checked_value(raw: Any, rule: Rule, *, where: str) -> float:
    """Validate one rule value: a finite, non-negative number in the rule's range."""
    in_unit = "as a plain number" if rule.unit == "1" else f"in {rule.unit}"
    if isinstance(raw, bool) or not isinstance(raw, (int, float)):
        raise input_error(where, f"got {_show(raw)} ({_type_name(raw)})", f"give a number {in_unit}")
    try:
        number = float(raw)
    except OverflowError:
        raise input_error(where, "number too large", f"give a number {in_unit}") from None
    if not math.isfinite(number):
        raise input_error(where, f"got {raw!r}", f"give a finite number {in_unit}")
    if number < 0:
        raise input_error(where, f"got {raw!r}, a limit cannot be negative", f"give a value >= 0 {in_unit}")
    low, high = rule.valid_range
    if not low <= number <= high:
        shown = _show(raw) if rule.unit == "1" else f"{_show(raw)} {rule.unit}"
        raise input_error(where, f"got {shown}, outside {low:g}-{high:g}", "give a value in that range")
    if rule.integer:
        if not number.is_integer():
            raise input_error(where, f"got {raw!r}, this rule is a count", "give a whole number")
        return int(number)
    return number


def _type_name(value: Any) -> str:
    return {
        bool: "true/false",
        str: "text",
        list: "list",
        dict: "table",
        int: "number",
        float: "number",
    }.get(type(value), type(value).__name__)


def _show(value: Any) -> str:
    shown = repr(value)
    return shown if len(shown) <= 40 else shown[:37] + "..."
