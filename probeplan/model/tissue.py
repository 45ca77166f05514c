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
* Whole blood (``"blood"``, and the blood term of every tissue) includes
  blood's own water.  Below 1000 nm: haemoglobin at 150 g/L from Prahl's
  table (ln(10)·ε·c) plus water at :data:`BLOOD_WATER_FRACTION` of the
  shipped water table.  From 1000 nm to 1800 nm: the compiled whole-blood
  spectra of Bosschaart et al. 2014 (haematocrit 45 %, water included),
  oxygenated and deoxygenated, mixed linearly by saturation.  The two meet at
  1000 nm with a step (shown in ``docs/tissue_optics_beyond_1000nm.md``);
  beyond 1800 nm blood is refused.  Haemoglobin alone (``"HbO2"``, ``"Hb"``,
  :func:`molar_extinction`) stops at 1000 nm, where its table ends: asked
  beyond, it is refused (whole blood beyond 1000 nm is ``"blood"``).
* The water fraction W of a tissue is the water outside its blood: the blood
  fraction B brings its own water.
* Fat: mammalian fat of van Veen et al. 2005, 429–1098 nm.  No published fat
  table covering 1098–1700 nm could be found and confirmed, so a tissue with a
  fat fraction above zero is refused outside 429–1098 nm unless the user
  supplies a fat absorption spectrum (``fat_absorption=``, cm⁻¹) that covers
  the wavelengths asked.
