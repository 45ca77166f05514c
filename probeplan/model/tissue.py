"""Tissue optical properties from composition: absorption μa(λ) and reduced scattering μs′(λ).

Absorption (Jacques 2013, eq. 12)::

    μa = B·S·μa,HbO2 + B·(1−S)·μa,Hb + W·μa,water + F·μa,fat + M·μa,melanosome

with whole-blood μa of each haemoglobin form from its molar extinction ε
(decadic, cm⁻¹ M⁻¹): μa = ln(10)·ε·c, c = 150 g/L ÷ 64 500 g/mol (Prahl's
conversion; Jacques uses 64 458 g/mol — this module uses 64 500, as the shipped
table's compilation does).

Reduced scattering: the power law μs′ = a·(λ/500 nm)^−b (default), or the
Rayleigh + Mie form μs′ = a′·[f_Ray·(λ/500)^−4 + (1−f_Ray)·(λ/500)^−b_Mie]
(Jacques 2013, eqs. 2 and 3), chosen with ``scattering_model=``.

Choices where the published tables stop
---------------------------------------
* Haemoglobin beyond 1000 nm: the shipped table ends at 1000 nm.  Between 1000
  and 2000 nm its extinction is **held at the 1000 nm value**, with an
  :class:`~probeplan.errors.AssumptionWarning`.  Haemoglobin absorption falls
  beyond 1000 nm, so this overestimates μa (a conservative choice for
  planning); in the 1000–1700 nm window water dominates tissue absorption.
* Fat: no verified fat absorption table is shipped.  A composition with a fat
  fraction above zero is refused unless the user supplies a fat absorption
  spectrum (``fat_absorption=``, a :class:`~probeplan.model.spectra.Spectrum`, cm⁻¹).
* Melanosome: μa = 519·(λ/500 nm)^−3 cm⁻¹ (Jacques 2013), used 350–1300 nm.
"""

from __future__ import annotations

import functools
import math
import tomllib
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field, fields, replace
from importlib import resources
from typing import Any

import numpy as np

from probeplan.errors import AssumptionWarning, input_error
from probeplan.model.spectra import Spectrum, as_wavelengths_nm

__all__ = [
    "Tissue",
    "optical_properties",
    "molar_extinction",
    "absorption",
    "tissue_preset",
    "preset_names",
    "chromophore_names",
    "load_table",
    "HEMOGLOBIN_G_PER_L",
    "HEMOGLOBIN_G_PER_MOL",
    "SCATTERING_REFERENCE_NM",
    "SCATTERING_MODELS",
]

#: Haemoglobin concentration of whole blood (g/L), Prahl's conversion.
HEMOGLOBIN_G_PER_L = 150.0
#: Molar mass of haemoglobin (g/mol) used with the shipped table (Prahl; Jacques uses 64 458).
HEMOGLOBIN_G_PER_MOL = 64500.0
#: Reference wavelength of the scattering power laws (nm), Jacques 2013.
SCATTERING_REFERENCE_NM = 500.0
#: Natural log of 10: converts decadic extinction to a natural absorption coefficient.
LN10 = math.log(10.0)
#: Last wavelength of the haemoglobin table (nm); beyond it extinction is held (see module notes).
_HB_TABLE_END_NM = 1000.0
#: Furthest wavelength to which the held haemoglobin value is used (nm).
_HB_HOLD_LIMIT_NM = 2000.0
#: Range over which the melanosome formula is used (nm).
_MELANOSOME_RANGE_NM = (350.0, 1300.0)

_CITE_HB = (
    "S. Prahl's compilation of W. B. Gratzer and N. Kollias, Oregon Medical Laser Center (1999)"
)
_CITE_WATER = "D. J. Segelstein, M.S. thesis, University of Missouri-Kansas City (1981), tabulated by S. Prahl"
_CITE_MEL = "S. L. Jacques, Phys. Med. Biol. 58, R37 (2013), doi:10.1088/0031-9155/58/11/R37"


# --------------------------------------------------------------------------- shipped tables


