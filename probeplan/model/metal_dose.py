"""Heavy-metal dose of nanocrystal probes: mg of metal per kg beside nmol of dots per kg.

A dose in nmol of dots per kg hides how much metal goes in: the metal in one dot
grows with its volume, so across the sizes of one material the same nmol/kg
carries about a tenfold spread of metal.  This module turns a dot's size into
its metal mass:

    m_metal = Σ_parts ρ · V · w_metal,     V_core = π d³/6,
    V_shell = π ((d + 2t)³ − d³)/6,         w_metal = n_metal · A_metal / M_formula

(ρ the bulk lattice density, A the atomic weight, M the formula mass), and a dose
of D nmol/kg then carries D · 10⁻⁹ · N_A · m_metal g of metal per kg.  The dot is
a sphere of bulk density (common practice for such estimates; ligands, surface
and non-stoichiometry are left out).  Densities, formulas and atomic weights are
in ``probeplan/data/lattice.toml`` with their sources (CRC Handbook, IUPAC).

Worked check: CdSe (ρ 5.82 g/cm³, Cd 112.41 and Se 78.971 g/mol), 3 nm and 6 nm
cores at 100 nmol/kg carry 2.9 and 23.3 mg Cd/kg.
"""

from __future__ import annotations

import functools
import math
import tomllib
from importlib import resources
from typing import Any

from scipy.constants import N_A

from probeplan.errors import did_you_mean, input_error

__all__ = [
    "HEAVY_METALS",
    "compound_names",
    "metal_mass_per_dot_g",
    "heavy_metal_dose_mg_per_kg",
    "lattice_sources",
]

#: Metals counted as heavy metals for dose limits.
HEAVY_METALS = ("Cd", "Pb")
#: Cubic centimetres per cubic nanometre.
CM3_PER_NM3 = 1e-21
#: Moles per nanomole; milligrams per gram.
MOL_PER_NMOL = 1e-9
MG_PER_G = 1e3


@functools.cache
def _table() -> dict[str, Any]:
    text = resources.files("probeplan.data").joinpath("lattice.toml").read_text(encoding="utf-8")
    return tomllib.loads(text)


def compound_names() -> list[str]:
    """Core and shell compounds with a shipped density and formula."""
    return list(_table()["compounds"])


def lattice_sources() -> dict[str, str]:
    """compound → source of its density."""
    return {k: v["density_g_per_cm3"]["source"] for k, v in _table()["compounds"].items()}


def _compound(name: str, where: str) -> dict[str, Any]:
    compounds = _table()["compounds"]
    if name not in compounds:
        raise input_error(where, f"no lattice density shipped for {name!r}", did_you_mean(name, list(compounds)))
    return compounds[name]


def _metal_fractions(name: str, where: str) -> tuple[float, dict[str, float]]:
    """(density g/cm³, element → mass fraction) of a compound."""
    entry = _compound(name, where)
    weights = {k: float(v["value"]) for k, v in _table()["atomic_weight_g_per_mol"].items()}
    formula = {k: float(n) for k, n in entry["formula"].items()}
    mass = sum(n * weights[el] for el, n in formula.items())
    return float(entry["density_g_per_cm3"]["value"]), {el: n * weights[el] / mass for el, n in formula.items()}


def _positive(value, name: str, *, allow_zero: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise TypeError(f"{name}: expected a number, got {value!r}")
    v = float(value)
    if not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        raise input_error(name, f"got {value!r}", "give a finite positive number" + (" or 0" if allow_zero else ""))
    return v


def metal_mass_per_dot_g(material: str, diameter_nm: float, *, shell: str | None = None,
                         shell_thickness_nm: float = 0.0) -> dict[str, float]:
    """Mass (g) of each element in one dot: a core sphere and an optional shell.

    Parameters
    ----------
    material : str
        Core compound (``"CdSe"``, ``"CdTe"``, ``"CdS"``, ``"PbS"``, ``"PbSe"``).
    diameter_nm : float
        Core diameter, nm.
    shell : str, optional
        Shell compound (``"ZnS"``, ``"CdS"``, ``"ZnSe"``, ...).
    shell_thickness_nm : float
        Shell thickness, nm (0 without a shell).

    Returns
    -------
    dict
        element → grams in one dot.

    Examples
    --------
    >>> round(metal_mass_per_dot_g("CdSe", 3.0)["Cd"] * 1e20, 3)   # 4.83e-20 g of Cd
    4.833
    """
    d = _positive(diameter_nm, "diameter_nm")
    t = _positive(shell_thickness_nm, "shell_thickness_nm", allow_zero=True)
    if (shell is None) != (t == 0.0):
        raise input_error("shell", f"shell={shell!r} with shell_thickness_nm={t:g}",
                          "give both a shell compound and its thickness (nm), or neither")
    parts = [(material, math.pi / 6.0 * d**3)]
    if shell is not None:
        parts.append((shell, math.pi / 6.0 * ((d + 2.0 * t) ** 3 - d**3)))
    out: dict[str, float] = {}
    for name, volume_nm3 in parts:
        density, fractions = _metal_fractions(name, "shell" if name is shell else "material")
        grams = density * volume_nm3 * CM3_PER_NM3
        for element, w in fractions.items():
            out[element] = out.get(element, 0.0) + grams * w
    return out


def heavy_metal_dose_mg_per_kg(material: str, diameter_nm: float, dose_nmol_per_kg: float, *,
                               shell: str | None = None, shell_thickness_nm: float = 0.0) -> dict[str, float]:
    """mg of each heavy metal (Cd, Pb) per kg body mass delivered by a dose of dots (nmol/kg).

    ``dose · 10⁻⁹ mol/nmol · N_A · m_metal(dot) · 10³ mg/g`` (N_A from scipy.constants).

    Examples
    --------
    >>> {k: round(v, 2) for k, v in heavy_metal_dose_mg_per_kg("CdSe", 6.0, 100.0).items()}
    {'Cd': 23.28}
    >>> {k: round(v, 1) for k, v in heavy_metal_dose_mg_per_kg("PbS", 4.6, 10.0, shell="CdS",
    ...                                                          shell_thickness_nm=0.5).items()}
    {'Pb': 2.0, 'Cd': 0.9}
    """
    dose = _positive(dose_nmol_per_kg, "dose_nmol_per_kg", allow_zero=True)
    per_dot = metal_mass_per_dot_g(material, diameter_nm, shell=shell, shell_thickness_nm=shell_thickness_nm)
    return {el: dose * MOL_PER_NMOL * N_A * g * MG_PER_G for el, g in per_dot.items() if el in HEAVY_METALS}
