"""Evaluate a study plan against the institution's rules: every limit checked, every prediction tabled.

:func:`evaluate_plan` builds the probes, source, filters, camera, lens and
tissue a :class:`~probeplan.study.plan.Plan` names, then

1. **injection volumes** of every probe for the lightest and the heaviest
   animal, and of every group of probes given by the same route at the same
   time (assumed given together, so their volumes add), against
   ``injection.<species>.<route>``;
2. **skin exposure**: the irradiance on the skin (given, or power over the
   spot averaged over the limiting aperture) over one session's exposures,
   against the skin MPE (:func:`probeplan.study.safety.session_exposure_check`) and
   the rule ``laser.skin_mpe_fraction``;
3. **schedule**: anaesthesia time per session, sessions per animal, interval
   between sessions, cumulative Cd/Pb probe dose, tumour diameter;
4. **imaging predictions** at the target depth: SBR, SNR, blur, saturation
   per probe (probe k is read in channel k, in the plan's order), and the
   channel model (crosstalk, condition number, noise amplification, unmixed
   SNR);
5. **animal numbers**: animals per group for the primary comparison
   (two-sample t test, with attrition) against each planned group.

Definitions (stated in every report, see :data:`SCHEDULE_NOTES`):

* each ``[[probes]]`` entry is one injection per animal at ``injection_time_h``;
* each time point in ``acquisition.time_points_h`` is one imaging session
  under anaesthesia; the plan states the schedule twice (``animals.sessions_per_animal``,
  ``animals.session_interval_h`` and the time points), and the checks take the
  more demanding reading: the larger number of sessions and the shorter interval;
* a session acquires every channel at every position; anaesthesia time =
  Σ channel exposures × positions + ``overhead_min`` (the overhead covers
  induction, positioning, filter changes, read-out and recovery);
* skin exposure: the source is on only while the camera exposes, and every
  exposure of the session is taken to fall on the same skin site (positions
  may overlap under a broad spot): the conservative reading;
* the cumulative heavy-metal dose per animal is the sum of the doses of every
  Cd- or Pb-containing probe (nmol of dots per kg), and the sum of their metal
  in mg of Cd + Pb per kg (:mod:`probeplan.model.metal_dose`: core sphere from its
  diameter, shell when given, lattice density and stoichiometry); each has a rule.

Every :class:`~probeplan.errors.ProbeplanWarning` raised while evaluating is
turned into a line of :attr:`Evaluation.assumptions` instead of a warning.
Names resolved here (material, filter, camera, tissue) that do not exist are
refused with the plan file, line and key path.  For research use only: the
animal care committee, laser safety officer and local regulations decide.
"""

from __future__ import annotations

import contextlib
import math
import re
import warnings
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from probeplan.catalog.setup import ImagingSetup, build_setup
from probeplan.errors import AssumptionWarning, InputError, input_error
from probeplan.io.tables import Table
from probeplan.io.tomlsource import format_path, line_of
from probeplan.notes import collect_notes
from probeplan.study.plan import Plan
from probeplan.study.rules import RuleCheck, Rules, check_value, default_rules
from probeplan.units import G_PER_KG, S_PER_MIN, UL_PER_ML  # noqa: F401

__all__ = [
    "Evaluation",
    "EvaluationTable",
    "PlanModel",
    "plan_model",
    "evaluate_plan",
    "plan_references",
    "on_time_with_overhead_s",
    "SCHEDULE_NOTES",
    "S_PER_MIN",
    "UL_PER_ML",
    "G_PER_KG",
]

#: Depth step (mm) of the predicted profiles, and how far beyond the target they reach.
_DEPTH_STEP_MM = 0.25
_DEPTH_BEYOND_TARGET_MM = 3.0
_MIN_DEPTH_SPAN_MM = 6.0
#: FWHM (nm) assumed for an LED when the plan gives no linewidth (typical value, an assumption; stated in the report).
_LED_DEFAULT_FWHM_NM = 30.0

#: How the evaluation reads a plan (shown in every report).
SCHEDULE_NOTES = (
    "Each [[probes]] entry is one injection per animal at its injection_time_h; probes given by the same route at the "
    "same time are taken as given together, so their volumes add.",
    "Each time point in acquisition.time_points_h is one imaging session under anaesthesia; where the plan's "
    "sessions_per_animal and session_interval_h disagree with the time points, the larger number of sessions and "
    "the shorter interval are checked.",
    "Anaesthesia time per session = sum of channel exposures x positions + overhead_min (the overhead covers "
    "induction, positioning, filter changes, read-out and recovery).",
    "Skin exposure: the source is on only while the camera exposes, and every exposure of a session is taken to fall "
    "on the same skin site (positions may overlap under a broad spot); sessions are hours apart and are checked "
    "one at a time.",
    "Cumulative heavy-metal dose per animal = sum of the doses of every Cd- or Pb-containing probe (nmol of dots per kg); "
    "the mg of metal per kg beside it comes from each dot's size, lattice density and stoichiometry (an estimate).",
    "Each probe's SBR, SNR and blur are read in its own channel (where it responds most at the target depth); "
    "the channel model uses every channel.",
)


