"""The narrative first part of a plan's report, in the order an animal-use protocol asks for it.

:func:`protocol_sections` turns an evaluated plan (:func:`probeplan.study.evaluate.evaluate_plan`)
into titled sections of plain sentences: aim; design (groups, animals, time points);
justification of the animal numbers from the power analysis; probes, doses and injection
volumes against the limits; light dose against the skin limit; imaging schedule and
anaesthesia; then the parts only the institution can write (humane endpoints, disposal
of heavy-metal waste), left as marked placeholders.  Every number comes from the
evaluation's tables and checks; nothing here computes science.

:func:`plain_assumptions` gives each assumption once, in plain words: warning class names
are dropped and statements that differ only in their counts are said once.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

from probeplan.format import format_number

__all__ = ["Section", "PLACEHOLDER", "protocol_sections", "plain_assumptions"]

#: Marks text the institution must write (shown highlighted in HTML and PDF).
PLACEHOLDER = "TO BE COMPLETED BY THE INSTITUTION"


@dataclass
class Section:
    """A titled part of the narrative: paragraphs of plain text; ``placeholder`` paragraphs are the institution's."""

    title: str
    paragraphs: list[str] = field(default_factory=list)
    placeholders: list[str] = field(default_factory=list)


def _n(value, digits: int = 3) -> str:
    return format_number(float(value), digits) if value is not None else "–"


def _join(items: Sequence[str]) -> str:
    items = [str(i) for i in items]
    if len(items) <= 1:
        return "".join(items)
    return ", ".join(items[:-1]) + " and " + items[-1]


def _rows(ev, name: str) -> list[dict]:
    for t in ev.tables:
        if t.name == name:
            return list(t.rows)
    return []


def _checks(ev, rule_prefix: str) -> list:
    return [c for c in ev.checks if c.rule_id.startswith(rule_prefix)]


def _q(value, unit: str) -> str:
    """A value with its unit (counts and ratios are written bare)."""
    return _n(value) if unit in ("1", "count", "") else f"{_n(value)} {unit}"


def _verdict(check) -> str:
    return "within the limit" if check.passed else "ABOVE THE LIMIT"


