"""Nanocrystal probes ("dots"): sizing, extinction, emission spectra, probes and doses.

Units: wavelengths in nm, diameters in nm, photon energies in eV, molar extinction
in M^-1 cm^-1 (the field's convention), concentrations in uM, doses in nmol/kg,
body mass in g, volumes in uL.

Materials live in ``probeplan/data/materials.toml`` (provenance header, a source per
value).  *Sized* materials (CdSe, CdTe, CdS, PbS, PbSe) have a published sizing curve
linking the first-exciton absorption peak to the diameter, and an extinction model;
*typical* materials (CdTeSe, CuInS2, InP, InAs, Ag2S) carry a typical emission range,
width, quantum yield and Stokes shift only ("typical, no sizing").

Validity policy
---------------
* Yu et al. (2003) polynomials (CdSe, CdTe, CdS) are empirical fits that bend away
  quickly outside the sizes measured: a peak or diameter outside the material's
  validity range is **refused** (:class:`~probeplan.errors.InputError`).
* The lead-chalcogenide band-gap curves (PbS, PbSe) tend to the bulk gap and
  extrapolate gently: outside the measured range they **warn**
  (:class:`~probeplan.errors.ModelValidityWarning`), and outside a wider code limit
  they refuse.
* :func:`make_probe` refuses an emission peak outside the material's emission range.

For research use only.  Cadmium- and lead-containing probes are toxic heavy-metal
materials: the institution's chemical safety office and animal care committee decide
their use.
"""

from __future__ import annotations

import copy
import functools
import math
import tomllib
from dataclasses import dataclass
from importlib import resources
from typing import Any

import numpy as np
from scipy.special import ndtr

from probeplan.errors import AssumptionWarning, ModelValidityWarning, did_you_mean, input_error, warn_at_caller
from probeplan.units import G_PER_KG, MEV_PER_EV, UL_PER_ML, UM_PER_M  # noqa: F401

#: h c in eV nm as the sizing curves and the shipped demo data use it (CODATA 2018 rounded to 1e-6;
#: probeplan.units.HC_EV_NM is the unrounded scipy.constants value, 2.7e-10 apart).
HC_EV_NM = 1239.841984
from probeplan.model.spectra import Spectrum, as_wavelengths_nm

__all__ = [
    "HC_EV_NM",
    "Probe",
    "absorption_model",
    "concentration_uM",
    "diameter_nm",
    "dose_nmol_per_kg",
    "dose_volume_ul",
    "emission_peak_from_exciton_nm",
    "emission_range_nm",
    "emission_spectrum_per_nm",
    "exciton_peak_from_emission_nm",
    "exciton_peak_nm",
    "extinction_coefficient",
    "list_materials",
    "make_probe",
    "material_names",
    "material_properties",
    "molar_extinction_at",
]

#: Wavelength (nm) of the lead-chalcogenide high-energy extinction reference.
LEAD_REFERENCE_WAVELENGTH_NM = 400.0
#: Excitation closer than this to the first exciton (eV) is warned: the exciton peak shape matters there.
NEAR_GAP_EV = 0.1
#: Absorbance above which Beer-Lambert concentration is warned (stray light, aggregation): common practice.
MAX_LINEAR_ABSORBANCE = 1.0
#: Width of a Gaussian FWHM in standard deviations: 2 sqrt(2 ln 2).
_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))

_SOURCES = {
    "Yu2003": "Yu, Qu, Guo, Peng, Chem. Mater. 15, 2854 (2003), doi:10.1021/cm034081k",
    "Moreels2009": "Moreels et al., ACS Nano 3, 3023 (2009), doi:10.1021/nn900863a",
    "Moreels2007": "Moreels et al., Chem. Mater. 19, 6101 (2007), doi:10.1021/cm071410q (doi from memory)",
}
_SIZED_KEYS = {
    "yu2003_polynomial": ("diameter_poly", "extinction_prefactor", "extinction_exponent", "valid_exciton_peak_nm",
                          "excitation_ratio", "excitation_delta_eV"),
    "lead_chalcogenide_gap": ("e_bulk_eV", "gap_a", "gap_b", "gap_c", "valid_diameter_nm", "hard_diameter_nm",
                              "eps_gap_reference_per_M_cm", "eps_gap_reference_diameter_nm", "eps_gap_exponent",
                              "eps_400_prefactor_per_uM_cm"),
}
_COMMON_KEYS = ("stokes_shift_meV", "fwhm_nm", "quantum_yield")
_TYPICAL_KEYS = ("emission_range_nm", "typical_extinction_per_M_cm")


# --------------------------------------------------------------------------- material table


@functools.lru_cache(maxsize=1)
def _load_materials() -> dict[str, dict[str, Any]]:
    text = resources.files("probeplan").joinpath("data", "materials.toml").read_text(encoding="utf-8")
    table = tomllib.loads(text)["materials"]
    for name, entry in table.items():
        keys = list(_COMMON_KEYS)
        if entry.get("kind") == "sized":
            keys += _SIZED_KEYS[entry["sizing_model"]]
        elif entry.get("kind") == "typical":
            keys += _TYPICAL_KEYS
        else:  # pragma: no cover - guards the shipped table
            raise input_error(f"materials.toml: {name}", f"kind {entry.get('kind')!r}", "use 'sized' or 'typical'")
        for key in keys:
            item = entry.get(key)
            if not isinstance(item, dict) or "value" not in item or not item.get("source"):
                raise input_error(f"materials.toml: {name}.{key}", "missing value or source", "give both")  # pragma: no cover
    return table