@functools.cache
def _read_tsv(filename: str) -> tuple[tuple[str, ...], np.ndarray, str]:
    text = resources.files("probeplan.data").joinpath(filename).read_text(encoding="utf-8")
    header: tuple[str, ...] = ()
    provenance: list[str] = []
    rows: list[list[float]] = []
    for line in text.splitlines():
        if line.startswith("#"):
            provenance.append(line.lstrip("# ").rstrip())
        elif not header:
            header = tuple(line.split("\t"))
        elif line.strip():
            rows.append([float(v) for v in line.split("\t")])
    data = np.array(rows, dtype=np.float64)
    data.setflags(write=False)
    return header, data, " ".join(provenance)


def load_table(filename: str) -> tuple[tuple[str, ...], np.ndarray, str]:
    """Load a shipped tab-separated table: (column names, data copy, provenance text).

    Examples
    --------
    >>> cols, data, prov = load_table("water_absorption.tsv")
    >>> cols
    ('wavelength_nm', 'mu_a_per_cm')
    >>> "Segelstein" in prov
    True
    """
    header, data, provenance = _read_tsv(filename)
    return header, data.copy(), provenance


@functools.cache
def _chromophore_spectra() -> dict[str, Spectrum]:
    hb_cols, hb, hb_prov = _read_tsv("hemoglobin_molar_extinction.tsv")
    w_cols, water, w_prov = _read_tsv("water_absorption.tsv")
    return {
        "HbO2": Spectrum(hb[:, 0], hb[:, hb_cols.index("HbO2")], "HbO2", "cm^-1 M^-1", "material", hb_prov),
        "Hb": Spectrum(hb[:, 0], hb[:, hb_cols.index("Hb")], "Hb", "cm^-1 M^-1", "material", hb_prov),
        "water": Spectrum(water[:, 0], water[:, 1], "water", "cm^-1", "material", w_prov),
    }


_CHROMOPHORES = {
    "HbO2": ("oxyhaemoglobin, whole blood at 150 g/L (cm^-1); molar extinction via molar_extinction()", _CITE_HB),
    "Hb": ("deoxyhaemoglobin, whole blood at 150 g/L (cm^-1); molar extinction via molar_extinction()", _CITE_HB),
    "water": ("pure liquid water (cm^-1), 200-2000 nm", _CITE_WATER),
    "melanosome": ("melanosome interior, 519 (lambda/500 nm)^-3 cm^-1, 350-1300 nm", _CITE_MEL),
}


def chromophore_names() -> dict[str, tuple[str, str]]:
    """Chromophores with shipped absorption: name → (description, source)."""
    return dict(_CHROMOPHORES)


def _did_you_mean(name: str, choices) -> str:
    from probeplan.catalog.library import did_you_mean

    return did_you_mean(name, choices)


def molar_extinction(chromophore: str, wavelength_nm) -> np.ndarray:
    """Molar extinction coefficient of haemoglobin (decadic), cm⁻¹ M⁻¹.

    Parameters
    ----------
    chromophore : {"HbO2", "Hb"}
        Oxy- or deoxyhaemoglobin.
    wavelength_nm : array_like
        Wavelengths (nm), any shape; 250–2000 nm.

    Returns
    -------
    ndarray
        ε(λ), the shape of ``wavelength_nm``.  Linear interpolation of the table.

    Raises
    ------
    InputError
        Unknown chromophore, or a wavelength below 250 nm or above 2000 nm.

    Warns
    -----
    AssumptionWarning
        Beyond 1000 nm, where the value is held at the 1000 nm figure.

    References
    ----------
    S. Prahl, "Tabulated molar extinction coefficient for hemoglobin in water",
    Oregon Medical Laser Center (1999), compiling W. B. Gratzer and N. Kollias.

    Examples
    --------
    >>> float(molar_extinction("HbO2", 800.0)), float(molar_extinction("Hb", 650.0))
    (816.0, 3750.12)
    """
    if chromophore not in ("HbO2", "Hb"):
        raise input_error("chromophore", f"got {chromophore!r}", _did_you_mean(chromophore, ("HbO2", "Hb")))
    wl = as_wavelengths_nm(wavelength_nm)
    spec = _chromophore_spectra()[chromophore]
    if np.any(wl > _HB_HOLD_LIMIT_NM):
        raise input_error(
            "wavelength_nm",
            f"{wl.max():g} nm is beyond {_HB_HOLD_LIMIT_NM:g} nm",
            f"haemoglobin is covered for {spec.range_nm[0]:g}-{_HB_HOLD_LIMIT_NM:g} nm",
        )
    beyond = wl > _HB_TABLE_END_NM
    if np.any(beyond):
        warnings.warn(
            f"haemoglobin extinction beyond {_HB_TABLE_END_NM:g} nm is held at its {_HB_TABLE_END_NM:g} nm value "
            "(the table ends there; this overestimates blood absorption, a conservative approximation)",
            AssumptionWarning,
            stacklevel=2,
        )
    return spec.values_at(np.minimum(wl, _HB_TABLE_END_NM))


