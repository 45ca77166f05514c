"""The study plan: its TOML schema and validation.

A plan file has these tables (units are in the key names)::

    [study]        title, description, protocol_id
    [animals]      species ("mouse" | "rat"), body_mass_g = [lightest, heaviest], strain,
                   sessions_per_animal, session_interval_h, [[animals.groups]] name, size
    [[probes]]     name, material, emission_peak_nm, stock_uM, dose_nmol_per_kg,
                   route ("iv" | "iv_slow" | "ip" | "sc" | "im" | "oral"), injection_time_h,
                   optional quantum_yield, fwhm_nm, extinction_at_excitation_per_M_cm
    [target]       tissue, depth_mm, size_mm, uptake_ratio, concentration_uM, tumour_diameter_mm
    [tissue]       optional: [[tissue.layers]] tissue, thickness_mm: layers from the surface down
                   (e.g. skin, then subcutaneous fat) over the target's tissue; and
                   transport_model ("auto" | "mc_table" | "diffusion")
    [acquisition]  source ("laser" | "led"), wavelength_nm, linewidth_nm, either
                   irradiance_mw_per_cm2 or power_mw + spot_diameter_mm, beam_profile,
                   camera, f_number, magnification, binning, positions, time_points_h,
                   overhead_min, [[acquisition.channels]] name, filter, exposure_s
    [analysis]     stack, references, rois, method ("nnls" | "ls" | "wls")
    [statistics]   effect_size, sd, alpha, power, attrition   (optional: the primary comparison)

Every number has a stated range (the schema below is the one table of them): physical
limits where they exist (wavelengths of the far-red to NIR-II windows, a quantum yield, a
probability) and practical limits elsewhere, far beyond any real small-animal study but small
enough that no value can make an evaluation run for hours or exhaust memory; lists and arrays
of tables have a largest length too.  They are checked before any work.

Every refusal names the file, the line, the key path and the fix, e.g.
``plan.toml:14: probes[2].dose_nmol_per_kg: expected a number, got "ten"; ...`` or
``plan.toml:9: animals.sessions_per_animal: got 1e+06, allowed 1 to 1000; ...``.
Unknown keys are refused with "did you mean".  Paths in ``[analysis]`` are
relative to the plan file's folder.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from probeplan.errors import did_you_mean, input_error
from probeplan.io.tomlsource import format_path, line_of, load_toml, parse_toml_text
from probeplan.model.defaults import DEFAULT_CONCENTRATION_UM

__all__ = ["Plan", "load_plan", "parse_plan_text", "SCHEMA", "ROUTES", "SPECIES", "MAX_TABLES"]

#: Numbers at or beyond this size (TOML's 64-bit integer range) are refused as too large.
_LARGEST_INTEGER = 2**63

ROUTES = ("iv", "iv_slow", "ip", "sc", "im", "oral")
SPECIES = ("mouse", "rat")


@dataclass(frozen=True)
class _Field:
    kind: str  # "number", "integer", "string", "bool", "numbers", "strings", "pair"
    required: bool = False
    default: Any = None
    minimum: float | None = None
    maximum: float | None = None
    exclusive_minimum: bool = False
    choices: tuple[str, ...] | None = None
    help: str = ""
    max_items: int | None = None  #: largest length of a list


#: Largest number of tables in each array of tables (practical limits).
MAX_TABLES = {"probes": 16, "groups": 100, "channels": 64}


def _num(required=False, default=None, minimum=None, maximum=None, exclusive=False, help=""):
    if maximum is None:
        raise ValueError("every number in the plan needs a maximum")  # pragma: no cover - schema rule
    return _Field("number", required, default, minimum, maximum, exclusive, None, help)


def _int(required=False, default=None, minimum=None, maximum=None, help=""):
    if maximum is None:
        raise ValueError("every number in the plan needs a maximum")  # pragma: no cover - schema rule
    return _Field("integer", required, default, minimum, maximum, False, None, help)


def _str(required=False, default=None, choices=None, help=""):
    return _Field("string", required, default, None, None, False, choices, help)


_STUDY = {"title": _str(True, help="a title of your own"), "description": _str(default=""),
          "protocol_id": _str(default="")}
_GROUP = {"name": _str(True), "size": _int(True, minimum=1, maximum=1000, help="animals in the group")}
_ANIMALS = {
    "species": _str(True, choices=SPECIES),
    "strain": _str(default=""),
    "body_mass_g": _Field("pair", True, None, 0.0, 5000.0, True, help="[lightest, heaviest] in g"),
    "sessions_per_animal": _int(default=1, minimum=1, maximum=1000),
    "session_interval_h": _num(default=24.0, minimum=0.0, maximum=8760.0, help="hours, at most a year"),
}
_PROBE = {
    "name": _str(default=""),
    "material": _str(True),
    "emission_peak_nm": _num(True, minimum=200.0, maximum=3000.0),
    "stock_uM": _num(True, minimum=0.0, maximum=1e6, exclusive=True, help="stock concentration in µM"),
    "dose_nmol_per_kg": _num(True, minimum=0.0, maximum=1e6, exclusive=True, help="dose in nmol per kg body mass"),
    "route": _str(True, choices=ROUTES),
    "injection_time_h": _num(default=0.0, minimum=-8760.0, maximum=8760.0),
    "quantum_yield": _num(minimum=0.0, maximum=1.0, exclusive=True),
    "fwhm_nm": _num(minimum=0.0, maximum=1000.0, exclusive=True),
    "extinction_at_excitation_per_M_cm": _num(minimum=0.0, maximum=1e9, exclusive=True),
    "core_diameter_nm": _num(minimum=0.0, maximum=100.0, exclusive=True,
                             help="core diameter in nm (default: from the material's sizing curve)"),
    "shell": _str(help="shell compound, e.g. 'ZnS' or 'CdS' (counted in the metal dose)"),
    "shell_thickness_nm": _num(minimum=0.0, maximum=100.0, help="shell thickness in nm"),
}
_TARGET = {
    "tissue": _str(True),
    "depth_mm": _num(True, minimum=0.0, maximum=100.0),
    "size_mm": _num(True, minimum=0.0, maximum=100.0, exclusive=True),
    "uptake_ratio": _num(True, minimum=1.0, maximum=1e6, help="target-to-background uptake ratio, >= 1"),
    "concentration_uM": _num(default=DEFAULT_CONCENTRATION_UM, minimum=0.0, maximum=1e6, exclusive=True,
                             help="expected probe concentration in target"),
    "tumour_diameter_mm": _num(minimum=0.0, maximum=100.0, exclusive=True, help="largest planned tumour diameter"),
}
_LAYER = {"tissue": _str(True, help="a tissue preset or user tissue, e.g. 'skin'"),
          "thickness_mm": _num(True, minimum=0.0, maximum=50.0, exclusive=True, help="layer thickness in mm")}
_TISSUE = {"transport_model": _str(default="auto", choices=("auto", "mc_table", "diffusion"))}
_CHANNEL = {"name": _str(True), "filter": _str(True, help="e.g. '720/40' or a library filter"),
            "exposure_s": _num(True, minimum=0.0, maximum=3600.0, exclusive=True)}
_ACQUISITION = {
    "source": _str(default="laser", choices=("laser", "led")),
    "wavelength_nm": _num(True, minimum=200.0, maximum=3000.0),
    "linewidth_nm": _num(default=None, minimum=0.0, maximum=500.0, exclusive=True),
    "irradiance_mw_per_cm2": _num(minimum=0.0, maximum=1e5, exclusive=True),
    "power_mw": _num(minimum=0.0, maximum=1e6, exclusive=True),
    "spot_diameter_mm": _num(minimum=0.0, maximum=1000.0, exclusive=True),
    "beam_profile": _str(default="top-hat", choices=("top-hat", "gaussian")),
    "camera": _str(True),
    "f_number": _num(default=2.0, minimum=0.5, maximum=64.0),
    "magnification": _num(default=0.1, minimum=0.0, maximum=100.0, exclusive=True),
    "binning": _int(default=1, minimum=1, maximum=64),
    "positions": _int(default=1, minimum=1, maximum=100),
    "time_points_h": _Field("numbers", True, None, 0.0, 8760.0, False, max_items=1000),
    "overhead_min": _num(default=10.0, minimum=0.0, maximum=1440.0, help="anaesthesia induction, positioning, recovery"),
}
_ANALYSIS = {
    "stack": _str(default=""),
    "references": _str(default=""),
    "rois": _Field("strings", False, (), max_items=1000),
    "method": _str(default="nnls", choices=("nnls", "ls", "wls")),
}
_STATISTICS = {
    "effect_size": _num(True, minimum=0.0, maximum=1e12, exclusive=True, help="difference of group means to detect"),
    "sd": _num(True, minimum=0.0, maximum=1e12, exclusive=True, help="standard deviation, same unit as effect_size"),
    "alpha": _num(default=0.05, minimum=0.0, maximum=0.5, exclusive=True),
    "power": _num(default=0.8, minimum=0.5, maximum=0.999),
    "attrition": _num(default=0.0, minimum=0.0, maximum=0.9, help="expected fraction of animals lost"),
}

#: The plan schema: section → (fields, is an array of tables, sub-arrays).
SCHEMA: dict[str, tuple[dict[str, _Field], bool, dict[str, dict[str, _Field]]]] = {
    "study": (_STUDY, False, {}),
    "animals": (_ANIMALS, False, {"groups": _GROUP}),
    "probes": (_PROBE, True, {}),
    "target": (_TARGET, False, {}),
    "tissue": (_TISSUE, False, {"layers": _LAYER}),
    "acquisition": (_ACQUISITION, False, {"channels": _CHANNEL}),
    "analysis": (_ANALYSIS, False, {}),
    "statistics": (_STATISTICS, False, {}),
}
_REQUIRED_SECTIONS = ("study", "animals", "probes", "target", "acquisition")
_UNIT_SUFFIXES = ("_nmol_per_kg", "_mg_per_kg", "_umol_per_kg", "_uM", "_nM", "_mM", "_mg_per_ml", "_nm", "_um",
                  "_mm", "_cm", "_g", "_kg", "_s", "_ms", "_min", "_h", "_mw_per_cm2", "_w_per_cm2", "_mw", "_w")


@dataclass
class Plan:
    """A validated study plan (defaults filled in); ``path`` is the file it came from."""

    study: dict[str, Any]
    animals: dict[str, Any]
    probes: list[dict[str, Any]]
    target: dict[str, Any]
    acquisition: dict[str, Any]
    analysis: dict[str, Any]
    statistics: dict[str, Any] | None
    tissue: dict[str, Any] = field(default_factory=lambda: {"transport_model": "auto", "layers": []})
    path: Path | None = None
    text: str = field(default="", repr=False)
    source: str = field(default="", repr=False)  #: name used in messages (the file path, or the text's source)

    @property
    def folder(self) -> Path:
        """Folder that relative paths in the plan are taken from."""
        return self.path.parent if self.path is not None else Path(".")

    def resolve(self, relative: str) -> Path:
        """An ``[analysis]`` path resolved against the plan's folder."""
        p = Path(relative)
        return p if p.is_absolute() else self.folder / p