def material_names() -> list[str]:
    """Names of the shipped materials, in table order.

    Examples
    --------
    >>> material_names()[:5]
    ['CdSe', 'CdTe', 'CdS', 'PbS', 'PbSe']
    """
    return list(_load_materials())


def _canonical(material: str) -> str:
    if not isinstance(material, str):
        raise TypeError(f"material: expected a name such as 'CdSe', got {material!r}")
    table = _load_materials()
    if material in table:
        return material
    lowered = {k.lower(): k for k in table}
    if material.strip().lower() in lowered:
        return lowered[material.strip().lower()]
    raise input_error("material", f"unknown material {material!r}", did_you_mean(material, list(table)))


def _entry(material: str) -> dict[str, Any]:
    return _load_materials()[_canonical(material)]


def _value(entry: dict[str, Any], key: str) -> Any:
    return entry[key]["value"]


def _sized_entry(material: str) -> dict[str, Any]:
    entry = _entry(material)
    if entry["kind"] != "sized":
        sized = [n for n, e in _load_materials().items() if e["kind"] == "sized"]
        raise input_error(
            "material",
            f"{_canonical(material)!r} has no published sizing curve (typical, no sizing)",
            f"use one of {', '.join(sized)}, or give measured values",
        )
    return entry


def material_properties(material: str) -> dict[str, Any]:
    """Everything the table holds about a material, each value with its source (a copy).

    Examples
    --------
    >>> p = material_properties("cdse")
    >>> p["name"], p["heavy_metal"], p["extinction_exponent"]["value"]
    ('CdSe', 'Cd', 2.65)
    """
    name = _canonical(material)
    out = copy.deepcopy(_load_materials()[name])
    out["name"] = name
    return out


def _source_text(entry: dict[str, Any]) -> str:
    if entry["kind"] == "sized":
        key = "diameter_poly" if entry["sizing_model"] == "yu2003_polynomial" else "e_bulk_eV"
        return _SOURCES[entry[key]["source"]]
    return "typical, no sizing (typical assumptions)"


# --------------------------------------------------------------------------- validation helpers


def _as_positive(value, name: str) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise TypeError(f"{name}: expected numbers, got {value!r}") from exc
    if not np.all(np.isfinite(arr)):
        raise input_error(name, "contains NaN or inf", "give finite numbers")
    if np.any(arr <= 0):
        raise input_error(name, f"got {arr.min():g}, expected > 0", f"give a positive {name}")
    return arr


def _out(arr: np.ndarray) -> Any:
    """Float for 0-d results, the array otherwise."""
    arr = np.asarray(arr, dtype=np.float64)
    return float(arr) if arr.ndim == 0 else arr


def _refuse_outside(values: np.ndarray, lo: float, hi: float, where: str, what: str, unit: str, fix: str) -> None:
    bad = (values < lo) | (values > hi)
    if np.any(bad):
        raise input_error(where, f"{values[bad].flat[0]:g} {unit} is outside {what} {lo:g}-{hi:g} {unit}", fix)


# --------------------------------------------------------------------------- sizing


def _lead_gap_eV(entry: dict[str, Any], d_nm: np.ndarray) -> np.ndarray:
    a, b, c = (_value(entry, k) for k in ("gap_a", "gap_b", "gap_c"))
    return _value(entry, "e_bulk_eV") + 1.0 / (a * d_nm**2 + b * d_nm + c)


def _lead_diameter_from_gap(entry: dict[str, Any], gap_eV: np.ndarray) -> np.ndarray:
    a, b, c = (_value(entry, k) for k in ("gap_a", "gap_b", "gap_c"))
    rhs = 1.0 / (gap_eV - _value(entry, "e_bulk_eV"))
    return (-b + np.sqrt(b * b - 4.0 * a * (c - rhs))) / (2.0 * a)


def _check_lead_diameter(entry: dict[str, Any], material: str, d_nm: np.ndarray, where: str) -> None:
    hlo, hhi = _value(entry, "hard_diameter_nm")
    _refuse_outside(d_nm, hlo, hhi, where, f"the diameters probeplan uses for {material}", "nm",
                    "give a value for a dot inside that range, or measured values")
    vlo, vhi = _value(entry, "valid_diameter_nm")
    bad = (d_nm < vlo) | (d_nm > vhi)
    if np.any(bad):
        warn_at_caller(
            f"{where}: {material} diameter {d_nm[bad].flat[0]:.3g} nm lies outside the measured "
            f"{vlo:g}-{vhi:g} nm of the sizing curve; the result is an extrapolation",
            ModelValidityWarning)


def _yu_diameter_range(entry: dict[str, Any]) -> tuple[float, float]:
    lo, hi = _value(entry, "valid_exciton_peak_nm")
    poly = _value(entry, "diameter_poly")
    return float(np.polyval(poly, lo)), float(np.polyval(poly, hi))