def absorption(chromophore: str, wavelength_nm) -> np.ndarray:
    """Absorption coefficient of a pure chromophore (natural log), cm⁻¹.

    Parameters
    ----------
    chromophore : {"water", "melanosome", "HbO2", "Hb"}
        ``"water"``: pure water (Segelstein 1981), 200–2000 nm.
        ``"melanosome"``: 519·(λ/500)^−3 (Jacques 2013), 350–1300 nm.
        ``"HbO2"``, ``"Hb"``: whole blood at 150 g/L, ln(10)·ε·150/64 500.
    wavelength_nm : array_like
        Wavelengths (nm), any shape.

    Returns
    -------
    ndarray
        μa(λ) in cm⁻¹.

    Raises
    ------
    InputError
        Unknown chromophore or a wavelength outside its table.

    Examples
    --------
    >>> round(float(absorption("water", 800.0)), 5)
    0.01964
    >>> round(float(absorption("melanosome", 500.0)), 1)
    519.0
    """
    if chromophore in ("HbO2", "Hb"):
        return LN10 * molar_extinction(chromophore, wavelength_nm) * HEMOGLOBIN_G_PER_L / HEMOGLOBIN_G_PER_MOL
    if chromophore == "water":
        return _chromophore_spectra()["water"].values_at(wavelength_nm)
    if chromophore == "melanosome":
        wl = as_wavelengths_nm(wavelength_nm)
        lo, hi = _MELANOSOME_RANGE_NM
        if np.any((wl < lo) | (wl > hi)):
            raise input_error("wavelength_nm", f"melanosome formula asked outside {lo:g}-{hi:g} nm", "stay in that range")
        return 519.0 * (wl / SCATTERING_REFERENCE_NM) ** -3.0
    raise input_error("chromophore", f"got {chromophore!r}", _did_you_mean(chromophore, _CHROMOPHORES))


# --------------------------------------------------------------------------- tissues


def _power_law(wl: np.ndarray, t: Tissue) -> np.ndarray:
    """Jacques 2013 eq. 2: μs′ = a·(λ/500 nm)^−b."""
    return t.a_per_cm * (wl / SCATTERING_REFERENCE_NM) ** (-t.b)


def _rayleigh_mie(wl: np.ndarray, t: Tissue) -> np.ndarray:
    """Jacques 2013 eq. 3: μs′ = a′·[f_Ray·(λ/500)^−4 + (1−f_Ray)·(λ/500)^−b_Mie]."""
    if t.a_prime_per_cm is None or t.f_ray is None or t.b_mie is None:
        raise input_error(
            f"tissue {t.name!r}",
            "has no Rayleigh + Mie parameters (a_prime_per_cm, f_ray, b_mie)",
            "use scattering_model='power' or give those three values",
        )
    x = wl / SCATTERING_REFERENCE_NM
    return t.a_prime_per_cm * (t.f_ray * x**-4.0 + (1.0 - t.f_ray) * x ** (-t.b_mie))


#: Scattering models by name (``scattering_model=``).
SCATTERING_MODELS = {"power": _power_law, "rayleigh_mie": _rayleigh_mie}

_FRACTIONS = ("blood_fraction", "saturation", "water_fraction", "fat_fraction", "melanin_fraction")