* Melanosome: μa = 519·(λ/500 nm)^−3 cm⁻¹ (Jacques 2013), used 350–1300 nm.
"""

from __future__ import annotations

import functools
import math
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field, fields, replace
from importlib import resources
from typing import Any

import numpy as np

from probeplan.errors import ScatteringRangeWarning, did_you_mean, input_error, warn_at_caller
from probeplan.model.spectra import Spectrum, as_wavelengths_nm
from probeplan.units import CM_PER_M, MM_PER_CM

__all__ = [
    "Tissue",
    "optical_properties",
    "molar_extinction",
    "absorption",
    "tissue_preset",
    "tissue_from_mapping",
    "as_tissue",
    "preset_names",
    "chromophore_names",
    "load_table",
    "HEMOGLOBIN_G_PER_L",
    "HEMOGLOBIN_G_PER_MOL",
    "SCATTERING_REFERENCE_NM",
    "SCATTERING_MODELS",
    "SCATTERING_EXTRAPOLATION_RULE",
    "MU_S_PRIME_FLOOR_PER_CM",
    "BLOOD_WATER_FRACTION",
]

#: Haemoglobin concentration of whole blood (g/L), Prahl's conversion.
HEMOGLOBIN_G_PER_L = 150.0
#: Molar mass of haemoglobin (g/mol) used with the shipped table (Prahl; Jacques uses 64 458).
HEMOGLOBIN_G_PER_MOL = 64500.0
#: Reference wavelength of the scattering power laws (nm), Jacques 2013.
SCATTERING_REFERENCE_NM = 500.0
#: Natural log of 10: converts decadic extinction to a natural absorption coefficient.
LN10 = math.log(10.0)
#: Last wavelength of the haemoglobin table (nm); whole blood beyond it comes from the whole-blood table.
_HB_TABLE_END_NM = 1000.0
#: Water volume fraction of whole blood, added to haemoglobin below 1000 nm (about 80 %: common
#: practice, plasma is about 92 % water and red cells about 65-70 %; from memory, not a measured table).
BLOOD_WATER_FRACTION = 0.80
#: Range over which the melanosome formula is used (nm).
_MELANOSOME_RANGE_NM = (350.0, 1300.0)

_CITE_HB = (
    "S. Prahl's compilation of W. B. Gratzer and N. Kollias, Oregon Medical Laser Center (1999)"
)
_CITE_WATER = "D. J. Segelstein, M.S. thesis, University of Missouri-Kansas City (1981), tabulated by S. Prahl"
_CITE_MEL = "S. L. Jacques, Phys. Med. Biol. 58, R37 (2013), doi:10.1088/0031-9155/58/11/R37"
_CITE_BLOOD = (
    "below 1000 nm: Prahl's haemoglobin table + water at the blood's water fraction; 1000-1800 nm: "
    "N. Bosschaart et al., Lasers Med. Sci. 29, 453 (2014), doi:10.1007/s10103-013-1446-7, appendix"
)
_CITE_FAT = "R. L. P. van Veen et al., J. Biomed. Opt. 10, 054004 (2005), as tabulated by S. Prahl (429-1098 nm)"


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
    b_cols, blood, b_prov = _read_tsv("blood_absorption.tsv")
    f_cols, fat, f_prov = _read_tsv("fat_absorption.tsv")
    return {
        "blood_oxy": Spectrum(blood[:, 0], blood[:, b_cols.index("mu_a_oxy_per_mm")] * MM_PER_CM,
                              "whole blood, oxygenated", "cm^-1", "material", b_prov),
        "blood_deoxy": Spectrum(blood[:, 0], blood[:, b_cols.index("mu_a_deoxy_per_mm")] * MM_PER_CM,
                                "whole blood, deoxygenated", "cm^-1", "material", b_prov),
        "fat": Spectrum(fat[:, 0], fat[:, f_cols.index("mu_a_per_m")] / CM_PER_M, "fat", "cm^-1", "material", f_prov),
        "HbO2": Spectrum(hb[:, 0], hb[:, hb_cols.index("HbO2")], "HbO2", "cm^-1 M^-1", "material", hb_prov),
        "Hb": Spectrum(hb[:, 0], hb[:, hb_cols.index("Hb")], "Hb", "cm^-1 M^-1", "material", hb_prov),
        "water": Spectrum(water[:, 0], water[:, 1], "water", "cm^-1", "material", w_prov),
    }


_CHROMOPHORES = {
    "HbO2": ("oxyhaemoglobin, whole blood at 150 g/L (cm^-1); molar extinction via molar_extinction()", _CITE_HB),
    "Hb": ("deoxyhaemoglobin, whole blood at 150 g/L (cm^-1); molar extinction via molar_extinction()", _CITE_HB),
    "water": ("pure liquid water (cm^-1), 200-2000 nm", _CITE_WATER),
    "blood": ("whole blood at 45 % haematocrit incl. its water (cm^-1), 250-1800 nm; keyword saturation=",
              _CITE_BLOOD),
    "fat": ("mammalian fat (cm^-1), 429-1098 nm; refused beyond (no published table shipped)", _CITE_FAT),
    "melanosome": ("melanosome interior, 519 (lambda/500 nm)^-3 cm^-1, 350-1300 nm", _CITE_MEL),
}


def chromophore_names() -> dict[str, tuple[str, str]]:
    """Chromophores with shipped absorption: name → (description, source)."""
    return dict(_CHROMOPHORES)


def molar_extinction(chromophore: str, wavelength_nm) -> np.ndarray:
    """Molar extinction coefficient of haemoglobin (decadic), cm⁻¹ M⁻¹.

    Parameters
    ----------
    chromophore : {"HbO2", "Hb"}
        Oxy- or deoxyhaemoglobin.
    wavelength_nm : array_like
        Wavelengths (nm), any shape; 250–1000 nm.

    Returns
    -------
    ndarray
        ε(λ), the shape of ``wavelength_nm``.  Linear interpolation of the table.

    Raises
    ------
    InputError
        Unknown chromophore, or a wavelength outside 250–1000 nm (the table's
        range; whole blood beyond 1000 nm is ``absorption("blood", ...)``).

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
        raise input_error("chromophore", f"got {chromophore!r}", did_you_mean(chromophore, ("HbO2", "Hb")))
    wl = as_wavelengths_nm(wavelength_nm)
    if np.any(wl > _HB_TABLE_END_NM):
        raise input_error(
            f"{chromophore} wavelength_nm",
            f"{wl.max():g} nm is beyond the haemoglobin table's end at {_HB_TABLE_END_NM:g} nm",
            'for whole blood (with its water) to 1800 nm use absorption("blood", wavelength_nm, saturation=...)',
        )
    return _chromophore_spectra()[chromophore].values_at(wl)