def diameter_nm(material: str, exciton_peak_nm):
    """Dot diameter (nm) from the first-exciton absorption peak (nm).

    Parameters
    ----------
    material : str
        A sized material: ``"CdSe"``, ``"CdTe"``, ``"CdS"``, ``"PbS"`` or ``"PbSe"``.
    exciton_peak_nm : array_like
        First-exciton absorption peak wavelength(s), nm, any shape.

    Returns
    -------
    float or ndarray
        Diameter(s) in nm, same shape as ``exciton_peak_nm``.

    Raises
    ------
    InputError
        Unknown or unsized material; for CdSe/CdTe/CdS a peak outside the validity range;
        for PbS/PbSe a peak outside the code limits.

    Warns
    -----
    ModelValidityWarning
        PbS/PbSe outside the measured diameter range.

    Notes
    -----
    CdSe, CdTe, CdS (Yu et al. 2003): D = polynomial in lambda (see ``materials.toml``).
    PbS (Moreels et al. 2009): E0 = 0.41 + 1/(0.0252 d^2 + 0.283 d) eV; PbSe (Moreels et
    al. 2007): E0 = 0.278 + 1/(0.016 d^2 + 0.209 d + 0.45) eV; E0 = hc/lambda, solved
    in closed form for d.

    References
    ----------
    Yu, Qu, Guo, Peng, Chem. Mater. 15, 2854 (2003), doi:10.1021/cm034081k.
    Moreels et al., ACS Nano 3, 3023 (2009), doi:10.1021/nn900863a.
    Moreels et al., Chem. Mater. 19, 6101 (2007), doi:10.1021/cm071410q.

    Examples
    --------
    >>> round(diameter_nm("CdSe", 550), 2)
    3.04
    >>> round(diameter_nm("PbS", 1300), 2)
    4.61
    """
    entry = _sized_entry(material)
    name = _canonical(material)
    lam = as_wavelengths_nm(exciton_peak_nm, name="exciton_peak_nm")
    if entry["sizing_model"] == "yu2003_polynomial":
        lo, hi = _value(entry, "valid_exciton_peak_nm")
        _refuse_outside(lam, lo, hi, "exciton_peak_nm", f"the {name} sizing curve's validity range", "nm",
                        "the Yu et al. 2003 fit holds only over the sizes measured; use a measured size")
        return _out(np.polyval(_value(entry, "diameter_poly"), lam))
    gap = HC_EV_NM / lam
    e_bulk = _value(entry, "e_bulk_eV")
    if np.any(gap <= e_bulk):
        raise input_error("exciton_peak_nm", f"{lam.max():g} nm is at or beyond the bulk {name} band gap "
                          f"({HC_EV_NM / e_bulk:.0f} nm)", "give a first-exciton peak of a confined dot")
    d = _lead_diameter_from_gap(entry, gap)
    _check_lead_diameter(entry, name, d, "exciton_peak_nm")
    return _out(d)


def exciton_peak_nm(material: str, diameter_nm):
    """First-exciton absorption peak (nm) of a dot of the given diameter (nm); inverse of :func:`diameter_nm`.

    Parameters
    ----------
    material : str
        A sized material.
    diameter_nm : array_like
        Diameter(s) in nm, any shape.

    Returns
    -------
    float or ndarray
        Peak wavelength(s) in nm.

    Raises
    ------
    InputError
        As :func:`diameter_nm`, for diameters outside the ranges.

    Warns
    -----
    ModelValidityWarning
        PbS/PbSe outside the measured diameter range.

    Notes
    -----
    The Yu et al. (2003) polynomials increase monotonically over their validity ranges
    and are inverted there by vectorised bisection (to 1e-9 nm); the lead-chalcogenide
    curves are evaluated directly, lambda = hc/E0(d).

    References
    ----------
    As :func:`diameter_nm`.

    Examples
    --------
    >>> round(exciton_peak_nm("CdSe", 3.0403), 1)
    550.0
    """
    entry = _sized_entry(material)
    name = _canonical(material)
    d = _as_positive(diameter_nm, "diameter_nm")
    if entry["sizing_model"] == "lead_chalcogenide_gap":
        _check_lead_diameter(entry, name, d, "diameter_nm")
        return _out(HC_EV_NM / _lead_gap_eV(entry, d))
    dlo, dhi = _yu_diameter_range(entry)
    _refuse_outside(d, dlo, dhi, "diameter_nm", f"the {name} sizing curve's validity range", "nm",
                    "the Yu et al. 2003 fit holds only over the sizes measured; use a measured peak")
    if d.ndim == 0:  # one dot (every probe asks for its own size again and again): bisected once
        return _yu_peak_nm(name, float(d))
    return _out(_yu_bisect(entry, d))


def _yu_bisect(entry, d: np.ndarray) -> np.ndarray:
    poly = _value(entry, "diameter_poly")
    lo_nm, hi_nm = _value(entry, "valid_exciton_peak_nm")
    lo = np.full(d.shape, float(lo_nm))
    hi = np.full(d.shape, float(hi_nm))
    for _ in range(60):  # halves a 200 nm bracket to below 1e-9 nm
        mid = 0.5 * (lo + hi)
        below = np.polyval(poly, mid) < d
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    return 0.5 * (lo + hi)