def protocol_sections(ev) -> list[Section]:
    """The narrative of an evaluated plan (see the module notes)."""
    plan = ev.plan
    study, animals = plan.study, plan.animals
    groups = animals.get("groups") or []
    sections: list[Section] = []

    aim = study.get("aim") or study.get("description") or ""
    s = Section("Aim")
    s.paragraphs.append(f"{study['title']}." + (f" {aim}" if aim else ""))
    if not study.get("aim"):
        s.placeholders.append("State the scientific aim and the expected benefit in the protocol's own words.")
    sections.append(s)

    s = Section("Design: groups, animals and time points")
    total = sum(int(g.get("size", 0)) for g in groups)
    strain = f" ({animals['strain']})" if animals.get("strain") else ""
    masses = animals.get("body_mass_g") or []
    group_text = _join([f"{g['name']} ({int(g['size'])} animals)" for g in groups]) or "no groups given"
    s.paragraphs.append(f"Species: {animals['species']}{strain}, body mass {_n(masses[0])}–{_n(masses[-1])} g. "
                        f"Groups: {group_text}; {total} animals in all.")
    times = plan.acquisition.get("time_points_h") or []
    if times:
        s.paragraphs.append(f"Each animal is imaged at {_join([_n(t) + ' h' for t in times])} after injection "
                            f"({len(times)} imaging sessions under anaesthesia).")
    sections.append(s)

    s = Section("Justification of the animal numbers")
    stats = getattr(plan, "statistics", None) or {}
    need = _rows(ev, "animals")
    animal_checks = _checks(ev, "statistics.animals_per_group")
    if stats and need:
        group_names = {g["name"] for g in groups}
        needed = max((int(r.get("needed_with_attrition") or 0) for r in need if r.get("group") in group_names),
                     default=0)
        attr = float(stats.get("attrition", 0.0))
        s.paragraphs.append(
            f"The primary comparison is a two-sample t test of the difference between two groups. To detect a "
            f"difference of {_n(stats['effect_size'])} with a standard deviation of {_n(stats['sd'])} (effect size "
            f"{_n(float(stats['effect_size']) / float(stats['sd']))} SD) at a two-sided significance level of "
            f"{_n(stats['alpha'])} with power {_n(stats['power'])}, {needed} animals per group are needed, "
            f"including an allowance of {_n(100 * attr)} % for animals lost before the end of the study.")
        short = [c for c in animal_checks if not c.passed]
        s.paragraphs.append("Every planned group is large enough." if not short else
                            "Too few animals are planned in: " + _join([c.description for c in short]) + ".")
        if animal_checks:
            s.paragraphs.append(f"Method: {animal_checks[0].source}.")
        s.placeholders.append("Say where the expected difference and standard deviation come from (pilot data or "
                              "published work).")
    else:
        s.placeholders.append("The plan gives no [statistics]: justify the group sizes (power analysis).")
    sections.append(s)

    s = Section("Probes, doses and injection volumes")
    inj = _rows(ev, "injection")
    for p in plan.probes:
        rows = [r for r in inj if r["probe"] == p["name"]]
        vols = [r["volume_ul"] for r in rows]
        s.paragraphs.append(
            f"{p['name']}: {p['material']} nanocrystals emitting at {_n(p['emission_peak_nm'])} nm, "
            f"{_n(p['dose_nmol_per_kg'])} nmol/kg from a {_n(p['stock_uM'])} µM stock, given {p['route']} at "
            f"{_n(p['injection_time_h'])} h"
            + (f": {_n(min(vols))}–{_n(max(vols))} µL per animal." if vols else "."))
    for c in _checks(ev, "injection."):
        s.paragraphs.append(f"{c.description[0].upper()}{c.description[1:]}: {_n(c.value)} {c.unit} against a limit "
                            f"of {_n(c.limit)} {c.unit}, {_verdict(c)} (limit: {c.source}).")
    for c in _checks(ev, "probe.heavy_metal"):
        s.paragraphs.append(f"{c.description[0].upper()}{c.description[1:]}: {_n(c.value)} {c.unit} against "
                            f"{_n(c.limit)} {c.unit}, {_verdict(c)}.")
    sections.append(s)

    s = Section("Light dose against the skin limit")
    light = _rows(ev, "light")
    if light:
        r = light[0]
        s.paragraphs.append(
            f"Excitation: {r['source']} at {_n(r['wavelength_nm'])} nm, {_n(r.get('power_mw'))} mW over a "
            f"{_n(r.get('spot_diameter_mm'))} mm spot, {_n(r['skin_irradiance_mw_per_cm2'])} mW/cm² on the skin. "
            f"The light is on {_n(r['on_time_per_session_s'])} s per session ({r['exposures_per_session']} exposures), "
            f"a radiant exposure of {_n(r['radiant_exposure_per_session_j_per_cm2'])} J/cm² per session.")
        for c in _checks(ev, "laser."):
            s.paragraphs.append(f"This uses {_n(100 * c.value)} % of the skin maximum permissible exposure "
                                f"({_n(r['skin_mpe_mw_per_cm2'])} mW/cm²) in one session, {_verdict(c)}; limit "
                                f"from {c.source}.")
    s.placeholders.append("Eye protection, interlocks and the laser safety officer's approval of the set-up.")
    sections.append(s)

    s = Section("Imaging schedule and anaesthesia")
    timing = _rows(ev, "timing")
    if timing:
        longest = max(float(r["anaesthesia_min"]) for r in timing)
        s.paragraphs.append(f"{len(timing)} sessions per animal at {_join([_n(r['time_h']) + ' h' for r in timing])}; "
                            f"each session lasts about {_n(longest)} min under anaesthesia, including "
                            f"{_n(timing[0]['overhead_min'])} min for induction, positioning and recovery.")
    for c in _checks(ev, "anaesthesia.") + _checks(ev, "imaging."):
        s.paragraphs.append(f"{c.description[0].upper()}{c.description[1:]}: {_q(c.value, c.unit)} against "
                            f"{_q(c.limit, c.unit)}, {_verdict(c)}.")
    s.placeholders.append("Anaesthetic agent, dose, monitoring and warming during imaging.")
    sections.append(s)

    s = Section("Humane endpoints")
    for c in _checks(ev, "endpoint."):
        s.paragraphs.append(f"{c.description[0].upper()}{c.description[1:]}: {_n(c.value)} {c.unit}; the "
                            f"institution's limit is {_n(c.limit)} {c.unit}.")
    s.placeholders.append("Humane endpoints: tumour size and condition, body-mass loss, clinical signs, and who "
                          "checks them how often.")
    sections.append(s)

    if ev.heavy_metals:
        metals = _join([{"Cd": "cadmium", "Pb": "lead"}.get(m, m) for m in ev.heavy_metals])
        s = Section("Heavy-metal probes: handling and waste")
        s.paragraphs.append(f"The probes contain {metals}: stock solutions, syringes, bedding, excreta and carcasses "
                            "are heavy-metal waste.")
        s.placeholders.append("Handling, storage and disposal of heavy-metal waste as the chemical safety office "
                              "requires.")
        sections.append(s)
    return sections


_CLASS_PREFIX = re.compile(r"^\s*[A-Z][A-Za-z]*(Warning|Error)\s*:\s*")
_NUMBER = re.compile(r"[-+]?\d+(?:\.\d+)?(?:e[-+]?\d+)?")


def _topic(text: str) -> str:
    """What a statement is about: its first three words, numbers removed, in lower case."""
    words = _NUMBER.sub("#", text.lower()).split()
    return " ".join(words[:3])


def plain_assumptions(lines: Iterable[str]) -> list[str]:
    """Each assumption once, in plain words.

    Warning class names (``ModelValidityWarning: …``) are dropped, the first letter is
    capitalised, and statements about the same thing (the same first three words once
    numbers are removed, e.g. the same caveat found in several model runs with different
    counts) are said once, by their first wording.

    Examples
    --------
    >>> plain_assumptions(["ModelValidityWarning: diffusion theory is inaccurate at 5 points",
    ...                    "diffusion theory is unreliable at 3 of 24 depths", "the pixel saturates"])
    ['Diffusion theory is inaccurate at 5 points.', 'The pixel saturates.']
    """
    out: list[str] = []
    seen: set[str] = set()
    for line in lines:
        text = _CLASS_PREFIX.sub("", str(line)).strip()
        if not text:
            continue
        text = text[0].upper() + text[1:]
        if not text.endswith((".", "!", "?", ")")):
            text += "."
        key = _topic(text)
        if key in seen:
            continue
        seen.add(key)
        out.append(text)
    return out