def _blood_per_cm(wl: np.ndarray, saturation: float) -> np.ndarray:
    """Whole blood at 45 % haematocrit with its water (cm⁻¹); see the module notes for the sources."""
    spectra = _chromophore_spectra()
    lo = spectra["HbO2"].range_nm[0]
    hi = spectra["blood_oxy"].range_nm[1]
    if np.any((wl < lo) | (wl > hi)):
        bad = wl[(wl < lo) | (wl > hi)].flat[0]
        raise input_error(
            "blood wavelength_nm",
            f"asked at {bad:g} nm; whole-blood absorption is shipped for {lo:g}-{hi:g} nm",
            "stay inside that range",
        )
    out = np.empty_like(wl)
    low = wl < _HB_TABLE_END_NM
    if np.any(low):
        w = wl[low]
        hb = saturation * spectra["HbO2"].values_at(w) + (1.0 - saturation) * spectra["Hb"].values_at(w)
        out[low] = (LN10 * hb * HEMOGLOBIN_G_PER_L / HEMOGLOBIN_G_PER_MOL
                    + BLOOD_WATER_FRACTION * spectra["water"].values_at(w))
    if np.any(~low):
        w = wl[~low]
        out[~low] = (saturation * spectra["blood_oxy"].values_at(w)
                     + (1.0 - saturation) * spectra["blood_deoxy"].values_at(w))
    return out


def absorption(chromophore: str, wavelength_nm, *, saturation: float = 1.0) -> np.ndarray:
    """Absorption coefficient of a chromophore (natural log), cm⁻¹.

    Parameters
    ----------
    chromophore : {"blood", "water", "fat", "melanosome", "HbO2", "Hb"}
        ``"blood"``: whole blood at 45 % haematocrit including its water,
        250–1800 nm (module notes: Prahl + water below 1000 nm, Bosschaart
        et al. 2014 from 1000 nm).
        ``"water"``: pure water (Segelstein 1981), 200–2000 nm.
        ``"fat"``: mammalian fat (van Veen et al. 2005), 429–1098 nm; refused
        outside (no published table beyond 1098 nm is shipped).
        ``"melanosome"``: 519·(λ/500)^−3 (Jacques 2013), 350–1300 nm.
        ``"HbO2"``, ``"Hb"``: haemoglobin alone at 150 g/L, ln(10)·ε·150/64 500,
        250–1000 nm.
    wavelength_nm : array_like
        Wavelengths (nm), any shape.
    saturation : float
        Oxygen saturation of ``"blood"`` in [0, 1] (ignored by the others).

    Returns
    -------
    ndarray
        μa(λ) in cm⁻¹.

    Raises
    ------
    InputError
        Unknown chromophore, a wavelength outside its table, or a saturation outside [0, 1].

    Examples
    --------
    >>> round(float(absorption("water", 800.0)), 5)
    0.01964
    >>> round(float(absorption("melanosome", 500.0)), 1)
    519.0
    >>> round(float(absorption("blood", 1300.0, saturation=1.0)), 2)
    1.9
    """
    if chromophore in ("HbO2", "Hb"):
        return LN10 * molar_extinction(chromophore, wavelength_nm) * HEMOGLOBIN_G_PER_L / HEMOGLOBIN_G_PER_MOL
    if chromophore == "blood":
        s = float(saturation)
        if not 0.0 <= s <= 1.0:
            raise input_error("saturation", f"got {saturation!r}", "give a fraction in 0-1 (e.g. 0.75)")
        return _blood_per_cm(as_wavelengths_nm(wavelength_nm), s)
    if chromophore == "water":
        return _chromophore_spectra()["water"].values_at(wavelength_nm)
    if chromophore == "fat":
        return _fat_per_cm(as_wavelengths_nm(wavelength_nm), None, "fat")
    if chromophore == "melanosome":
        wl = as_wavelengths_nm(wavelength_nm)
        lo, hi = _MELANOSOME_RANGE_NM
        if np.any((wl < lo) | (wl > hi)):
            raise input_error("wavelength_nm", f"melanosome formula asked outside {lo:g}-{hi:g} nm", "stay in that range")
        return 519.0 * (wl / SCATTERING_REFERENCE_NM) ** -3.0
    raise input_error("chromophore", f"got {chromophore!r}", did_you_mean(chromophore, _CHROMOPHORES))