@functools.lru_cache(maxsize=256)
def _yu_peak_nm(name: str, diameter_nm: float) -> float:
    """The bisection of :func:`exciton_peak_nm` for one diameter, cached (a pure function of the shipped table)."""
    return float(_yu_bisect(_sized_entry(name), np.asarray(diameter_nm, dtype=np.float64)))


def extinction_coefficient(material: str, diameter_nm):
    """Molar extinction coefficient at the first-exciton peak, M^-1 cm^-1.

    Parameters
    ----------
    material : str
        A sized material.
    diameter_nm : array_like
        Diameter(s) in nm.

    Returns
    -------
    float or ndarray
        epsilon in M^-1 cm^-1 (per mole of dots).

    Raises
    ------
    InputError
        Unknown or unsized material, diameter outside the ranges (see module notes).

    Warns
    -----
    ModelValidityWarning
        PbS/PbSe outside the measured diameter range.

    Notes
    -----
    CdSe 5857 D^2.65, CdTe 10043 D^2.12, CdS 21536 D^2.3 (Yu et al. 2003; the paper
    notes the value assumes a typical first-exciton line width).  PbS/PbSe: Moreels et
    al. (2009) found epsilon at the band gap rising as d^1.3; probeplan uses
    eps = eps_ref (d/5 nm)^1.3 with eps_ref = 1.5e5 M^-1 cm^-1, an order-of-magnitude
    value **from memory**; PbSe is taken equal to PbS (the 2009 paper reports them
    comparable).  Give a measured epsilon where concentration matters.

    References
    ----------
    Yu et al., Chem. Mater. 15, 2854 (2003), doi:10.1021/cm034081k.
    Moreels et al., ACS Nano 3, 3023 (2009), doi:10.1021/nn900863a.

    Examples
    --------
    >>> f"{extinction_coefficient('CdSe', 3.04):.4g}"
    '1.115e+05'
    """
    entry = _sized_entry(material)
    name = _canonical(material)
    d = _as_positive(diameter_nm, "diameter_nm")
    if entry["sizing_model"] == "yu2003_polynomial":
        dlo, dhi = _yu_diameter_range(entry)
        # a rounding margin so a diameter quoted to 2 decimals at the range edge is accepted
        _refuse_outside(d, dlo - 0.005, dhi + 0.005, "diameter_nm", f"the {name} extinction fit's validity range",
                        "nm", "the Yu et al. 2003 fit holds only over the sizes measured; use a measured epsilon")
        return _out(_value(entry, "extinction_prefactor") * d ** _value(entry, "extinction_exponent"))
    _check_lead_diameter(entry, name, d, "diameter_nm")
    ref = _value(entry, "eps_gap_reference_per_M_cm")
    d_ref = _value(entry, "eps_gap_reference_diameter_nm")
    return _out(ref * (d / d_ref) ** _value(entry, "eps_gap_exponent"))


def concentration_uM(material: str, exciton_peak_nm, absorbance, path_cm=1.0):
    """Dot concentration (uM) from the absorbance at the first-exciton peak (Beer-Lambert).

    Parameters
    ----------
    material : str
        A sized material.
    exciton_peak_nm : array_like
        First-exciton peak wavelength, nm.
    absorbance : array_like
        Decadic absorbance (optical density of the solution) at that peak, >= 0.
    path_cm : array_like, optional
        Cuvette path length in cm (default 1 cm).

    Returns
    -------
    float or ndarray
        Concentration of dots in uM (broadcast shape).

    Raises
    ------
    InputError
        Negative or non-finite absorbance, path <= 0, and as :func:`diameter_nm`.

    Warns
    -----
    ModelValidityWarning
        Absorbance above 1, where stray light and scattering bend Beer-Lambert (common
        practice: dilute and measure again).

    Notes
    -----
    c = A / (eps l), with eps from :func:`extinction_coefficient` at the diameter from
    :func:`diameter_nm`; c in M is converted to uM with ``UM_PER_M``.

    References
    ----------
    Yu et al., Chem. Mater. 15, 2854 (2003), doi:10.1021/cm034081k.

    Examples
    --------
    >>> round(concentration_uM("CdSe", 550, 0.1), 3)
    0.897
    """
    a = np.asarray(absorbance, dtype=np.float64)
    if not np.all(np.isfinite(a)) or np.any(a < 0):
        raise input_error("absorbance", f"got {np.asarray(absorbance)!r}", "give a finite absorbance >= 0")
    path = _as_positive(path_cm, "path_cm")
    if np.any(a > MAX_LINEAR_ABSORBANCE):
        warn_at_caller(
            f"absorbance {a.max():g} is above {MAX_LINEAR_ABSORBANCE:g}, where Beer-Lambert is often not linear; "
            "dilute the sample and measure again",
            ModelValidityWarning)
    eps = extinction_coefficient(material, diameter_nm(material, exciton_peak_nm))
    return _out(a / (np.asarray(eps) * path) * UM_PER_M)