#: One result table (name = CSV file stem, title, rows, column order, note): the report's own table type.
EvaluationTable = Table


#: The optical objects a plan names: the catalog's one imaging set-up (see :func:`plan_model`).
PlanModel = ImagingSetup

#: Where each key of the set-up builder is written in a plan.
_PLAN_KEYS = {
    "probes": ("probes",),
    "filters": ("acquisition", "channels"),
    "exposure_s": ("acquisition", "channels"),
    "camera": ("acquisition", "camera"),
    "binning": ("acquisition", "binning"),
    "f_number": ("acquisition", "f_number"),
    "excitation_nm": ("acquisition", "wavelength_nm"),
    "tissue": ("target", "tissue"),
    "layers": ("tissue", "layers"),
}


@dataclass
class Evaluation:
    """Everything :func:`evaluate_plan` found.

    Attributes
    ----------
    plan : Plan
    rules : Rules
    checks : list of RuleCheck
        Every rule checked, in a fixed order (injection, light, schedule, heavy metal, tumour, animals).
    tables : list of EvaluationTable
        ``injection``, ``light``, ``timing``, ``imaging``, ``channels``, ``animals`` (when ``[statistics]`` is given).
    assumptions : list of str
        Model assumptions and every warning raised while evaluating.
    warnings : list of str
        Predicted problems that are not rules (saturation, weak SBR, poor separability).
    heavy_metals : list of str
        ``"Cd"`` / ``"Pb"`` when a probe contains them.
    model : PlanModel
    profiles : list of DepthProfile
        One per probe, over :attr:`depth_mm`.
    channel_report : ChannelReport
        At the target depth.
    """

    plan: Plan
    rules: Rules
    checks: list[RuleCheck]
    tables: list[EvaluationTable]
    assumptions: list[str]
    warnings: list[str]
    heavy_metals: list[str]
    model: PlanModel
    profiles: list = field(repr=False, default_factory=list)
    channel_report: Any = field(repr=False, default=None)

    @property
    def passed(self) -> bool:
        """True when every checked rule passes."""
        return all(c.passed for c in self.checks)

    def checks_frame(self):
        """The rule checks as a :class:`pandas.DataFrame` (one row per check; value, limit and unit)."""
        from probeplan.study.rules import rule_checks_frame

        return rule_checks_frame(self.checks)

    @property
    def failed(self) -> list[RuleCheck]:
        """The checks that fail."""
        return [c for c in self.checks if not c.passed]

    def table(self, name: str) -> EvaluationTable:
        """The table called ``name``."""
        for t in self.tables:
            if t.name == name:
                return t
        raise input_error("table", f"no table {name!r}", f"use one of {', '.join(t.name for t in self.tables)}")

    def check_rows(self) -> list[dict[str, Any]]:
        """Every check as a flat dict (rule, description, value, comparison, limit, unit, passed, source, example_only)."""
        return [c.as_row() for c in self.checks]

    def as_dict(self) -> dict[str, Any]:
        """JSON-ready summary (non-finite numbers become None)."""
        return _finite({
            "title": self.plan.study["title"],
            "plan": str(self.plan.path) if self.plan.path is not None else None,
            "rules_files": list(self.rules.files),
            "passed": self.passed,
            "failed": [c.rule_id for c in self.failed],
            "checks": self.check_rows(),
            "tables": {t.name: t.rows for t in self.tables},
            "warnings": self.warnings,
            "assumptions": self.assumptions,
            "heavy_metals": self.heavy_metals,
        })