def _fat_per_cm(wl: np.ndarray, user: Spectrum | None, where: str) -> np.ndarray:
    """Fat absorption (cm⁻¹): the user's spectrum when given, else van Veen et al. 2005 (429–1098 nm)."""
    spec = user if user is not None else _chromophore_spectra()["fat"]
    lo, hi = spec.range_nm
    outside = (wl < lo) | (wl > hi)
    if np.any(outside):
        bad = wl[outside].flat[0]
        if user is not None:
            fix = "supply a fat spectrum that covers it, or set fat_fraction = 0"
        else:
            fix = ("the shipped fat table (van Veen et al. 2005) covers 429-1098 nm and no published fat table "
                   "beyond is shipped: stay inside it, set fat_fraction = 0, or supply a fat absorption spectrum "
                   "(column 'fat', cm^-1) in your library folder's spectra/absorption/")
        raise input_error(where, f"fat absorption asked at {bad:g} nm, outside {lo:g}-{hi:g} nm", fix)
    return spec.values_at(wl)


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

#: The stated rule for μs′ outside the wavelength range its source measured.
SCATTERING_EXTRAPOLATION_RULE = (
    "beyond the long end of the measured range, mu_s' continues from its value there as "
    "(lambda/lambda_end)^-b_Mie, b_Mie the Mie exponent of the tissue's class (Jacques 2013, eq. 2 and "
    "Table 2: the Rayleigh term falls as lambda^-4, so at long wavelengths the Mie term sets the slope); "
    "below the short end the tissue's own law continues"
)
#: Lowest μs′ (cm⁻¹) a tissue preset may give anywhere in 400-1700 nm: a transport mean free path of
#: 2 cm, the thickness of a mouse; below it a mouse would be nearly transparent, which no tissue is
#: (common practice: tissues are turbid throughout the visible to NIR-II).
MU_S_PRIME_FLOOR_PER_CM = 0.5

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
        B is whole blood with its own water; W is the water outside the blood.
    a_per_cm, b : float
        Power-law scattering μs′ = a·(λ/500)^−b (cm⁻¹ at 500 nm, dimensionless).
    a_prime_per_cm, f_ray, b_mie : float, optional
        Rayleigh + Mie scattering parameters (Jacques 2013), when known.
    refractive_index : float
        Refractive index of the tissue (1.4, common practice).
    scattering_range_nm : (float, float), optional
        Wavelength range (nm) over which the scattering source measured; outside
        it :data:`SCATTERING_EXTRAPOLATION_RULE` applies, with a warning.
    extrapolation_b : float, optional
        Mie exponent used beyond the range's long end (default ``b_mie``, else ``b``).
    description : str
        What the preset stands for.
    sources : mapping
        Source of the scattering and of the composition values.
    fat_absorption : Spectrum, optional
        Fat absorption (cm⁻¹) used instead of the shipped table (van Veen et al.
        2005, 429–1098 nm) when ``fat_fraction > 0``.
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
    scattering_range_nm: tuple[float, float] | None = None
    extrapolation_b: float | None = None
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
        if self.scattering_range_nm is not None:
            rng = tuple(float(v) for v in self.scattering_range_nm)
            if len(rng) != 2 or not all(math.isfinite(v) for v in rng) or not 0 < rng[0] < rng[1]:
                raise input_error(
                    f"tissue {self.name!r}: scattering_range_nm",
                    f"got {self.scattering_range_nm!r}",
                    "give [shortest, longest] wavelength (nm) the scattering source measured",
                )
            object.__setattr__(self, "scattering_range_nm", rng)
        if self.extrapolation_b is not None and not (math.isfinite(self.extrapolation_b) and self.extrapolation_b >= 0):
            raise input_error(f"tissue {self.name!r}: extrapolation_b", f"got {self.extrapolation_b!r}", "give b >= 0")
        if self.a_per_cm <= 0 or self.b < 0:
            raise input_error(
                f"tissue {self.name!r}: a_per_cm/b", f"got a={self.a_per_cm:g}, b={self.b:g}", "need a > 0 and b >= 0"
            )
        if not 1.0 <= self.refractive_index <= 2.0:
            raise input_error(
                f"tissue {self.name!r}: refractive_index", f"got {self.refractive_index:g}", "tissue is about 1.33-1.5"
            )

    def with_composition(self, **changes: Any) -> Tissue:
        """A copy with some fields changed (validated again)."""
        valid = {f.name for f in fields(self)}
        for key in changes:
            if key not in valid:
                raise input_error(f"tissue {self.name!r}", f"unknown field {key!r}", did_you_mean(key, sorted(valid)))
        return replace(self, **changes)

    def mu_a_per_cm(self, wavelength_nm) -> np.ndarray:
        """Absorption coefficient μa(λ), cm⁻¹ (Jacques 2013, eq. 12)."""
        wl = as_wavelengths_nm(wavelength_nm)
        mu_a = np.zeros_like(wl)
        if self.blood_fraction > 0:
            mu_a = mu_a + self.blood_fraction * _blood_per_cm(wl, float(self.saturation))
        if self.water_fraction > 0:
            mu_a = mu_a + self.water_fraction * absorption("water", wl)
        if self.fat_fraction > 0:
            mu_a = mu_a + self.fat_fraction * _fat_per_cm(wl, self.fat_absorption, f"tissue {self.name!r}: fat_fraction")
        if self.melanin_fraction > 0:
            mu_a = mu_a + self.melanin_fraction * absorption("melanosome", wl)
        return mu_a

    def mu_s_prime_per_cm(self, wavelength_nm, *, scattering_model: str = "power", warn: bool = True) -> np.ndarray:
        """Reduced scattering coefficient μs′(λ), cm⁻¹, by ``scattering_model`` (see SCATTERING_MODELS).

        Inside :attr:`scattering_range_nm` (the range the source measured) the law
        itself; outside it :data:`SCATTERING_EXTRAPOLATION_RULE`, with a
        :class:`~probeplan.errors.ScatteringRangeWarning` when ``warn``.  A tissue
        without a stated range is used as given (no check possible).
        """
        wl = as_wavelengths_nm(wavelength_nm)
        try:
            model = SCATTERING_MODELS[scattering_model]
        except KeyError:
            raise input_error(
                "scattering_model", f"got {scattering_model!r}", did_you_mean(scattering_model, SCATTERING_MODELS)
            ) from None
        mu_sp = model(wl, self)
        outside = self.scattering_outside(wl)
        if outside is None:
            return mu_sp
        lo, hi = self.scattering_range_nm  # type: ignore[misc]
        above = wl > hi
        if np.any(above):
            edge = model(np.array(hi), self)
            mu_sp = np.where(above, edge * (wl / hi) ** (-self.long_wavelength_b()), mu_sp)
        if warn:
            warn_at_caller(outside, ScatteringRangeWarning)
        return mu_sp

    def long_wavelength_b(self) -> float:
        """Exponent used beyond the measured range: ``extrapolation_b``, else ``b_mie``, else ``b``."""
        for value in (self.extrapolation_b, self.b_mie, self.b):
            if value is not None:
                return float(value)
        return float(self.b)

    def scattering_outside(self, wavelength_nm) -> str | None:
        """A one-line note when some wavelengths lie outside the scattering source's range, else None."""
        if self.scattering_range_nm is None:
            return None
        wl = as_wavelengths_nm(wavelength_nm)
        lo, hi = self.scattering_range_nm
        if not np.any((wl < lo) | (wl > hi)):
            return None
        return (f"tissue {self.name!r}: mu_s' asked at {float(wl.min()):g}-{float(wl.max()):g} nm, outside the "
                f"{lo:g}-{hi:g} nm its source measured; {SCATTERING_EXTRAPOLATION_RULE} "
                f"(b_Mie = {self.long_wavelength_b():g})")