class _Validator:
    def __init__(self, text: str, source: str):
        self.text = text
        self.source = source

    def where(self, path: tuple[Any, ...]) -> str:
        line = line_of(self.text, path)
        loc = f"{self.source}:{line}" if line else self.source
        return f"{loc}: {format_path(path)}" if path else loc

    def fail(self, path: tuple[Any, ...], problem: str, fix: str):
        return input_error(self.where(path), problem, fix)

    def unknown_key(self, path: tuple[Any, ...], key: str, known: list[str]):
        stem = _strip_unit(key)
        for k in known:
            if stem and _strip_unit(k) == stem and k != key:
                return self.fail(path + (key,), f"unknown key {key!r}: this plan takes {k!r}",
                                 f"convert the value to the unit in {k!r} and use that key")
        return self.fail(path + (key,), f"unknown key {key!r}", did_you_mean(key, known))

    def value(self, path: tuple[Any, ...], spec: _Field, raw: Any) -> Any:
        if spec.kind in ("number", "integer"):
            if isinstance(raw, bool) or not isinstance(raw, (int, float)):
                raise self.fail(path, f"expected a number, got {_show(raw)}", f"write a plain number{_unit_hint(path)}")
            if spec.kind == "integer" and not (isinstance(raw, int) or float(raw).is_integer()):
                raise self.fail(path, f"expected a whole number, got {_show(raw)}", "write a whole number")
            try:
                v = float(raw) if spec.kind == "number" else int(raw)
                if abs(v) >= _LARGEST_INTEGER:
                    raise OverflowError
            except OverflowError:
                raise self.fail(path, f"number too large, allowed {_describe_range(spec)}",
                                f"write a plain number{_unit_hint(path)}") from None
            if not math.isfinite(v):
                raise self.fail(path, f"got {_show(raw)}", "write a finite number")
            self.bounds(path, spec, v)
            return v
        if spec.kind == "string":
            if not isinstance(raw, str):
                raise self.fail(path, f"expected text, got {_show(raw)}", "write it in double quotes")
            if spec.choices is not None and raw not in spec.choices:
                raise self.fail(path, f"got {raw!r}", did_you_mean(raw, spec.choices))
            if spec.required and not raw.strip():
                raise self.fail(path, "is empty", "give a value")
            return raw
        if spec.kind in ("numbers", "pair"):
            if not isinstance(raw, list) or not raw:
                raise self.fail(path, f"expected a list of numbers, got {_show(raw)}", "write e.g. [1, 4, 24]")
            self.length(path, spec.max_items, raw)
            out = [self.value(path + (i,), _Field("number", True, None, spec.minimum, spec.maximum,
                                                  spec.exclusive_minimum), v) for i, v in enumerate(raw)]
            if spec.kind == "pair":
                if len(out) != 2 or out[0] > out[1]:
                    raise self.fail(path, f"expected [lightest, heaviest], got {_show(raw)}",
                                    "write two numbers, the smaller first")
            return out
        if spec.kind == "strings":
            if not isinstance(raw, list) or not all(isinstance(v, str) for v in raw):
                raise self.fail(path, f"expected a list of text, got {_show(raw)}", 'write e.g. ["a", "b"]')
            self.length(path, spec.max_items, raw)
            return list(raw)
        raise AssertionError(spec.kind)  # pragma: no cover

    def length(self, path, max_items: int | None, raw: list) -> None:
        if max_items is not None and len(raw) > max_items:
            raise self.fail(path, f"{len(raw)} entries, allowed at most {max_items}", "shorten the list")

    def bounds(self, path, spec: _Field, v: float) -> None:
        low_bad = spec.minimum is not None and (v <= spec.minimum if spec.exclusive_minimum else v < spec.minimum)
        if low_bad or (spec.maximum is not None and v > spec.maximum):
            raise self.fail(path, f"got {v:g}, allowed {_describe_range(spec)}",
                            f"give a value{_unit_hint(path)} in that range" if low_bad else f"check the unit{_unit_hint(path)}")

    def table(self, path: tuple[Any, ...], fields: dict[str, _Field], subs: dict[str, dict[str, _Field]],
              raw: Any) -> dict[str, Any]:
        if not isinstance(raw, dict):
            raise self.fail(path, f"expected a table, got {_show(raw)}", f"write it as [{format_path(path)}]")
        known = list(fields) + list(subs)
        for key in raw:
            if key not in known:
                raise self.unknown_key(path, key, known)
        out: dict[str, Any] = {}
        for key, spec in fields.items():
            if key in raw:
                out[key] = self.value(path + (key,), spec, raw[key])
            elif spec.required:
                raise self.fail(path + (key,), "is missing", f"add {key} = ...{_help(spec)}")
            else:
                out[key] = spec.default
        for key, sub in subs.items():
            items = raw.get(key, [])
            if not isinstance(items, list):
                raise self.fail(path + (key,), "expected a list of tables", f"write each as [[{format_path(path + (key,))}]]")
            self.length(path + (key,), MAX_TABLES.get(key), items)
            out[key] = [self.table(path + (key, i), sub, {}, item) for i, item in enumerate(items)]
        return out