@dataclass(frozen=True)
class Tissue:
    """A tissue described by its composition and scattering.

    Parameters
    ----------
    name : str
        A label.
    blood_fraction, saturation, water_fraction, fat_fraction, melanin_fraction : float
        Volume fractions B, W, F, M and oxygen saturation S, each in [0, 1].
    a_per_cm, b : float
        Power-law scattering μs′ = a·(λ/500)^−b (cm⁻¹ at 500 nm, dimensionless).
    a_prime_per_cm, f_ray, b_mie : float, optional
        Rayleigh + Mie scattering parameters (Jacques 2013), when known.
    refractive_index : float
        Refractive index of the tissue (1.4, common practice).
    description : str
        What the preset stands for.
    sources : mapping
        Source of the scattering and of the composition values.
    fat_absorption : Spectrum, optional
        Fat absorption (cm⁻¹), required when ``fat_fraction > 0``.
    """

    name: str
    blood_fraction: float
    saturation: float
    water_fraction: float
    a_per_cm: float
    b: float
    fat_fraction: float = 0.0
    melanin_fraction: float = 0.0
    a_prime_per_cm: float | None = None
    f_ray: float | None = None
    b_mie: float | None = None
    refractive_index: float = 1.4
    description: str = ""
    sources: Mapping[str, str] = field(default_factory=dict, hash=False, compare=False)
    fat_absorption: Spectrum | None = field(default=None, hash=False, compare=False)

    def __post_init__(self) -> None:
        for key in (*_FRACTIONS, "a_per_cm", "b", "refractive_index"):
            value = getattr(self, key)
            if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
                raise TypeError(f"tissue {self.name!r}: {key} must be a number, got {value!r}")
            if not math.isfinite(float(value)):
                raise input_error(f"tissue {self.name!r}: {key}", f"got {value!r}", "give a finite number")
        for key in _FRACTIONS:
            value = float(getattr(self, key))
            if not 0.0 <= value <= 1.0:
                raise input_error(
                    f"tissue {self.name!r}: {key}",
                    f"got {value:g}, a fraction must lie in 0-1",
                    "give a fraction, not a percentage (e.g. 0.02 for 2 %)",
                )
        if self.blood_fraction + self.water_fraction + self.fat_fraction + self.melanin_fraction > 1.0 + 1e-9:
            raise input_error(
                f"tissue {self.name!r}",
                "blood + water + fat + melanin fractions exceed 1",
                "reduce the volume fractions so they sum to at most 1",
            )
        if self.a_per_cm <= 0 or self.b < 0:
            raise input_error(
                f"tissue {self.name!r}: a_per_cm/b", f"got a={self.a_per_cm:g}, b={self.b:g}", "need a > 0 and b >= 0"
            )
        if not 1.0 <= self.refractive_index <= 2.0:
            raise input_error(
                f"tissue {self.name!r}: refractive_index", f"got {self.refractive_index:g}", "tissue is about 1.33-1.5"
            )
        if self.fat_fraction > 0 and self.fat_absorption is None:
            raise input_error(
                f"tissue {self.name!r}: fat_fraction",
                f"is {self.fat_fraction:g} but no fat absorption table is shipped",
                "set fat_fraction = 0, or supply fat_absorption (a cm^-1 spectrum, e.g. from your library folder)",
            )

    def with_composition(self, **changes: Any) -> Tissue:
        """A copy with some fields changed (validated again)."""
        valid = {f.name for f in fields(self)}
        for key in changes:
            if key not in valid:
                raise input_error(f"tissue {self.name!r}", f"unknown field {key!r}", _did_you_mean(key, sorted(valid)))
        return replace(self, **changes)

    def mu_a_per_cm(self, wavelength_nm) -> np.ndarray:
        """Absorption coefficient μa(λ), cm⁻¹ (Jacques 2013, eq. 12)."""
        wl = as_wavelengths_nm(wavelength_nm)
        mu_a = np.zeros_like(wl)
        if self.blood_fraction > 0:
            blood = self.saturation * absorption("HbO2", wl) + (1.0 - self.saturation) * absorption("Hb", wl)
            mu_a = mu_a + self.blood_fraction * blood
        if self.water_fraction > 0:
            mu_a = mu_a + self.water_fraction * absorption("water", wl)
        if self.fat_fraction > 0 and self.fat_absorption is not None:
            mu_a = mu_a + self.fat_fraction * self.fat_absorption.values_at(wl)
        if self.melanin_fraction > 0:
            mu_a = mu_a + self.melanin_fraction * absorption("melanosome", wl)
        return mu_a

    def mu_s_prime_per_cm(self, wavelength_nm, *, scattering_model: str = "power") -> np.ndarray:
        """Reduced scattering coefficient μs′(λ), cm⁻¹, by ``scattering_model`` (see SCATTERING_MODELS)."""
        wl = as_wavelengths_nm(wavelength_nm)
        try:
            model = SCATTERING_MODELS[scattering_model]
        except KeyError:
            raise input_error(
                "scattering_model", f"got {scattering_model!r}", _did_you_mean(scattering_model, SCATTERING_MODELS)
            ) from None
        return model(wl, self)