@functools.cache
def _presets() -> dict[str, dict[str, Any]]:
    text = resources.files("probeplan.data").joinpath("tissues.toml").read_text(encoding="utf-8")
    return tomllib.loads(text)


def preset_names() -> list[str]:
    """Names of the shipped tissue presets."""
    return list(_presets())


def tissue_from_mapping(name: str, entry: Mapping[str, Any]) -> Tissue:
    """A :class:`Tissue` from the keys of a preset table (``probeplan/data/tissues.toml``) or a user file.

    Keys that are not tissue fields (``source``, ``description`` aside) are ignored.
    """
    keys = {f.name for f in fields(Tissue)} - {"name", "sources", "fat_absorption", "description"}
    kwargs = {k: entry[k] for k in keys if k in entry}
    sources = {k: str(entry[k]) for k in ("scattering_source", "composition_source", "scattering_range_source")
               if k in entry}
    if "scattering_range_nm" in kwargs:
        kwargs["scattering_range_nm"] = tuple(kwargs["scattering_range_nm"])
    return Tissue(name=name, description=str(entry.get("description", "")), sources=sources, **kwargs)


def tissue_preset(name: str) -> Tissue:
    """A shipped tissue preset by name (``"skin"``, ``"soft tissue"``, ``"mouse muscle"``, …).

    Only the shipped presets: a user's own tissues (the library folder) are
    resolved by :func:`probeplan.catalog.resolve.tissue`, which also accepts these names.

    Raises
    ------
    InputError
        Unknown name, with the closest valid name.

    Examples
    --------
    >>> tissue_preset("skin").a_per_cm
    46.0
    """
    presets = _presets()
    if name in presets:
        return tissue_from_mapping(name, presets[name])
    raise input_error("tissue", f"unknown tissue {name!r}", did_you_mean(name, list(presets)))