# --------------------------------------------------------------------------- absorption at the excitation wavelength


def absorption_model(material: str) -> str:
    """One-line description of the model for epsilon at the excitation wavelength.

    Examples
    --------
    >>> absorption_model("PbS").startswith("volume")
    True
    """
    entry = _entry(material)
    if entry["kind"] == "typical":
        return (f"typical: a constant {_value(entry, 'typical_extinction_per_M_cm'):.3g} M^-1 cm^-1 above the gap "
                "(typical assumption, order of magnitude); pass a measured value")
    if entry["sizing_model"] == "lead_chalcogenide_gap":
        return ("volume: log-linear in photon energy from the band-gap epsilon to the 400 nm epsilon "
                f"({_value(entry, 'eps_400_prefactor_per_uM_cm')} d^3 per uM per cm, from memory), constant above")
    return (f"ratio: log-linear in photon energy from the first-exciton epsilon to {_value(entry, 'excitation_ratio')}x "
            f"it at {_value(entry, 'excitation_delta_eV')} eV above the gap (typical assumption), constant above")


def molar_extinction_at(material: str, diameter_nm, wavelength_nm):
    """Molar extinction (M^-1 cm^-1) of a sized dot at an excitation wavelength above its gap.

    Parameters
    ----------
    material : str
        A sized material.
    diameter_nm : float
        Dot diameter, nm.
    wavelength_nm : array_like
        Excitation wavelength(s), nm, not longer than the first-exciton peak.

    Returns
    -------
    float or ndarray
        epsilon(lambda) in M^-1 cm^-1, same shape as ``wavelength_nm``.

    Raises
    ------
    InputError
        A wavelength longer than the first-exciton peak (the dot hardly absorbs there and
        the model says nothing: pass a measured value), and as :func:`extinction_coefficient`.

    Warns
    -----
    ModelValidityWarning
        Excitation within 0.1 eV of the first exciton, where the peak's shape matters.

    Notes
    -----
    Both models interpolate log-linearly in photon energy E between the first-exciton
    point (E_gap, eps_gap) and a high-energy point (E_hi, eps_hi), and hold eps_hi above E_hi:
    ln eps(E) = ln eps_gap + (E - E_gap)/(E_hi - E_gap) ln(eps_hi/eps_gap).
    The exciton peak and higher transitions are smoothed over.

    * PbS, PbSe (volume model): E_hi = hc/400 nm, eps_hi = k d^3 with k = 0.0233 (PbS)
      or 0.0277 (PbSe) per uM per cm (from memory); Moreels et al. (2009) showed epsilon
      at high photon energy scales with the dot volume, independent of confinement.
    * CdSe, CdTe, CdS (ratio model): E_hi = E_gap + 1 eV and eps_hi = R eps_gap with R
      a typical assumption per material (3.5, 3.0, 2.5).

    References
    ----------
    Moreels et al., ACS Nano 3, 3023 (2009), doi:10.1021/nn900863a.
    Yu et al., Chem. Mater. 15, 2854 (2003), doi:10.1021/cm034081k.

    Examples
    --------
    >>> f"{molar_extinction_at('PbS', 5.0, 400.0):.3g}"
    '2.91e+06'
    """
    entry = _sized_entry(material)
    name = _canonical(material)
    d = _as_positive(diameter_nm, "diameter_nm")
    lam = as_wavelengths_nm(wavelength_nm, name="wavelength_nm")
    eps_gap = np.asarray(extinction_coefficient(name, d))
    peak = np.asarray(exciton_peak_nm(name, d))
    if np.any(lam > peak):
        raise input_error(
            "wavelength_nm",
            f"{lam.max():g} nm is longer than the {name} first-exciton peak ({float(np.max(peak)):.0f} nm)",
            "excite at a shorter wavelength, or pass a measured extinction at the excitation wavelength",
        )
    e_gap = HC_EV_NM / peak
    e = HC_EV_NM / lam
    if np.any(e - e_gap < NEAR_GAP_EV):
        warn_at_caller(
            f"excitation at {lam.max():g} nm is within {NEAR_GAP_EV} eV of the {name} first exciton; "
            "the smooth absorption model ignores the exciton peak there",
            ModelValidityWarning)
    if entry["sizing_model"] == "lead_chalcogenide_gap":
        e_hi = HC_EV_NM / LEAD_REFERENCE_WAVELENGTH_NM
        eps_hi = _value(entry, "eps_400_prefactor_per_uM_cm") * d**3 * UM_PER_M
    else:
        e_hi = e_gap + _value(entry, "excitation_delta_eV")
        eps_hi = _value(entry, "excitation_ratio") * eps_gap
    frac = np.clip((e - e_gap) / (e_hi - e_gap), 0.0, 1.0)
    return _out(eps_gap * np.exp(frac * np.log(eps_hi / eps_gap)))


# --------------------------------------------------------------------------- emission


