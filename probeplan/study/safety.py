"""Safety limits: skin exposure to laser light, injection volumes, blood sampling.

For research use only.  These are planning figures from published standards and
good-practice tables; the institution's laser safety officer, animal care
committee and local regulations decide.  The skin maximum permissible exposure
(MPE) is written for human skin; using it for small animals is common practice
in preclinical optical imaging, not a guarantee: dark fur and pigmented skin
absorb more, and heating of thin mouse skin over a tumour is not covered.

Units: wavelength nm, exposure time s, irradiance mW/cm², power mW, spot and
aperture diameters mm, volumes mL, body mass g.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from probeplan.errors import did_you_mean, input_error
from probeplan.model.skin_limit import (  # re-exported: the skin table lives with the model
    _TIME_EXPONENT,
    LIMITING_APERTURE_MM,
    MPE_LONG_EXPOSURE_S,
    MPE_MAX_EXPOSURE_S,
    MPE_MAX_WAVELENGTH_NM,
    MPE_MIN_EXPOSURE_S,
    MPE_MIN_WAVELENGTH_NM,
    _exposures,
    _mpe,
    _scalar_or_array,
    _warn_beyond_1400_nm,
    correction_factor_ca,
    max_exposure_time_s,
    skin_mpe_j_per_cm2,
    skin_mpe_mw_per_cm2,
)
from probeplan.study.rules import Rules, default_rules
from probeplan.units import G_PER_KG, MM_PER_CM, MW_PER_W, PERCENT  # noqa: F401

__all__ = [
    "MPE_MIN_WAVELENGTH_NM",
    "MPE_MAX_WAVELENGTH_NM",
    "MPE_MIN_EXPOSURE_S",
    "MPE_MAX_EXPOSURE_S",
    "MPE_LONG_EXPOSURE_S",
    "LIMITING_APERTURE_MM",
    "SPECIES",
    "ROUTES",
    "BLOOD_SAMPLE_INTERVALS",
    "correction_factor_ca",
    "skin_mpe_j_per_cm2",
    "skin_mpe_mw_per_cm2",
    "allowed_irradiance_mw_per_cm2",
    "max_exposure_time_s",
    "irradiance_mw_per_cm2",
    "aperture_averaged_irradiance_mw_per_cm2",
    "SessionExposure",
    "session_exposure_check",
    "setup_skin_exposure",
    "max_injection_volume_ml",
    "max_blood_sample_ml",
]


#: Species with published injection and blood tables.
SPECIES: tuple[str, ...] = ("mouse", "rat")
#: Administration routes: i.v. bolus, slow i.v., i.p., s.c., i.m. (per site), oral gavage.
ROUTES: tuple[str, ...] = ("iv", "iv_slow", "ip", "sc", "im", "oral")
#: Blood sampling recovery periods and the rule each one uses.
BLOOD_SAMPLE_INTERVALS: dict[str, str] = {
    "weekly": "blood.sample_percent.recovery_1_week",
    "2 weeks": "blood.sample_percent.recovery_2_weeks",
    "4 weeks": "blood.sample_percent.recovery_4_weeks",
}
# Body masses outside these ranges are refused as probable unit mistakes (common practice, no source).
_BODY_MASS_RANGE_G = {"mouse": (1.0, 150.0), "rat": (5.0, 1500.0)}


def allowed_irradiance_mw_per_cm2(wavelength_nm, exposure_s, rules: Rules | None = None):
    """The irradiance the institution allows: skin MPE × rule ``laser.skin_mpe_fraction``.

    Parameters
    ----------
    wavelength_nm, exposure_s : array_like
        As :func:`skin_mpe_mw_per_cm2`.
    rules : Rules, optional
        Rules in force (defaults: fraction 1, the MPE itself).

    Returns
    -------
    ndarray or numpy scalar
        mW/cm².

    Examples
    --------
    >>> strict = default_rules().with_values({"laser.skin_mpe_fraction": 0.5}, source="policy")
    >>> float(allowed_irradiance_mw_per_cm2(650.0, 60.0, strict))
    100.0
    """
    rules = default_rules() if rules is None else rules
    _, e, beyond = _mpe(wavelength_nm, exposure_s)
    if beyond:
        _warn_beyond_1400_nm(stacklevel=2)
    return _scalar_or_array(e * MW_PER_W * rules.value("laser.skin_mpe_fraction"))


# ---------------------------------------------------------------------------
# Irradiance from power and spot size
# ---------------------------------------------------------------------------

_PROFILES = ("top-hat", "gaussian")


def _positive(values, name: str, unit: str) -> np.ndarray:
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise TypeError(f"{name}: expected numbers in {unit}, got {values!r}") from exc
    if not np.all(np.isfinite(arr)) or np.any(arr <= 0):
        bad = float(arr[~(np.isfinite(arr) & (arr > 0))].ravel()[0])
        raise input_error(name, f"got {bad:g}", f"give a positive number in {unit}")
    return arr


def _profile(profile: str) -> str:
    if profile not in _PROFILES:
        raise input_error("profile", f"got {profile!r}", did_you_mean(profile, _PROFILES, cutoff=0.6))
    return profile


def irradiance_mw_per_cm2(power_mw, spot_diameter_mm, *, profile: str = "top-hat"):
    """Irradiance on the skin from beam power and spot diameter.

    Parameters
    ----------
    power_mw : array_like
        Power reaching the skin, mW, > 0.
    spot_diameter_mm : array_like
        Spot diameter, mm, > 0: the full diameter of a top-hat spot, or the
        1/e² diameter of a Gaussian beam.  Broadcast against ``power_mw``.
    profile : {"top-hat", "gaussian"}
        ``"top-hat"``: uniform, E = P / (π (d/2)²).  ``"gaussian"``: the peak,
        E0 = 2P / (π w²), w = d/2 the 1/e² radius.

    Returns
    -------
    ndarray or numpy scalar
        mW/cm².

    Notes
    -----
    Compare with the MPE only after averaging over the limiting aperture
    (:func:`aperture_averaged_irradiance_mw_per_cm2`): for spots smaller than
    3.5 mm the standards average the power over the 3.5 mm aperture.

    Examples
    --------
    >>> round(float(irradiance_mw_per_cm2(100.0, 10.0)), 3)
    127.324
    >>> round(float(irradiance_mw_per_cm2(100.0, 10.0, profile="gaussian")), 3)
    254.648
    """
    power = _positive(power_mw, "power_mw", "mW")
    radius_cm = _positive(spot_diameter_mm, "spot_diameter_mm", "mm") / (2.0 * MM_PER_CM)
    peak_factor = 2.0 if _profile(profile) == "gaussian" else 1.0
    return _scalar_or_array(peak_factor * power / (np.pi * radius_cm**2))


def aperture_averaged_irradiance_mw_per_cm2(
    power_mw, spot_diameter_mm, *, profile: str = "top-hat", aperture_mm=None, rules: Rules | None = None
):
    """Irradiance averaged over the limiting aperture, centred on the beam: the value to compare with the MPE.

    Parameters
    ----------
    power_mw, spot_diameter_mm, profile
        As :func:`irradiance_mw_per_cm2`.
    aperture_mm : float, optional
        Limiting aperture diameter, mm.  Default: the rule
        ``laser.limiting_aperture`` (3.5 mm for skin, 400-1400 nm, unless the
        institution sets another).
    rules : Rules, optional
        Rules in force, used when ``aperture_mm`` is not given.

    Returns
    -------
    ndarray or numpy scalar
        mW/cm²: power through the aperture divided by the aperture area.

    Notes
    -----
    Top hat of diameter d, aperture D: P / (π D²/4) when d <= D (the spot's
    power is spread over the aperture), otherwise the spot's own irradiance.
    Gaussian of 1/e² radius w, aperture radius a: P (1 - exp(-2a²/w²)) / (π a²),
    which tends to P / (π a²) for a narrow beam and to the peak 2P / (π w²) for
    a wide one.  Small spots are therefore never credited with more than the
    aperture average, and never penalised beyond it (ANSI Z136.1, IEC 60825-1:
    irradiance averaged over the limiting aperture).  Beyond 1400 nm the
    standards use smaller apertures for exposures under 10 s (from memory):
    pass ``aperture_mm`` accordingly.

    Examples
    --------
    >>> a = aperture_averaged_irradiance_mw_per_cm2(10.0, 1.0)  # 1 mm spot: averaged over 3.5 mm
    >>> round(float(a), 2)
    103.94
    """
    power = _positive(power_mw, "power_mw", "mW")
    spot_radius_cm = _positive(spot_diameter_mm, "spot_diameter_mm", "mm") / (2.0 * MM_PER_CM)
    if aperture_mm is None:
        aperture_mm = (default_rules() if rules is None else rules).value("laser.limiting_aperture")
    aperture_radius_cm = _positive(aperture_mm, "aperture_mm", "mm") / (2.0 * MM_PER_CM)
    aperture_area = np.pi * aperture_radius_cm**2
    if _profile(profile) == "gaussian":
        through = power * -np.expm1(-2.0 * aperture_radius_cm**2 / spot_radius_cm**2)
    else:
        through = power * np.minimum(1.0, (aperture_radius_cm / spot_radius_cm) ** 2)
    return _scalar_or_array(through / aperture_area)


# ---------------------------------------------------------------------------
# Repeated exposures of one site in a session
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class SessionExposure:
    """Skin exposure of one site over an imaging session, against the MPE.

    Attributes
    ----------
    wavelength_nm : float
    n_exposures : int
    total_on_time_s : float
        Sum of the exposure durations.
    radiant_exposure_j_per_cm2 : float
        Σ E_i t_i, the total dose on the site.
    mpe_mw_per_cm2 : float
        Skin MPE for one continuous exposure lasting ``total_on_time_s``.
    ratio : float
        The largest of the three ratios in :func:`session_exposure_check`
        (1.0 = at the MPE).
    governing_rule : str
        Which of the three gave ``ratio``: ``"total"``, ``"single"`` or ``"per-exposure N^-1/4"``.
    allowed_fraction : float
        The institution's ``laser.skin_mpe_fraction``.
    passed : bool
        ``ratio <= allowed_fraction``.
    """

    wavelength_nm: float
    n_exposures: int
    total_on_time_s: float
    radiant_exposure_j_per_cm2: float
    mpe_mw_per_cm2: float
    ratio: float
    governing_rule: str
    allowed_fraction: float
    passed: bool


def session_exposure_check(
    wavelength_nm: float,
    irradiance_mw_per_cm2,
    exposure_times_s: Sequence[float],
    *,
    rules: Rules | None = None,
) -> SessionExposure:
    """Check the repeated exposures of one skin site in a session against the skin MPE.

    Parameters
    ----------
    wavelength_nm : float
        Excitation wavelength, nm.
    irradiance_mw_per_cm2 : float or array_like
        Aperture-averaged irradiance on the site, mW/cm²: one value for all
        exposures or one per exposure.
    exposure_times_s : sequence of float
        Duration of each exposure of the same site, s (camera frames or
        illumination periods while the source is on).
    rules : Rules, optional
        Rules in force (``laser.skin_mpe_fraction``).

    Returns
    -------
    SessionExposure
        With ``ratio`` the exposure's ratio to the MPE.

    Raises
    ------
    InputError
        Empty or invalid durations, a total on-time beyond 3e4 s, negative or
        non-finite irradiance, and as :func:`skin_mpe_mw_per_cm2`.

    Notes
    -----
    The conservative rule used: the session's exposures are treated as one
    continuous exposure lasting the *summed on-time* T = Σ t_i, with no credit
    for cooling between them.  Three ratios are computed and the largest is
    reported:

    1. total: Σ E_i t_i / (MPE(T) · T) (the dose over the whole train against
       the limit for its duration);
    2. single: max_i E_i / MPE(t_i) (each exposure against its own limit);
    3. per-exposure N^-1/4: max_i E_i / (MPE(t_i) · N^-0.25) over the exposures
       shorter than 10 s (cumulative thermal correction for N exposures).

    These follow the three repetitive-exposure rules of Directive 2006/25/EC,
    Annex II, Table 2.6, with two readings of our own, both stated here: rule 2
    there uses the elapsed time of the group, and using the shorter on-time
    gives a lower allowed dose for T >= 10 s, so it errs on the safe side;
    rule 3 is applied only to exposures shorter than 10 s, where the limit is a
    radiant exposure; from 10 s on the limit is a steady-state irradiance that
    repetition at the same irradiance cannot exceed without failing rule 2.
    The laser safety officer decides how the rules apply to a given source.

    References
    ----------
    Directive 2006/25/EC of 5 April 2006, Annex II, Table 2.6; IEC 60825-1;
    ANSI Z136.1.

    Examples
    --------
    >>> check = session_exposure_check(808.0, 150.0, [30.0] * 10)
    >>> check.total_on_time_s, round(check.ratio, 3), check.governing_rule, check.passed
    (300.0, 0.456, 'total', True)
    """
    times = np.asarray(exposure_times_s, dtype=np.float64).ravel() if not isinstance(exposure_times_s, str) else None
    if times is None or times.size == 0:
        raise input_error("exposure_times_s", f"got {exposure_times_s!r}", "give one duration in s per exposure")
    times = _exposures(times, name="exposure_times_s")
    total = float(times.sum())
    if total > MPE_MAX_EXPOSURE_S:
        raise input_error(
            "exposure_times_s",
            f"total on-time {total:g} s is beyond the standard's {MPE_MAX_EXPOSURE_S:g} s",
            "split the exposures into separate sessions",
        )
    try:
        irradiance = np.broadcast_to(np.asarray(irradiance_mw_per_cm2, dtype=np.float64), times.shape)
    except ValueError:
        raise input_error(
            "irradiance_mw_per_cm2",
            f"{np.size(irradiance_mw_per_cm2)} values for {times.size} exposures",
            "give one irradiance, or one per exposure",
        ) from None
    if not np.all(np.isfinite(irradiance)) or np.any(irradiance < 0):
        raise input_error("irradiance_mw_per_cm2", "negative or non-finite value", "give irradiances >= 0 in mW/cm^2")
    rules = default_rules() if rules is None else rules
    n = times.size
    if np.ndim(wavelength_nm) != 0:
        raise input_error("wavelength_nm", f"got {np.size(wavelength_nm)} values", "check one wavelength at a time")
    _, e_total, beyond = _mpe(wavelength_nm, total)
    _, e_each, _ = _mpe(wavelength_nm, times)
    if beyond:
        _warn_beyond_1400_nm(stacklevel=2)
    mpe_total = float(e_total) * MW_PER_W
    mpe_each = e_each * MW_PER_W
    dose_mj = float(np.sum(irradiance * times))
    short = times < MPE_LONG_EXPOSURE_S
    ratios = {
        "total": dose_mj / (mpe_total * total),
        "single": float(np.max(irradiance / mpe_each)),
        "per-exposure N^-1/4": (
            float(np.max(irradiance[short] / (mpe_each[short] * n**-_TIME_EXPONENT))) if np.any(short) else 0.0
        ),
    }
    governing = max(ratios, key=ratios.__getitem__)
    fraction = float(rules.value("laser.skin_mpe_fraction"))
    return SessionExposure(
        wavelength_nm=float(wavelength_nm),
        n_exposures=n,
        total_on_time_s=total,
        radiant_exposure_j_per_cm2=dose_mj / MW_PER_W,
        mpe_mw_per_cm2=mpe_total,
        ratio=ratios[governing],
        governing_rule=governing,
        allowed_fraction=fraction,
        passed=ratios[governing] <= fraction,
    )


def setup_skin_exposure(setup, *, positions: int = 1, rules: Rules | None = None) -> SessionExposure:
    """The skin exposure of one imaging session of a set-up: the one rule every surface applies.

    The skin limit is taken at the time one skin site is lit in one session:
    the source is on only while the camera exposes, every channel's exposure
    is taken once per position, and all of them fall on the same site with no
    credit for cooling between frames (:func:`session_exposure_check`: summed
    on-time, each exposure alone, and the N^-1/4 rule for short repeated
    exposures).  The command line (``depth``), the plan evaluation and the page
    all report this figure.  A source left on between frames lights the site
    longer: the skin limit for 10 s or more (the steady-state limit) then applies,
    which the plan evaluation reports beside it.

    Parameters
    ----------
    setup : ImagingSetup
        From :func:`probeplan.catalog.setup.build_setup` (source, channels with
        exposures, ``skin_irradiance_mw_per_cm2``).
    positions : int
        Positions imaged per session (each repeats every channel's exposure).
    rules : Rules, optional
        Rules in force (``laser.skin_mpe_fraction``).

    Returns
    -------
    SessionExposure

    Examples
    --------
    >>> from probeplan.catalog.setup import build_setup
    >>> s = build_setup(probes=["CdTe:700"], filters=["700/30"], excitation_nm=808.0, irradiance_mw_per_cm2=150.0,
    ...                 exposure_s=30.0)
    >>> check = setup_skin_exposure(s, positions=10)
    >>> check.total_on_time_s, round(check.ratio, 3)
    (300.0, 0.456)
    """
    if isinstance(positions, bool) or not isinstance(positions, int) or positions < 1:
        raise input_error("positions", f"got {positions!r}", "give a whole number of positions >= 1")
    exposures = list(setup.exposures_s) * positions
    return session_exposure_check(float(setup.source.centre_nm), setup.skin_irradiance_mw_per_cm2, exposures,
                                  rules=rules)


# ---------------------------------------------------------------------------
# Injection volumes and blood sampling
# ---------------------------------------------------------------------------


def _choice(value: str, options: Sequence[str], name: str) -> str:
    if not isinstance(value, str):
        raise TypeError(f"{name}: expected text, got {type(value).__name__}")
    key = value.strip().lower().replace(".", "")
    key = {"i v": "iv", "slow iv": "iv_slow", "iv slow": "iv_slow", "po": "oral"}.get(key, key)
    if key in options:
        return key
    raise input_error(name, f"unknown {name} {value!r}", did_you_mean(key, options, cutoff=0.6))


def _body_mass_kg(body_mass_g, species: str) -> np.ndarray:
    mass = _positive(body_mass_g, "body_mass_g", "g")
    low, high = _BODY_MASS_RANGE_G[species]
    if mass.min() < low or mass.max() > high:
        bad = mass.min() if mass.min() < low else mass.max()
        raise input_error(
            "body_mass_g",
            f"{bad:g} g is outside {low:g}-{high:g} g for a {species}",
            "give the body mass in grams",
        )
    return mass / G_PER_KG


def max_injection_volume_ml(species: str, route: str, body_mass_g, rules: Rules | None = None):
    """Largest volume to give by one route: good-practice table or the institution's rule.

    Parameters
    ----------
    species : {"mouse", "rat"}
    route : {"iv", "iv_slow", "ip", "sc", "im", "oral"}
        i.v. bolus, slow i.v. injection, intraperitoneal, subcutaneous,
        intramuscular (per site), oral gavage.  ``"i.v."`` and upper case are accepted.
    body_mass_g : array_like
        Body mass in g (mouse 1-150 g, rat 5-1500 g; other values are refused
        as probable unit mistakes).
    rules : Rules, optional
        Rules in force; rule ``injection.<species>.<route>``.  Defaults: Diehl
        et al. 2001 good-practice volumes.

    Returns
    -------
    ndarray or numpy scalar
        Volume in mL, shaped like ``body_mass_g``.

    Raises
    ------
    InputError
        Unknown species or route (with the closest names), body mass not positive or implausible.

    Notes
    -----
    V = rule (mL/kg) × body mass (kg).  For ``"im"`` the rule is a volume *per
    injection site* in mL, independent of body mass (Diehl et al. 2001 give
    i.m. volumes per site); the result is that per-site volume, broadcast to the
    shape of ``body_mass_g``.  The table's good-practice values apply to
    aqueous solutions given once; the table's possible maxima are named in the
    rule sources.  Dose volume is one limit among several: the probe dose
    itself is checked separately.

    References
    ----------
    Diehl, K.-H. et al., A good practice guide to the administration of
    substances and removal of blood, including routes and volumes,
    J. Appl. Toxicol. 21, 15-23 (2001), doi:10.1002/jat.727, Table 1.

    Examples
    --------
    >>> float(max_injection_volume_ml("mouse", "iv", 25.0))
    0.125
    >>> float(max_injection_volume_ml("rat", "im", 300.0))
    0.1
    """
    species = _choice(species, SPECIES, "species")
    route = _choice(route, ROUTES, "route")
    mass_kg = _body_mass_kg(body_mass_g, species)
    rules = default_rules() if rules is None else rules
    rule = rules[f"injection.{species}.{route}"]
    if rule.unit == "mL":
        volume = np.broadcast_to(np.float64(rule.value), mass_kg.shape).copy()
    else:
        volume = rule.value * mass_kg
    return _scalar_or_array(volume)


def max_blood_sample_ml(species: str, body_mass_g, interval: str = "weekly", rules: Rules | None = None):
    """Largest blood sample (mL) for a given recovery interval.

    Parameters
    ----------
    species : {"mouse", "rat"}
    body_mass_g : array_like
        Body mass in g.
    interval : {"weekly", "2 weeks", "4 weeks"}
        Recovery period before the next sample: 7.5 %, 10 % or 15 % of the
        circulating blood volume (defaults).
    rules : Rules, optional
        Rules in force: ``blood.<species>.circulating_volume`` (mL/kg) and
        ``blood.sample_percent.recovery_*`` (%).

    Returns
    -------
    ndarray or numpy scalar
        mL, shaped like ``body_mass_g``.

    Raises
    ------
    InputError
        Unknown species or interval, implausible body mass.

    Notes
    -----
    V = circulating volume (mL/kg) × mass (kg) × share / 100.  Defaults: mouse
    72 mL/kg, rat 64 mL/kg; 7.5 % with one week's recovery, 10 % with two, 15 %
    with four.  The sample volume includes every sample taken in the period.

    References
    ----------
    Diehl, K.-H. et al., J. Appl. Toxicol. 21, 15-23 (2001), doi:10.1002/jat.727.

    Examples
    --------
    >>> round(float(max_blood_sample_ml("mouse", 25.0)), 4)
    0.135
    """
    species = _choice(species, SPECIES, "species")
    if not isinstance(interval, str):
        raise TypeError(f"interval: expected text, got {type(interval).__name__}")
    if interval not in BLOOD_SAMPLE_INTERVALS:
        raise input_error("interval", f"unknown interval {interval!r}",
                          did_you_mean(interval, BLOOD_SAMPLE_INTERVALS, cutoff=0.4))
    mass_kg = _body_mass_kg(body_mass_g, species)
    rules = default_rules() if rules is None else rules
    blood_ml_per_kg = rules.value(f"blood.{species}.circulating_volume")
    share = rules.value(BLOOD_SAMPLE_INTERVALS[interval]) / PERCENT
    return _scalar_or_array(blood_ml_per_kg * mass_kg * share)