def _finite(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {k: _finite(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite(v) for v in obj]
    if isinstance(obj, (np.floating, np.integer, np.bool_)):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


# ---------------------------------------------------------------------------
# Errors located in the plan file
# ---------------------------------------------------------------------------

_WHERE_PREFIX = re.compile(r"^[A-Za-z_][A-Za-z0-9_ ]*: ")


def _where(plan: Plan, path: tuple[Any, ...]) -> str:
    source = plan.source or (str(plan.path) if plan.path is not None else "<plan>")
    line = line_of(plan.text, path) if plan.text else None
    loc = f"{source}:{line}" if line else source
    return f"{loc}: {format_path(path)}"


@contextlib.contextmanager
def _located(plan: Plan, path: tuple[Any, ...]) -> Iterator[None]:
    """Re-raise an InputError prefixed with the plan file, line and key path."""
    try:
        yield
    except InputError as exc:
        message = _WHERE_PREFIX.sub("", str(exc), count=1)
        raise InputError(f"{_where(plan, path)}: {message}") from None


# ---------------------------------------------------------------------------
# Building the optical model
# ---------------------------------------------------------------------------


def plan_model(plan: Plan, rules: Rules | None = None) -> PlanModel:
    """Build the probes, source, channels, camera, lens and tissue of a plan.

    Parameters
    ----------
    plan : Plan
        A validated plan (:func:`probeplan.study.plan.load_plan`).
    rules : Rules, optional
        Rules in force (the limiting aperture ``laser.limiting_aperture``).

    Returns
    -------
    PlanModel

    Raises
    ------
    InputError
        An unknown material, filter, camera or tissue, an emission peak outside
        the material's range, or a lens that cannot exist; the message starts
        with the plan file, line and key path.
    """
    from probeplan.model import optics
    from probeplan.study import safety

    rules = default_rules() if rules is None else rules
    acq = plan.acquisition
    if acq["irradiance_mw_per_cm2"] is not None:
        irradiance = skin = float(acq["irradiance_mw_per_cm2"])
    else:
        with _located(plan, ("acquisition", "spot_diameter_mm")):
            irradiance = float(safety.irradiance_mw_per_cm2(acq["power_mw"], acq["spot_diameter_mm"],
                                                            profile=acq["beam_profile"]))
            skin = float(safety.aperture_averaged_irradiance_mw_per_cm2(
                acq["power_mw"], acq["spot_diameter_mm"], profile=acq["beam_profile"], rules=rules))
    if acq["source"] == "led":
        width = {"led_fwhm_nm": acq["linewidth_nm"] or _LED_DEFAULT_FWHM_NM}
    else:
        width = {"linewidth_nm": acq["linewidth_nm"] or optics.TYPICAL_LASER_LINEWIDTH_NM}
    try:
        return build_setup(
            probes=[{k: p[k] for k in ("material", "emission_peak_nm", "name", "quantum_yield", "fwhm_nm",
                                       "extinction_at_excitation_per_M_cm")} for p in plan.probes],
            filters=[ch["filter"] for ch in acq["channels"]], channel_names=[ch["name"] for ch in acq["channels"]],
            exposure_s=[ch["exposure_s"] for ch in acq["channels"]], excitation_nm=acq["wavelength_nm"], **width,
            irradiance_mw_per_cm2=irradiance, skin_irradiance_mw_per_cm2=skin, camera=acq["camera"],
            binning=acq["binning"], f_number=acq["f_number"], magnification=acq["magnification"],
            tissue=plan.target["tissue"],
            layers=[(layer["tissue"], layer["thickness_mm"]) for layer in plan.tissue["layers"]])
    except InputError as exc:
        key = getattr(exc, "key", None)
        if not key or key[0] not in _PLAN_KEYS:
            raise
        path = _PLAN_KEYS[key[0]] + tuple(key[1:])
        if key[0] in ("filters", "exposure_s") and len(key) > 1:
            path += ("filter",) if key[0] == "filters" else ("exposure_s",)
        if key[0] == "layers" and len(key) > 1:
            path += ("tissue",)
        raise InputError(f"{_where(plan, path)}: {exc.detail}") from None  # type: ignore[attr-defined]


# ---------------------------------------------------------------------------
# Evaluation
# ---------------------------------------------------------------------------


def plan_references(plan: Plan, rules: Rules | None = None, *, depth_mm: float | None = None):
    """Reference spectra of a plan's probes in its channels, predicted at the target depth (or ``depth_mm``).

    Counts per µM in each channel's exposure (gain 1 e⁻/count); see
    :func:`probeplan.unmixing.references.reference_spectra`.
    """
    from probeplan.unmixing.references import reference_spectra

    m = plan_model(plan, rules)
    depth = plan.target["depth_mm"] if depth_mm is None else depth_mm
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AssumptionWarning)
        return reference_spectra(m.tissue, m.probes, m.channels, irradiance_mw_per_cm2=m.irradiance_mw_per_cm2,
                                 depth_mm=depth, target_size_mm=plan.target["size_mm"])


def evaluate_plan(plan: Plan, rules: Rules | None = None) -> Evaluation:
    """Check a plan against the rules and predict its imaging performance.

    Parameters
    ----------
    plan : Plan
        A validated plan (:func:`probeplan.study.plan.load_plan`).
    rules : Rules, optional
        Rules in force (:func:`probeplan.study.rules.load_rules`); the defaults when None.

    Returns
    -------
    Evaluation
        ``passed`` is True when every checked rule passes.

    Raises
    ------
    InputError
        A name in the plan that does not exist, or a value a model refuses
        (implausible body mass, wavelength outside the skin MPE table, ...),
        with the plan file, line and key path.
    TypeError
        ``plan`` is not a Plan or ``rules`` not Rules.

    Notes
    -----
    See the module notes and :data:`SCHEDULE_NOTES` for how the plan is read.
    Injection volume: V = dose × mass / stock (nmol/kg × kg / (nmol/mL)), so
    V / mass = dose / stock in mL/kg whatever the mass.

    Examples
    --------
    >>> from pathlib import Path
    >>> from probeplan.study.plan import load_plan
    >>> import probeplan
    >>> demo = Path(probeplan.__file__).resolve().parents[1] / "demo_tissue" / "plan.toml"
    >>> ev = evaluate_plan(load_plan(demo))
    >>> ev.passed, ev.heavy_metals
    (True, ['Cd'])
    """
    if not isinstance(plan, Plan):
        raise TypeError(f"plan: expected a Plan, got {type(plan).__name__}")
    rules = default_rules() if rules is None else rules
    if not isinstance(rules, Rules):
        raise TypeError(f"rules: expected Rules, got {type(rules).__name__}")
    assumptions: list[str] = []
    with collect_notes(assumptions):
        model = plan_model(plan, rules)
        checks: list[RuleCheck] = []
        tables: list[EvaluationTable] = []
        notes: list[str] = []
        problems: list[str] = []
        for part in (_injection, _light, _schedule):
            part_checks, part_tables, part_notes, part_problems = part(plan, rules, model)
            checks += part_checks
            tables += part_tables
            notes += part_notes
            problems += part_problems
        predictions = _imaging(plan, model)
        animal_checks, animal_tables, animal_notes = _animals(plan)
        checks += animal_checks
        tables += predictions["tables"] + animal_tables
        notes += animal_notes
    assumptions = list(dict.fromkeys([*SCHEDULE_NOTES, *notes, *predictions["notes"], *assumptions]))
    heavy = sorted({p.heavy_metal for p in model.probes if p.heavy_metal})
    return Evaluation(plan, rules, checks, tables, assumptions, [*problems, *predictions["warnings"]], heavy, model,
                      predictions["profiles"], predictions["channel_report"])


def _injection(plan: Plan, rules: Rules, model: PlanModel):
    from probeplan.model import dots
    from probeplan.study import safety

    species = plan.animals["species"]
    light, heavy = plan.animals["body_mass_g"]
    masses = np.array([light, heavy])
    checks, rows = [], []
    groups: dict[tuple[str, float], list[int]] = {}
    volumes_ml = []
    for i, p in enumerate(plan.probes):
        route = p["route"]
        rule = rules[f"injection.{species}.{route}"]
        with _located(plan, ("animals", "body_mass_g")):
            max_ml = np.atleast_1d(safety.max_injection_volume_ml(species, route, masses, rules))
        vol_ul = np.atleast_1d(dots.dose_volume_ul(p["dose_nmol_per_kg"], masses, p["stock_uM"]))
        vol_ml = vol_ul / UL_PER_ML
        volumes_ml.append(vol_ml)
        groups.setdefault((route, p["injection_time_h"]), []).append(i)
        for label, j in (("lightest", 0), ("heaviest", 1)):
            rows.append({
                "probe": p["name"], "animal": label, "body_mass_g": float(masses[j]), "route": route,
                "injection_time_h": p["injection_time_h"], "dose_nmol_per_kg": p["dose_nmol_per_kg"],
                "stock_uM": p["stock_uM"], "volume_ul": float(vol_ul[j]),
                "volume_ml_per_kg": float(vol_ml[j] / (masses[j] / G_PER_KG)),
                "max_volume_ul": float(max_ml[j] * UL_PER_ML), "rule": rule.id,
            })
        checks.append(_volume_check(rules, rule, vol_ml, masses, f"{p['name']}: {route} volume"))
    for (route, time_h), members in groups.items():
        if len(members) < 2:
            continue
        rule = rules[f"injection.{species}.{route}"]
        total = np.sum([volumes_ml[i] for i in members], axis=0)
        names = " + ".join(plan.probes[i]["name"] for i in members)
        checks.append(_volume_check(rules, rule, total, masses, f"summed {route} volume at {time_h:g} h ({names})"))
        for label, j in (("lightest", 0), ("heaviest", 1)):
            rows.append({
                "probe": f"sum: {names}", "animal": label, "body_mass_g": float(masses[j]), "route": route,
                "injection_time_h": time_h,
                "dose_nmol_per_kg": float(sum(plan.probes[i]["dose_nmol_per_kg"] for i in members)),
                "stock_uM": None, "volume_ul": float(total[j] * UL_PER_ML),
                "volume_ml_per_kg": float(total[j] / (masses[j] / G_PER_KG)),
                "max_volume_ul": float(np.atleast_1d(safety.max_injection_volume_ml(species, route, masses,
                                                                                    rules))[j] * UL_PER_ML),
                "rule": rule.id,
            })
    table = EvaluationTable(
        "injection", "Injection volumes", rows,
        note="V = dose x body mass / stock; mL/kg = dose / stock. Probes given by the same route at the same time "
             "are summed. Volumes for the lightest and the heaviest animal.")
    return checks, [table], [], []


def _volume_check(rules: Rules, rule, vol_ml: np.ndarray, masses: np.ndarray, what: str) -> RuleCheck:
    if rule.unit == "mL":  # a volume per injection site: the heaviest animal gets the most
        return check_value(rules, rule.id, float(vol_ml[-1]),
                           description=f"{what}, heaviest animal ({masses[-1]:g} g), per site")
    per_kg = vol_ml / (masses / G_PER_KG)
    return check_value(rules, rule.id, float(per_kg.max()),
                       description=f"{what} per kg body mass (same for every body mass)")


def _sessions(plan: Plan) -> tuple[int, float | None, list[str]]:
    points = sorted(plan.acquisition["time_points_h"])
    declared = plan.animals["sessions_per_animal"]
    n = max(declared, len(points))
    notes = []
    if declared != len(points):
        notes.append(f"animals.sessions_per_animal = {declared} but acquisition.time_points_h has {len(points)} "
                     f"time points: {n} sessions are checked")
    gaps = np.diff(points) if len(points) > 1 else np.array([])
    interval = None
    if n > 1:
        candidates = [plan.animals["session_interval_h"]] + ([float(gaps.min())] if gaps.size else [])
        interval = float(min(candidates))
        if gaps.size and float(gaps.min()) < plan.animals["session_interval_h"]:
            notes.append(f"the time points are as little as {float(gaps.min()):g} h apart, less than "
                         f"animals.session_interval_h = {plan.animals['session_interval_h']:g} h: the shorter is checked")
    return n, interval, notes


def _light(plan: Plan, rules: Rules, model: PlanModel):
    from probeplan.study import safety

    acq = plan.acquisition
    n_sessions, _, _ = _sessions(plan)
    wavelength = float(model.source.centre_nm)
    with _located(plan, ("acquisition", "channels")):
        session = safety.setup_skin_exposure(model, positions=acq["positions"], rules=rules)
    with _located(plan, ("acquisition", "wavelength_nm")):
        allowed = float(safety.allowed_irradiance_mw_per_cm2(wavelength, session.total_on_time_s, rules))
    check = check_value(
        rules, "laser.skin_mpe_fraction", session.ratio,
        description=f"share of the skin MPE used in one session ({session.n_exposures} exposures, "
                    f"{session.total_on_time_s:g} s on one site; {session.governing_rule} rule)")
    given = acq["irradiance_mw_per_cm2"] is not None
    # Not a rule: the same site lit for the whole session (an unshuttered source), for comparison.
    session_s = min(on_time_with_overhead_s(plan), safety.MPE_MAX_EXPOSURE_S)
    with _located(plan, ("acquisition", "wavelength_nm")):
        always_on = model.skin_irradiance_mw_per_cm2 / float(safety.skin_mpe_mw_per_cm2(wavelength, session_s))
    notes, problems = [], []
    if always_on > session.allowed_fraction:
        problems.append(f"if the source stays on for the whole session ({session_s / S_PER_MIN:.3g} min) the skin "
                        f"receives {always_on:.3g} of its MPE, above the allowed {session.allowed_fraction:g}: "
                        "shutter the source between frames")
    if acq["source"] == "led" and acq["linewidth_nm"] is None:
        notes.append(f"LED spectrum taken as a Gaussian of FWHM {_LED_DEFAULT_FWHM_NM:g} nm (typical value, an "
                     "assumption): give acquisition.linewidth_nm")
    row = {
        "source": acq["source"], "wavelength_nm": wavelength,
        "power_mw": acq["power_mw"], "spot_diameter_mm": acq["spot_diameter_mm"], "beam_profile": acq["beam_profile"],
        "model_irradiance_mw_per_cm2": model.irradiance_mw_per_cm2,
        "skin_irradiance_mw_per_cm2": model.skin_irradiance_mw_per_cm2,
        "limiting_aperture_mm": rules.value("laser.limiting_aperture"),
        "exposures_per_session": session.n_exposures, "on_time_per_session_s": session.total_on_time_s,
        "radiant_exposure_per_session_j_per_cm2": session.radiant_exposure_j_per_cm2,
        "skin_mpe_mw_per_cm2": session.mpe_mw_per_cm2, "allowed_irradiance_mw_per_cm2": allowed,
        "share_of_mpe": session.ratio, "governing_rule": session.governing_rule,
        "allowed_share": session.allowed_fraction, "sessions": n_sessions,
        "on_time_per_study_s": session.total_on_time_s * n_sessions,
        "share_of_mpe_if_always_on": always_on,
    }
    note = ("Irradiance as given in the plan, taken as already averaged over the limiting aperture." if given else
            f"Skin irradiance = power through a {rules.value('laser.limiting_aperture'):g} mm limiting aperture centred "
            "on the beam, over the aperture area (ANSI Z136.1 / IEC 60825-1); the fluorescence model uses the spot's "
            "mean irradiance (peak for a Gaussian beam).")
    return [check], [EvaluationTable("light", "Excitation light and skin exposure", [row], note=note)], notes, problems


def on_time_with_overhead_s(plan: Plan) -> float:
    """Duration (s) of one imaging session: channel exposures x positions + the overhead.

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> acq = {"channels": [{"exposure_s": 1.0}, {"exposure_s": 2.0}], "positions": 2, "overhead_min": 10.0}
    >>> on_time_with_overhead_s(SimpleNamespace(acquisition=acq))
    606.0
    """
    acq = plan.acquisition
    return sum(ch["exposure_s"] for ch in acq["channels"]) * acq["positions"] + acq["overhead_min"] * S_PER_MIN


def _schedule(plan: Plan, rules: Rules, model: PlanModel):
    acq = plan.acquisition
    n_sessions, interval, notes = _sessions(plan)
    positions = acq["positions"]
    on_time_s = sum(ch["exposure_s"] for ch in acq["channels"]) * positions
    session_min = on_time_with_overhead_s(plan) / S_PER_MIN
    checks = [
        check_value(rules, "anaesthesia.max_session_duration", session_min,
                    description=f"anaesthesia per session ({len(acq['channels'])} channels x {positions} positions "
                                f"+ {acq['overhead_min']:g} min overhead)"),
        check_value(rules, "imaging.max_sessions_per_animal", n_sessions,
                    description="imaging sessions per animal (each under anaesthesia)"),
    ]
    if interval is not None:
        checks.append(check_value(rules, "imaging.min_interval_between_sessions", interval,
                                  description="shortest interval between two sessions of the same animal"))
    else:
        notes.append("one imaging session per animal: the interval between sessions is not checked")
    doses = [(p["name"], model.probes[i].heavy_metal, p["dose_nmol_per_kg"]) for i, p in enumerate(plan.probes)]
    heavy = [(name, metal, dose) for name, metal, dose in doses if metal]
    total = float(sum(d for _, _, d in heavy))
    what = ", ".join(f"{name} ({metal})" for name, metal, _ in heavy) or "no Cd- or Pb-containing probe"
    checks.append(check_value(rules, "probe.heavy_metal.max_cumulative_dose", total,
                              description=f"cumulative Cd/Pb probe dose per animal: {what}"))
    metal_rows, metal_notes = _metal_dose_rows(plan, model)
    notes += metal_notes
    counted = [r for r in metal_rows if r["metal_mg_per_kg"] is not None]
    metal_total = float(sum(r["metal_mg_per_kg"] for r in counted))
    uncounted = [r["probe"] for r in metal_rows if r["metal_mg_per_kg"] is None]
    metal_what = ", ".join(r["probe"] for r in counted if r["metal_mg_per_kg"] > 0) or "no Cd or Pb counted"
    if uncounted:
        metal_what += f"; not counted (no core size or lattice data): {', '.join(uncounted)}"
    checks.append(check_value(rules, "probe.heavy_metal.max_cumulative_metal_dose", metal_total,
                              description=f"cumulative Cd + Pb per animal, mg of metal per kg: {metal_what}"))
    tumour = plan.target["tumour_diameter_mm"]
    if tumour is not None:
        checks.append(check_value(rules, "endpoint.tumour_max_diameter", tumour,
                                  description="largest planned tumour diameter"))
    else:
        notes.append("no target.tumour_diameter_mm given: the tumour size endpoint is not checked")
    points = sorted(acq["time_points_h"])
    rows = [{"session": i + 1, "time_h": t, "channels": len(acq["channels"]), "positions": positions,
             "on_time_s": on_time_s, "overhead_min": acq["overhead_min"], "anaesthesia_min": session_min}
            for i, t in enumerate(points)]
    for extra in range(len(points), n_sessions):
        rows.append({"session": extra + 1, "time_h": None, "channels": len(acq["channels"]),
                     "positions": positions, "on_time_s": on_time_s, "overhead_min": acq["overhead_min"],
                     "anaesthesia_min": session_min})
    table = EvaluationTable("timing", "Imaging sessions and anaesthesia", rows,
                            note="Time in hours after the first injection.")
    metal_table = EvaluationTable(
        "heavy_metal", "Heavy metal per animal: nmol of dots per kg and mg of metal per kg", metal_rows,
        note="Metal per dot = bulk lattice density x volume (core sphere from its diameter, plus the shell) x the "
             "metal's mass fraction (CRC Handbook densities, IUPAC atomic weights; probeplan/data/lattice.toml). "
             "An estimate: ligands, surface and non-stoichiometry are left out.")
    return checks, [table, metal_table], notes, []


def _metal_dose_rows(plan: Plan, model: PlanModel) -> tuple[list[dict[str, Any]], list[str]]:
    """One row per probe that holds Cd or Pb (core or shell): its dose in nmol/kg and in mg of metal/kg."""
    from probeplan.model import metal_dose

    rows, notes = [], []
    compounds = set(metal_dose.compound_names())
    for i, p in enumerate(plan.probes):
        probe = model.probes[i]
        shell, thickness = p.get("shell"), p.get("shell_thickness_nm")
        shell_heavy = bool(shell) and any(m in shell for m in metal_dose.HEAVY_METALS)
        if not (probe.heavy_metal or shell_heavy):
            continue
        diameter = p.get("core_diameter_nm") or probe.diameter_nm
        row: dict[str, Any] = {"probe": p["name"], "material": probe.material, "core_diameter_nm": diameter,
                               "shell": shell or "", "shell_thickness_nm": thickness or 0.0,
                               "dose_nmol_per_kg": p["dose_nmol_per_kg"], "Cd_mg_per_kg": None,
                               "Pb_mg_per_kg": None, "metal_mg_per_kg": None}
        if diameter is None or probe.material not in compounds:
            notes.append(f"{p['name']}: the metal dose in mg/kg is not computed ({probe.material} has "
                         f"{'no sizing curve' if diameter is None else 'no shipped lattice density'}); give "
                         "core_diameter_nm for a CdSe, CdTe, CdS, PbS or PbSe core")
            rows.append(row)
            continue
        if bool(shell) != bool(thickness):
            notes.append(f"{p['name']}: shell and shell_thickness_nm go together; the shell is left out")
            shell, thickness = None, 0.0
        with _located(plan, ("probes", i, "shell")):
            mg = metal_dose.heavy_metal_dose_mg_per_kg(probe.material, float(diameter), p["dose_nmol_per_kg"],
                                                        shell=shell or None, shell_thickness_nm=thickness or 0.0)
        row.update({"Cd_mg_per_kg": mg.get("Cd", 0.0), "Pb_mg_per_kg": mg.get("Pb", 0.0),
                    "metal_mg_per_kg": float(sum(mg.values()))})
        rows.append(row)
    return rows, notes


def _depth_grid(target_mm: float) -> np.ndarray:
    stop = max(target_mm + _DEPTH_BEYOND_TARGET_MM, 2.0 * target_mm, _MIN_DEPTH_SPAN_MM)
    grid = np.arange(_DEPTH_STEP_MM, stop + _DEPTH_STEP_MM / 2.0, _DEPTH_STEP_MM)
    return np.union1d(grid, [target_mm]) if target_mm > 0 else np.union1d(grid, [0.0])


def _imaging(plan: Plan, model: PlanModel) -> dict[str, Any]:
    from probeplan.model.channels import SEPARABLE_CONDITION_LIMIT, channel_report
    from probeplan.model.fluorescence import DEFAULT_SBR_THRESHOLD, depth_at_threshold, depth_profile

    tgt = plan.target
    depth = _depth_grid(tgt["depth_mm"])
    at = int(np.argmin(np.abs(depth - tgt["depth_mm"])))
    common = dict(source=model.source, irradiance_mw_per_cm2=model.irradiance_mw_per_cm2, camera=model.camera,
                  lens=model.lens, target_size_mm=tgt["size_mm"], concentration_uM=tgt["concentration_uM"],
                  uptake_ratio=tgt["uptake_ratio"])
    profiles, notes, problems = [], [], []
    with _located(plan, ("acquisition", "channels")):
        report = channel_report(model.tissue, model.probes, model.channels, depth_mm=[tgt["depth_mm"]],
                                irradiance_mw_per_cm2=model.irradiance_mw_per_cm2, target_size_mm=tgt["size_mm"],
                                concentration_uM=tgt["concentration_uM"], uptake_ratio=tgt["uptake_ratio"])
    # each probe is read in its own channel: the one where it responds most at the target depth
    own = [int(np.argmax(report.response_e_per_s_per_uM[0, :, k])) for k in range(len(model.probes))]
    for k, probe in enumerate(model.probes):
        ch = model.channels[own[k]]
        with _located(plan, ("probes", k)):
            profiles.append(depth_profile(model.tissue, probe, emission_filter=ch.emission_filter,
                                          exposure_s=ch.exposure_s, depth_mm=depth,
                                          transport_model=plan.tissue["transport_model"], **common))
    rows = []
    for k, prof in enumerate(profiles):
        ch = model.channels[own[k]]
        rows.append({
            "probe": prof.probe, "material": model.probes[k].material, "channel": ch.name,
            "filter": plan.acquisition["channels"][own[k]]["filter"], "exposure_s": ch.exposure_s,
            "depth_mm": float(depth[at]), "signal_e": float(prof.signal_e[at]), "background_e": prof.background_e,
            "uptake_background_e": prof.uptake_background_e, "autofluorescence_e": prof.autofluorescence_e,
            "leakage_e": prof.leakage_e, "dark_e": prof.dark_e, "sbr": float(prof.sbr[at]),
            "contrast": float(prof.contrast[at]), "snr": float(prof.snr[at]), "blur_fwhm_mm": float(prof.blur_fwhm_mm[at]),
            "escaped_peak_nm": float(prof.escaped_peak_nm[at]),
            "spectral_shift_nm": float(prof.spectral_shift_nm[at]),
            "depth_at_sbr_threshold_mm": _finite(depth_at_threshold(prof, DEFAULT_SBR_THRESHOLD)),
            "noise_amplification": float(report.noise_amplification[0, k]),
            "unmixed_snr": float(report.unmixed_snr[0, k]),
            "diffusion_valid": bool(prof.diffusion_valid[at]), "saturated": bool(prof.saturated[at]),
            "transport_model": prof.transport_model,
        })
        notes += prof.notes
        if prof.saturated[at]:
            problems.append(f"{prof.probe} saturates the camera in channel {ch.name} at the target depth: "
                            "shorten the exposure or lower the irradiance")
        if prof.sbr[at] < DEFAULT_SBR_THRESHOLD:
            problems.append(f"{prof.probe}: predicted SBR {float(prof.sbr[at]):.2f} at {depth[at]:g} mm is below "
                            f"{DEFAULT_SBR_THRESHOLD:g} (common practice for 'visible above background', not a standard)")
    full_well = float(model.camera.binned_full_well_e)  # one binned pixel: digital or charge binning
    conc = tgt["concentration_uM"]
    ch_rows = []
    for c, ch in enumerate(model.channels):
        filled = (float(np.sum(report.response_e_per_s_per_uM[0, c])) * conc + float(report.background_e_per_s[c])) \
            * float(report.exposure_s[c])
        row = {"channel": ch.name, "filter": plan.acquisition["channels"][c]["filter"], "exposure_s": ch.exposure_s}
        for k, name in enumerate(report.probe_names):
            row[f"crosstalk {name}"] = float(report.crosstalk[0, c, k])
        row.update({"background_e_per_s": float(report.background_e_per_s[c]),
                    "leakage_e_per_s": float(report.leakage_e_per_s[c]),
                    "pixel_electrons": filled, "full_well_fraction": filled / full_well})
        ch_rows.append(row)
        if filled > full_well:
            problems.append(f"channel {ch.name}: all probes together fill {filled / full_well:.2g} full wells at the "
                            "target: shorten the exposure")
    cond = float(report.condition_number[0])
    if not cond < SEPARABLE_CONDITION_LIMIT:
        problems.append(f"condition number {cond:.3g} at the target depth: the probes cannot be separated reliably")
    notes += report.notes
    imaging = EvaluationTable(
        "imaging", f"Predicted imaging at the target depth ({tgt['depth_mm']:g} mm, {model.tissue.name})", rows,
        note=f"Per binned pixel per exposure; each probe read in its own (brightest) channel. "
             f"Light transport: {profiles[0].transport_model if profiles else plan.tissue['transport_model']}. "
             f"depth_at_sbr_threshold_mm: where SBR falls below "
             f"{DEFAULT_SBR_THRESHOLD:g} (empty: not within the profile). SBR = (S + B) / B; SNR = S / sqrt(S + B + "
             f"read noise^2). Unmixing condition number {cond:.3g} (separable below {SEPARABLE_CONDITION_LIMIT:g}).")
    channels = EvaluationTable("channels", "Channels: crosstalk and pixel filling at the target depth", ch_rows,
                               note="Crosstalk: each probe's response over its response in its brightest channel.")
    return {"tables": [imaging, channels], "notes": notes, "warnings": list(dict.fromkeys(problems)),
            "profiles": profiles, "channel_report": report}


def _animals(plan: Plan):
    from probeplan.study.animals import animals_per_group, with_attrition

    groups = plan.animals["groups"]
    stats = plan.statistics
    planned_total = int(sum(g["size"] for g in groups))
    if stats is None:
        rows = [{"group": g["name"], "planned": g["size"]} for g in groups]
        rows.append({"group": "total", "planned": planned_total})
        table = EvaluationTable("animals", "Animals", rows, note="No [statistics] given: group sizes are not justified.")
        return [], [table], ["no [statistics] section: the group sizes are not checked against a power calculation"]
    with _located(plan, ("statistics",)):
        needed = animals_per_group(stats["effect_size"], stats["sd"], alpha=stats["alpha"], power=stats["power"])
        start = with_attrition(needed.n_per_group, stats["attrition"])
    source = "two-sample t test, exact noncentral t power (Cohen 1988); group inflated by 1/(1 - attrition)"
    checks, rows = [], []
    for g in groups:
        checks.append(RuleCheck(
            rule_id="statistics.animals_per_group",
            description=f"group '{g['name']}': planned animals vs needed for the primary comparison",
            value=float(g["size"]), limit=float(start), unit="count", passed=g["size"] >= start, source=source,
            comparison=">="))
        rows.append({"group": g["name"], "planned": g["size"], "needed_with_attrition": start,
                     "enough": g["size"] >= start})
    rows.append({"group": "total", "planned": planned_total, "needed_with_attrition": start * len(groups),
                 "enough": planned_total >= start * len(groups)})
    d = abs(stats["effect_size"]) / stats["sd"]
    note = (f"Effect {stats['effect_size']:g} with sd {stats['sd']:g} (d = {d:.3g}), two-sided alpha {stats['alpha']:g}, "
            f"power {stats['power']:g}: {needed.n_per_group} per group reach power {needed.achieved_power:.3f}; "
            f"attrition {stats['attrition']:g} gives {start} to start with.")
    table = EvaluationTable("animals", "Animals per group (primary comparison)", rows, note=note)
    return checks, [table], []