def emission_peak_from_exciton_nm(material: str, exciton_peak_nm):
    """Emission peak (nm) from the first-exciton peak (nm) by the material's Stokes shift (meV).

    Notes
    -----
    E_em = hc/lambda_exc - S; the Stokes shift S is a typical assumption per material.

    Examples
    --------
    >>> round(emission_peak_from_exciton_nm("PbS", 1300.0), 1)
    1387.3
    """
    shift = _value(_entry(material), "stokes_shift_meV") / MEV_PER_EV
    lam = as_wavelengths_nm(exciton_peak_nm, name="exciton_peak_nm")
    e = HC_EV_NM / lam - shift
    if np.any(e <= 0):
        raise input_error("exciton_peak_nm", f"{lam.max():g} nm is too long for a Stokes shift of {shift:g} eV",
                          "give a shorter wavelength")
    return _out(HC_EV_NM / e)


def exciton_peak_from_emission_nm(material: str, emission_peak_nm):
    """First-exciton peak (nm) from the emission peak (nm); inverse of :func:`emission_peak_from_exciton_nm`.

    Examples
    --------
    >>> round(exciton_peak_from_emission_nm("PbS", 1387.3), 1)
    1300.0
    """
    shift = _value(_entry(material), "stokes_shift_meV") / MEV_PER_EV
    lam = as_wavelengths_nm(emission_peak_nm, name="emission_peak_nm")
    return _out(HC_EV_NM / (HC_EV_NM / lam + shift))


def emission_range_nm(material: str) -> tuple[float, float]:
    """Emission peaks (nm) the material's models cover.

    Sized materials: the validity range of the sizing curve (exciton peaks, or the
    measured diameters for PbS/PbSe) moved by the Stokes shift; typical materials: the
    typical emission range in the table.

    Examples
    --------
    >>> [round(x) for x in emission_range_nm("CdSe")]
    [455, 660]
    """
    entry = _entry(material)
    name = _canonical(material)
    if entry["kind"] == "typical":
        lo, hi = _value(entry, "emission_range_nm")
        return float(lo), float(hi)
    if entry["sizing_model"] == "yu2003_polynomial":
        peaks = np.asarray(_value(entry, "valid_exciton_peak_nm"), dtype=float)
    else:
        peaks = HC_EV_NM / _lead_gap_eV(entry, np.asarray(_value(entry, "valid_diameter_nm"), dtype=float))
    em = np.asarray(emission_peak_from_exciton_nm(name, peaks))
    return float(em[0]), float(em[1])


def emission_spectrum_per_nm(wavelength_nm, emission_peak_nm: float, fwhm_nm: float) -> np.ndarray:
    """Emission spectrum, Gaussian in photon energy, as a density per nm with unit total area.

    Parameters
    ----------
    wavelength_nm : array_like
        Wavelengths at which to evaluate, nm, any shape.
    emission_peak_nm : float
        Wavelength (nm) of the maximum of the per-nm spectrum.
    fwhm_nm : float
        Full width at half maximum in nm, converted to energy at the peak.

    Returns
    -------
    ndarray
        Spectral density in 1/nm, same shape as ``wavelength_nm``.  The integral over
        all wavelengths is 1; a grid that does not cover the band holds less.

    Notes
    -----
    g(E) = exp(-(E - E_c)^2 / (2 sigma^2)) / (sigma sqrt(2 pi)), E = hc/lambda, with the
    energy FWHM dE = hc (1/(lambda_p - w/2) - 1/(lambda_p + w/2)) and sigma = dE/(2 sqrt(2 ln 2)).
    Per nm, f(lambda) = g(E) hc/lambda^2; its maximum lies at lambda_p when
    E_c = E_p - 2 sigma^2/E_p (E_p = hc/lambda_p).  Dividing by Phi(E_c/sigma) makes the
    area over 0 < E < inf exactly 1.  Common practice for dot emission, no source.

    Examples
    --------
    >>> wl = np.arange(400.0, 800.0, 0.1)
    >>> round(float(np.trapezoid(emission_spectrum_per_nm(wl, 600.0, 30.0), wl)), 6)
    1.0
    """
    lam = as_wavelengths_nm(wavelength_nm)
    peak = float(_as_positive(emission_peak_nm, "emission_peak_nm"))
    width = float(_as_positive(fwhm_nm, "fwhm_nm"))
    if width >= peak:
        raise input_error("fwhm_nm", f"{width:g} nm is not smaller than the peak {peak:g} nm", "give a narrower FWHM")
    e_p = HC_EV_NM / peak
    d_e = HC_EV_NM * (1.0 / (peak - width / 2.0) - 1.0 / (peak + width / 2.0))
    sigma = d_e / _FWHM_PER_SIGMA
    e_c = e_p - 2.0 * sigma**2 / e_p
    e = HC_EV_NM / lam
    g = np.exp(-0.5 * ((e - e_c) / sigma) ** 2) / (sigma * math.sqrt(2.0 * math.pi))
    return g * HC_EV_NM / lam**2 / ndtr(e_c / sigma)


# --------------------------------------------------------------------------- probes