def as_tissue(tissue: Any) -> Tissue:
    """``tissue`` itself when it is a :class:`Tissue`; a name is refused with the way to resolve it.

    Model functions take objects: names (presets and the user's own tissues) are
    resolved at the edges by :func:`probeplan.catalog.resolve.tissue` (``probeplan.tissue``), or by the
    top-level functions of :mod:`probeplan`, which accept both.

    Raises
    ------
    TypeError
        For a name or anything else that is not a Tissue.
    """
    if isinstance(tissue, Tissue):
        return tissue
    if isinstance(tissue, str):
        raise TypeError(f"tissue: expected a Tissue, got the name {tissue!r}; resolve it first with "
                        f"probeplan.tissue({tissue!r}) (the top-level probeplan functions accept names)")
    raise TypeError(f"tissue: expected a Tissue, got {type(tissue).__name__}")


def optical_properties(
    tissue: Tissue, wavelength_nm, *, scattering_model: str = "power"
) -> tuple[np.ndarray, np.ndarray]:
    """Absorption and reduced scattering coefficients of a tissue.

    Parameters
    ----------
    tissue : Tissue
        The tissue (:func:`tissue_preset`; :func:`probeplan.optical_properties` also takes a name).
    wavelength_nm : array_like
        Wavelengths (nm), any shape.
    scattering_model : {"power", "rayleigh_mie"}
        Scattering model (Jacques 2013 eqs. 2, 3).

    Returns
    -------
    mu_a_per_cm, mu_s_prime_per_cm : ndarray
        Arrays of the shape of ``wavelength_nm``, cm⁻¹.

    Warns
    -----
    ScatteringRangeWarning
        Some wavelengths lie outside the range the tissue's scattering source
        measured; :data:`SCATTERING_EXTRAPOLATION_RULE` is applied there.

    References
    ----------
    S. L. Jacques, "Optical properties of biological tissues: a review",
    Phys. Med. Biol. 58, R37 (2013), doi:10.1088/0031-9155/58/11/R37.

    Examples
    --------
    >>> mu_a, mu_sp = optical_properties(tissue_preset("skin"), [650.0, 800.0])
    >>> [round(float(v), 2) for v in mu_sp]
    [31.68, 23.59]
    """
    tissue = as_tissue(tissue)
    mu_a = tissue.mu_a_per_cm(wavelength_nm)
    mu_sp = tissue.mu_s_prime_per_cm(wavelength_nm, scattering_model=scattering_model, warn=False)
    note = tissue.scattering_outside(wavelength_nm)
    if note is not None:
        warn_at_caller(note, ScatteringRangeWarning)
    return mu_a, mu_sp