def _describe_range(spec: _Field) -> str:
    """The field's allowed range in words: ``"1 to 1000"``, ``"above 0 up to 5000"``."""
    if spec.minimum is None:
        return f"up to {spec.maximum:g}"
    if spec.exclusive_minimum:
        return f"above {spec.minimum:g}" + ("" if spec.maximum is None else f" up to {spec.maximum:g}")
    return f"{spec.minimum:g} or more" if spec.maximum is None else f"{spec.minimum:g} to {spec.maximum:g}"


def _help(spec: _Field) -> str:
    return f" ({spec.help})" if spec.help else ""


def _strip_unit(key: str) -> str:
    for suffix in sorted(_UNIT_SUFFIXES, key=len, reverse=True):
        if key.lower().endswith(suffix.lower()):
            return key[: -len(suffix)]
    return ""


def _unit_hint(path) -> str:
    last = next((p for p in reversed(path) if isinstance(p, str)), "")
    for suffix in sorted(_UNIT_SUFFIXES, key=len, reverse=True):
        if last.endswith(suffix):
            return " in " + suffix[1:].replace("_per_", "/").replace("uM", "µM")
    return ""


def _show(value: Any) -> str:
    if isinstance(value, str):
        return f'"{value}"'
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list):
        return "a list"
    return repr(value)