@functools.cache
def _presets() -> dict[str, dict[str, Any]]:
    text = resources.files("probeplan.data").joinpath("tissues.toml").read_text(encoding="utf-8")
    return tomllib.loads(text)


def preset_names() -> list[str]:
    """Names of the shipped tissue presets."""
    return list(_presets())


def _tissue_from_mapping(name: str, entry: Mapping[str, Any]) -> Tissue:
    keys = {f.name for f in fields(Tissue)} - {"name", "sources", "fat_absorption", "description"}
    kwargs = {k: entry[k] for k in keys if k in entry}
    sources = {k: str(entry[k]) for k in ("scattering_source", "composition_source") if k in entry}
    return Tissue(name=name, description=str(entry.get("description", "")), sources=sources, **kwargs)


def tissue_preset(name: str) -> Tissue:
    """A shipped tissue preset by name (``"skin"``, ``"soft tissue"``, ``"mouse muscle"``, …).

    User tissues from the library folder are found through :func:`probeplan.catalog.library.lookup`.

    Raises
    ------
    InputError
        Unknown name, with the closest valid name.

    Examples
    --------
    >>> tissue_preset("skin").a_per_cm
    46.0
    """
    from probeplan.catalog import library

    presets = _presets()
    if name in presets:
        return _tissue_from_mapping(name, presets[name])
    user_names = library.user_tissue_names()
    if name in user_names:
        return library.user_tissue(name)
    raise input_error("tissue", f"unknown tissue {name!r}", _did_you_mean(name, [*presets, *user_names]))


def optical_properties(
    tissue: str | Tissue, wavelength_nm, *, scattering_model: str = "power"
) -> tuple[np.ndarray, np.ndarray]:
    """Absorption and reduced scattering coefficients of a tissue.

    Parameters
    ----------
    tissue : str or Tissue
        A preset name (see :func:`preset_names`) or a :class:`Tissue`.
    wavelength_nm : array_like
        Wavelengths (nm), any shape.
    scattering_model : {"power", "rayleigh_mie"}
        Scattering model (Jacques 2013 eqs. 2, 3).

    Returns
    -------
    mu_a_per_cm, mu_s_prime_per_cm : ndarray
        Arrays of the shape of ``wavelength_nm``, cm⁻¹.

    References
    ----------
    S. L. Jacques, "Optical properties of biological tissues: a review",
    Phys. Med. Biol. 58, R37 (2013), doi:10.1088/0031-9155/58/11/R37.

    Examples
    --------
    >>> mu_a, mu_sp = optical_properties("skin", [650.0, 800.0])
    >>> [round(float(v), 2) for v in mu_sp]
    [31.68, 23.59]
    """
    if isinstance(tissue, str):
        tissue = tissue_preset(tissue)
    elif not isinstance(tissue, Tissue):
        raise TypeError(f"tissue: expected a preset name or a Tissue, got {type(tissue).__name__}")
    return tissue.mu_a_per_cm(wavelength_nm), tissue.mu_s_prime_per_cm(wavelength_nm, scattering_model=scattering_model)