@dataclass(frozen=True)
class Probe:
    """A dot probe as the forward and channel models see it.

    Parameters
    ----------
    material : str
        Material name (see :func:`list_materials`); stored in its canonical spelling.
    emission_peak_nm : float
        Emission peak, nm.
    fwhm_nm : float
        Emission FWHM, nm.
    quantum_yield : float
        Photoluminescence quantum yield, 0 < QY <= 1.
    name : str
        Label; defaults to ``"<material> <peak> nm"``.
    extinction_at_excitation_per_M_cm : float, optional
        A measured epsilon at the excitation wavelength (M^-1 cm^-1); used instead of the
        model at whatever excitation wavelength is asked.
    emission : Spectrum, optional
        A measured emission spectrum (kind ``"emission"``), used instead of the Gaussian.

    Examples
    --------
    >>> p = make_probe("PbS", 1387.3)
    >>> round(p.exciton_peak_nm), p.heavy_metal
    (1300, 'Pb')
    >>> f"{p.brightness(808.0):.3g}"
    '5.8e+04'
    """

    material: str
    emission_peak_nm: float
    fwhm_nm: float
    quantum_yield: float
    name: str = ""
    extinction_at_excitation_per_M_cm: float | None = None
    emission: Spectrum | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "material", _canonical(self.material))
        for key in ("emission_peak_nm", "fwhm_nm", "quantum_yield"):
            value = getattr(self, key)
            if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
                raise TypeError(f"{key}: expected a number, got {value!r}")
            object.__setattr__(self, key, float(_as_positive(value, key)))
        as_wavelengths_nm(self.emission_peak_nm, name="emission_peak_nm")
        if self.fwhm_nm >= self.emission_peak_nm:
            raise input_error("fwhm_nm", f"{self.fwhm_nm:g} nm", "give an FWHM smaller than the emission peak")
        if self.quantum_yield > 1.0:
            raise input_error("quantum_yield", f"got {self.quantum_yield:g}", "give a fraction between 0 and 1")
        if self.extinction_at_excitation_per_M_cm is not None:
            eps = float(_as_positive(self.extinction_at_excitation_per_M_cm, "extinction_at_excitation_per_M_cm"))
            object.__setattr__(self, "extinction_at_excitation_per_M_cm", eps)
        if self.emission is not None:
            if not isinstance(self.emission, Spectrum):
                raise TypeError(f"emission: expected a Spectrum, got {type(self.emission).__name__}")
            if self.emission.kind != "emission":
                raise input_error("emission", f"spectrum {self.emission.name!r} has kind {self.emission.kind!r}",
                                  "read it with kind='emission'")
        if not self.name:
            object.__setattr__(self, "name", f"{self.material} {self.emission_peak_nm:g} nm")

    @property
    def kind(self) -> str:
        """``"sized"`` or ``"typical"``."""
        return str(_entry(self.material)["kind"])

    @property
    def heavy_metal(self) -> str | None:
        """``"Cd"``, ``"Pb"`` or None."""
        return _entry(self.material)["heavy_metal"] or None

    @property
    def caution(self) -> str:
        """The material's handling caution."""
        return str(_entry(self.material)["caution"])

    @property
    def exciton_peak_nm(self) -> float:
        """First-exciton absorption peak (nm), from the emission peak and the Stokes shift."""
        return float(exciton_peak_from_emission_nm(self.material, self.emission_peak_nm))

    @property
    def diameter_nm(self) -> float | None:
        """Diameter (nm) from the sizing curve; None for materials without sizing."""
        if self.kind != "sized":
            return None
        return float(diameter_nm(self.material, self.exciton_peak_nm))

    def emission_per_nm(self, wavelength_nm) -> np.ndarray:
        """Emission spectral density (1/nm, unit area) at the wavelengths (nm), any shape."""
        if self.emission is not None:
            return self.emission.normalised("area").values_at(wavelength_nm)
        return emission_spectrum_per_nm(wavelength_nm, self.emission_peak_nm, self.fwhm_nm)

    def molar_extinction_per_M_cm(self, excitation_wavelength_nm):
        """epsilon (M^-1 cm^-1) at the excitation wavelength(s) (nm).

        The override if given; else :func:`molar_extinction_at` for sized materials; else
        the material's typical value above its gap, with an
        :class:`~probeplan.errors.AssumptionWarning`.
        """
        lam = as_wavelengths_nm(excitation_wavelength_nm, name="excitation_wavelength_nm")
        if self.extinction_at_excitation_per_M_cm is not None:
            return _out(np.full(lam.shape, self.extinction_at_excitation_per_M_cm))
        if self.kind == "sized":
            return molar_extinction_at(self.material, self.diameter_nm, lam)
        peak = self.exciton_peak_nm
        if np.any(lam > peak):
            raise input_error("excitation_wavelength_nm", f"{lam.max():g} nm is longer than the {self.material} "
                              f"absorption edge (about {peak:.0f} nm)",
                              "excite at a shorter wavelength, or pass extinction_at_excitation_per_M_cm")
        eps = _value(_entry(self.material), "typical_extinction_per_M_cm")
        warn_at_caller(
            f"{self.name}: {self.material} has no sizing; using a typical epsilon of {eps:.3g} M^-1 cm^-1 "
            "(order of magnitude); pass extinction_at_excitation_per_M_cm measured for your probe",
            AssumptionWarning)
        return _out(np.full(lam.shape, float(eps)))

    def brightness(self, excitation_wavelength_nm):
        """Brightness epsilon(lambda_exc) x QY, M^-1 cm^-1."""
        return _out(np.asarray(self.molar_extinction_per_M_cm(excitation_wavelength_nm)) * self.quantum_yield)