def _validate(data: dict[str, Any], text: str, source: str) -> dict[str, Any]:
    v = _Validator(text, source)
    for key in data:
        if key not in SCHEMA:
            raise v.unknown_key((), key, list(SCHEMA))
    for key in _REQUIRED_SECTIONS:
        if key not in data:
            raise v.fail((key,), "section is missing", f"add a [{key}] table (see the demo plan)")
    out: dict[str, Any] = {}
    for key, (fields, is_array, subs) in SCHEMA.items():
        if key not in data:
            out[key] = None if key == "statistics" else v.table((key,), fields, subs, {})
            continue
        if is_array:
            items = data[key]
            if not isinstance(items, list) or not items:
                raise v.fail((key,), "expected one or more tables", f"write each as [[{key}]]")
            v.length((key,), MAX_TABLES.get(key), items)
            out[key] = [v.table((key, i), fields, subs, item) for i, item in enumerate(items)]
        else:
            out[key] = v.table((key,), fields, subs, data[key])
    # cross-field rules
    acq = out["acquisition"]
    has_irr = acq["irradiance_mw_per_cm2"] is not None
    has_power = acq["power_mw"] is not None or acq["spot_diameter_mm"] is not None
    if has_irr and has_power:
        raise v.fail(("acquisition", "irradiance_mw_per_cm2"), "given together with power_mw/spot_diameter_mm",
                     "give either the irradiance or the power and spot diameter")
    if not has_irr and (acq["power_mw"] is None or acq["spot_diameter_mm"] is None):
        raise v.fail(("acquisition",), "needs the excitation irradiance",
                     "add irradiance_mw_per_cm2, or power_mw and spot_diameter_mm")
    if not acq["channels"]:
        raise v.fail(("acquisition", "channels"), "no channels", "add one [[acquisition.channels]] per emission filter")
    if len(acq["channels"]) < len(out["probes"]):
        raise v.fail(("acquisition", "channels"), f"{len(acq['channels'])} channels for {len(out['probes'])} probes",
                     "separating the probes needs at least as many channels as probes")
    if not out["animals"]["groups"]:
        raise v.fail(("animals", "groups"), "no groups", "add [[animals.groups]] with name and size")
    names = [p["name"] or f"{p['material']} {p['emission_peak_nm']:g} nm" for p in out["probes"]]
    for i, p in enumerate(out["probes"]):
        p["name"] = names[i]
    if len(set(names)) != len(names):
        raise v.fail(("probes",), "two probes have the same name", "give each probe a distinct name")
    return out


def parse_plan_text(text: str, *, source: str = "<plan>", path: Path | None = None) -> Plan:
    """Parse and validate plan TOML text (see the module docs for the schema)."""
    data = parse_toml_text(text, source=source)
    out = _validate(data, text, source)
    return Plan(path=path, text=text, source=source, **out)


def load_plan(path: str | Path) -> Plan:
    """Read and validate a plan file.

    Raises
    ------
    InputError
        One line naming the file, line, key path and fix.
    """
    data, text = load_toml(path, what="plan file")
    out = _validate(data, text, str(path))
    return Plan(path=Path(path), text=text, source=str(path), **out)