_OVERRIDES = ("fwhm_nm", "quantum_yield", "name", "extinction_at_excitation_per_M_cm", "emission")


def make_probe(material: str, emission_peak_nm: float, **overrides: Any) -> Probe:
    """A :class:`Probe` with the material's typical width and quantum yield unless overridden.

    Parameters
    ----------
    material : str
        Material name; an unknown one is refused with the closest match.
    emission_peak_nm : float
        Emission peak, nm; must lie in :func:`emission_range_nm`.
    **overrides
        Any of ``fwhm_nm``, ``quantum_yield``, ``name``,
        ``extinction_at_excitation_per_M_cm``, ``emission``.

    Raises
    ------
    InputError
        Unknown material or override, peak outside the material's emission range.

    Examples
    --------
    >>> make_probe("CdSe", 600, quantum_yield=0.6).fwhm_nm
    30.0
    >>> make_probe("CdSe", 900)
    Traceback (most recent call last):
    ...
    probeplan.errors.InputError: emission_peak_nm: 900 nm is outside the CdSe emission range 455-660 nm; ...
    """
    name = _canonical(material)
    for key in overrides:
        if key not in _OVERRIDES:
            raise input_error("make_probe", f"unknown setting {key!r}", did_you_mean(key, _OVERRIDES))
    peak = float(as_wavelengths_nm(emission_peak_nm, name="emission_peak_nm"))
    lo, hi = emission_range_nm(name)
    if not lo <= peak <= hi:
        raise input_error("emission_peak_nm", f"{peak:g} nm is outside the {name} emission range {lo:.0f}-{hi:.0f} nm",
                          "choose a peak in that range or another material")
    entry = _entry(name)
    fields = {"fwhm_nm": float(_value(entry, "fwhm_nm")), "quantum_yield": float(_value(entry, "quantum_yield"))}
    fields.update(overrides)
    return Probe(name, peak, **fields)


def list_materials() -> list[dict[str, Any]]:
    """One dict per material: name, kind, emission_range_nm, heavy_metal, source and typical values.

    Examples
    --------
    >>> rows = list_materials()
    >>> [r["name"] for r in rows if r["heavy_metal"] == "Pb"]
    ['PbS', 'PbSe']
    """
    rows = []
    for name, entry in _load_materials().items():
        rows.append({
            "name": name,
            "kind": entry["kind"],
            "emission_range_nm": tuple(round(x, 1) for x in emission_range_nm(name)),
            "heavy_metal": entry["heavy_metal"] or None,
            "source": _source_text(entry),
            "description": entry["description"],
            "fwhm_nm": _value(entry, "fwhm_nm"),
            "quantum_yield": _value(entry, "quantum_yield"),
            "stokes_shift_meV": _value(entry, "stokes_shift_meV"),
            "caution": entry["caution"],
        })
    return rows


# --------------------------------------------------------------------------- doses


def dose_volume_ul(dose_nmol_per_kg, body_mass_g, stock_uM):
    """Injection volume (uL) that delivers a dose (nmol of dots per kg) from a stock (uM).

    Parameters
    ----------
    dose_nmol_per_kg : array_like
        Dose, nmol of dots per kg body mass, > 0.
    body_mass_g : array_like
        Body mass, g, > 0.
    stock_uM : array_like
        Stock concentration of dots, uM, > 0.

    Returns
    -------
    float or ndarray
        Volume in uL (broadcast shape).

    Raises
    ------
    InputError
        A value <= 0, NaN or inf (named).

    Notes
    -----
    n = dose x mass / ``G_PER_KG`` (nmol); a stock of c uM holds c nmol/mL, so
    V = n / c mL = ``UL_PER_ML`` n / c uL.  Check the volume against the institution's
    injection limits (:mod:`probeplan.study.safety`); research use only.

    Examples
    --------
    >>> dose_volume_ul(100, 25, 2)
    1250.0
    """
    dose = _as_positive(dose_nmol_per_kg, "dose_nmol_per_kg")
    mass = _as_positive(body_mass_g, "body_mass_g")
    stock = _as_positive(stock_uM, "stock_uM")
    return _out(dose * mass / G_PER_KG / stock * UL_PER_ML)


def dose_nmol_per_kg(volume_ul, body_mass_g, stock_uM):
    """Dose (nmol/kg) delivered by injecting a volume (uL) of a stock (uM); inverse of :func:`dose_volume_ul`.

    Parameters
    ----------
    volume_ul : array_like
        Injected volume, uL, > 0.
    body_mass_g, stock_uM : array_like
        As :func:`dose_volume_ul`.

    Returns
    -------
    float or ndarray
        Dose in nmol/kg.

    Examples
    --------
    >>> dose_nmol_per_kg(1250, 25, 2)
    100.0
    """
    volume = _as_positive(volume_ul, "volume_ul")
    mass = _as_positive(body_mass_g, "body_mass_g")
    stock = _as_positive(stock_uM, "stock_uM")
    return _out(volume / UL_PER_ML * stock / (mass / G_PER_KG))
