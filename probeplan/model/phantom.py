"""Liquid tissue phantoms: the amounts of scatterer and absorber that give a target μa and μs′.

A phantom here is water with one scatterer and one absorber.  Each ingredient
contributes linearly (dilute, independent scattering and absorption):

    μs′(λ) = v_s·u_s(λ),      μa(λ) = μa,water(λ) + v_a·u_a(λ)

with v the ingredient's fraction of the batch (volume fraction of a liquid
stock, or of solid spheres) and u its μs′ or μa per unit fraction.  With two
amounts and several wavelengths (the plan's excitation and emission), each amount
is the least-squares fit of the *relative* error over the wavelengths (closed
form: v = Σ(u/t) / Σ(u/t)² with t the target), so a phantom that cannot match
every wavelength is wrong by the same fraction at each, and the table says by how much.

Scatterers
----------
``intralipid-10``, ``intralipid-20``
    van Staveren et al. (1991), Intralipid-10 %: μs = 2.54·10⁹·λ^−2.4 cm⁻¹ and
    g = 1.1 − 0.58·10⁻³·λ (λ in nm, 400–1100 nm).  Intralipid-20 % is taken as
    twice the 10 % stock (a stated assumption; Di Ninni et al. 2011 measured the
    20 % stock directly and batch-to-batch spread between sources is real, Michels
    et al. 2008).
``polystyrene``, ``silica``, ``tio2``
    Spheres of a stated diameter by Mie theory (:mod:`probeplan.model.mie`);
    the amount is a volume fraction of solid, weighed as mass with the material's density.

Absorbers
---------
``india-ink``
    A typical assumption, not a measurement: stock μa = 2000 cm⁻¹·(λ/700 nm)^−1,
    of the order of published 0.5–1 vol.% dilutions (μa 3–40 cm⁻¹ over 400–900 nm).
    Inks differ by brand and batch by a factor of two or more: measure your stock
    and pass it as a spectrum.
a :class:`~probeplan.model.spectra.Spectrum`
    The user's measured stock absorption (cm⁻¹ of the undiluted stock).

Water absorption comes from the shipped water table (:func:`probeplan.model.tissue.absorption`).

References
----------
H. J. van Staveren et al., Appl. Opt. 30, 4507 (1991), doi:10.1364/AO.30.004507.
R. Michels, F. Foschum, A. Kienle, Opt. Express 16, 5907 (2008), doi:10.1364/OE.16.005907.
P. Di Ninni, F. Martelli, G. Zaccanti, Phys. Med. Biol. 56, N21 (2011), doi:10.1088/0031-9155/56/2/N01.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from probeplan.errors import AssumptionWarning, ModelValidityWarning, input_error, positive_number, warn_at_caller
from probeplan.model.mie import SPHERE_MATERIALS, sphere_reduced_scattering_per_cm
from probeplan.model.tissue import Tissue, absorption

__all__ = [
    "SCATTERERS",
    "ABSORBERS",
    "intralipid_scattering",
    "PhantomRecipe",
    "PhantomMedium",
    "phantom_recipe",
    "INK_ASSUMPTION",
]

#: Default sphere diameters (µm) when none is given: a typical choice, stated in the recipe.
_DEFAULT_DIAMETER_UM = {"polystyrene": 1.0, "silica": 1.0, "tio2": 0.3}
#: Scatterers this module knows.
SCATTERERS = ("intralipid-10", "intralipid-20", "polystyrene", "silica", "tio2")
#: Absorbers shipped (a measured spectrum may be passed instead).
ABSORBERS = ("india-ink",)
#: The ink assumption, written into every recipe that uses it.
INK_ASSUMPTION = ("india ink stock absorption is a typical assumption (2000 cm^-1 at 700 nm, falling as 1/wavelength); "
                  "inks vary by brand and batch by 2x or more: measure your stock and pass its spectrum")
_INK_MU_A_700 = 2000.0
_INTRALIPID_RANGE_NM = (400.0, 1100.0)
#: Millilitres per litre and milligrams per gram.
MG_PER_G = 1000.0


def intralipid_scattering(wavelength_nm, *, stock: str = "intralipid-10") -> tuple[np.ndarray, np.ndarray]:
    """μs (cm⁻¹) and g of an Intralipid stock (van Staveren et al. 1991).

    Outside 400–1100 nm the power law is extrapolated with a
    :class:`~probeplan.errors.ModelValidityWarning`.

    Examples
    --------
    >>> mu_s, g = intralipid_scattering(632.8)
    >>> round(float(mu_s), 0), round(float(g), 3)
    (481.0, 0.733)
    """
    wl = np.asarray(wavelength_nm, dtype=np.float64)
    if not np.all(np.isfinite(wl)) or np.any(wl <= 0):
        raise input_error("wavelength_nm", f"got {wavelength_nm!r}", "give wavelengths in nm > 0")
    if stock not in ("intralipid-10", "intralipid-20"):
        raise input_error("stock", f"got {stock!r}", "choose intralipid-10 or intralipid-20")
    lo, hi = _INTRALIPID_RANGE_NM
    if np.any(wl < lo) or np.any(wl > hi):
        warn_at_caller(f"Intralipid scattering law (van Staveren 1991) extrapolated outside {lo:g}-{hi:g} nm",
                      ModelValidityWarning)
    mu_s = 2.54e9 * wl**-2.4 * (2.0 if stock == "intralipid-20" else 1.0)
    g = 1.1 - 0.58e-3 * wl
    return mu_s, g


def _scattering_per_unit(scatterer: str, wl: np.ndarray, diameter_um: float | None) -> np.ndarray:
    """μs′ (cm⁻¹) per unit fraction (volume fraction of stock or of solid spheres)."""
    if scatterer.startswith("intralipid"):
        mu_s, g = intralipid_scattering(wl, stock=scatterer)
        return mu_s * (1.0 - g)
    return sphere_reduced_scattering_per_cm(diameter_um, 1e-3, wl, n_particle=scatterer) / 1e-3


def _absorption_per_unit(absorber, wl: np.ndarray) -> np.ndarray:
    """μa (cm⁻¹) of the undiluted absorber stock."""
    if isinstance(absorber, str):
        if absorber.lower() != "india-ink":
            raise input_error("absorber", f"unknown absorber {absorber!r}",
                              "use india-ink or pass a measured stock absorption spectrum (CSV: wavelength_nm, mu_a)")
        warn_at_caller(INK_ASSUMPTION, AssumptionWarning)
        return _INK_MU_A_700 * (wl / 700.0) ** -1.0
    return np.asarray(absorber.values_at(wl), dtype=np.float64)


@dataclass(frozen=True, eq=False)
class PhantomMedium(Tissue):
    """A phantom as a :class:`~probeplan.model.tissue.Tissue`: μa and μs′ from its recipe at any wavelength.

    Usable wherever the forward model takes a tissue (e.g.
    :func:`probeplan.model.fluorescence.depth_profile`).
    """

    recipe: Any = field(default=None, repr=False)

    def mu_a_per_cm(self, wavelength_nm) -> np.ndarray:
        wl = np.asarray(wavelength_nm, dtype=np.float64)
        return self.recipe.mu_a_per_cm(wl)

    def mu_s_prime_per_cm(self, wavelength_nm, *, scattering_model: str = "power", warn: bool = True) -> np.ndarray:
        wl = np.asarray(wavelength_nm, dtype=np.float64)
        return self.recipe.mu_s_prime_per_cm(wl)


@dataclass
class PhantomRecipe:
    """Amounts of one scatterer and one absorber in water, with what they give.

    Attributes
    ----------
    scatterer, absorber : str
    diameter_um : float or None
        Sphere diameter for a sphere scatterer.
    scatterer_fraction : float
        Volume fraction of the scatterer stock (Intralipid) or of solid spheres.
    absorber_fraction : float
        Volume fraction of the absorber stock.
    batch_ml : float
    table : list of dict
        Per wavelength: target and achieved μa, μs′ and their relative errors.
    notes : list of str
    """

    scatterer: str
    absorber: str
    diameter_um: float | None
    scatterer_fraction: float
    absorber_fraction: float
    batch_ml: float
    table: list[dict] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    _absorber_obj: Any = field(default=None, repr=False)

    def mu_s_prime_per_cm(self, wavelength_nm) -> np.ndarray:
        """μs′ of the phantom (cm⁻¹)."""
        wl = np.asarray(wavelength_nm, dtype=np.float64)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ModelValidityWarning)
            return self.scatterer_fraction * _scattering_per_unit(self.scatterer, wl, self.diameter_um)

    def mu_a_per_cm(self, wavelength_nm) -> np.ndarray:
        """μa of the phantom (cm⁻¹): water plus the absorber."""
        wl = np.asarray(wavelength_nm, dtype=np.float64)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", (AssumptionWarning, ModelValidityWarning))
            return absorption("water", wl) + self.absorber_fraction * _absorption_per_unit(self._absorber_obj, wl)

    def medium(self) -> PhantomMedium:
        """The phantom as a tissue for the forward model (refractive index 1.33, water)."""
        return PhantomMedium(name=f"phantom ({self.scatterer} + {self.absorber})", blood_fraction=0.0, saturation=0.0,
                             water_fraction=1.0, a_per_cm=1.0, b=1.0, refractive_index=1.33,
                             description="liquid phantom from probeplan.phantom_recipe", recipe=self)

    def preparation(self) -> list[dict]:
        """The preparation sheet: what to measure out for the batch (mL, g) and in which order."""
        rows = []
        scat_ml = self.scatterer_fraction * self.batch_ml
        if self.scatterer.startswith("intralipid"):
            rows.append({"step": 1, "ingredient": f"{self.scatterer} stock", "volume_ml": scat_ml, "mass_g": math.nan,
                         "how": "pipette into the vessel; mix gently (do not foam)"})
        else:
            density = SPHERE_MATERIALS[self.scatterer][2]
            rows.append({"step": 1, "ingredient": f"{self.scatterer} spheres, {self.diameter_um:g} um (solid)",
                         "volume_ml": scat_ml, "mass_g": scat_ml * density,
                         "how": "weigh (or take the stated solids of a suspension); disperse by sonication"})
        ink_ml = self.absorber_fraction * self.batch_ml
        rows.append({"step": 2, "ingredient": f"{self.absorber} stock", "volume_ml": ink_ml, "mass_g": math.nan,
                     "how": "dilute 1:100 first if under 0.05 mL; add while stirring"})
        rows.append({"step": 3, "ingredient": "water (deionised)", "volume_ml": self.batch_ml - scat_ml - ink_ml,
                     "mass_g": math.nan, "how": "make up to the batch volume; mix; check by measurement before use"})
        return rows


def phantom_recipe(wavelength_nm, mu_a_per_cm, mu_s_prime_per_cm, *, scatterer: str = "intralipid-20",
                   absorber="india-ink", diameter_um: float | None = None, batch_ml: float = 100.0) -> PhantomRecipe:
    """Amounts of scatterer and absorber that give target μa and μs′ at the given wavelengths.

    Parameters
    ----------
    wavelength_nm : array_like, shape (W,)
        Wavelengths to match (e.g. the plan's excitation and each probe's emission peak).
    mu_a_per_cm, mu_s_prime_per_cm : array_like, shape (W,)
        Targets (cm⁻¹), e.g. the plan tissue's :func:`probeplan.optical_properties`.
    scatterer : str
        One of :data:`SCATTERERS`.
    absorber : str or Spectrum
        ``"india-ink"`` (a stated assumption) or a measured stock absorption spectrum (cm⁻¹).
    diameter_um : float, optional
        Sphere diameter for a sphere scatterer (default 1 µm, 0.3 µm for TiO₂: a typical choice).
    batch_ml : float
        Batch volume for the preparation sheet (mL).

    Returns
    -------
    PhantomRecipe

    Raises
    ------
    InputError
        Unknown scatterer or absorber, targets not positive, target μa below water's own.

    Examples
    --------
    >>> from probeplan.model.spectra import Spectrum
    >>> ink = Spectrum([600.0, 900.0], [2300.0, 1550.0], name="my ink", unit="cm^-1", kind="material")
    >>> r = phantom_recipe([650.0, 800.0], [0.3, 0.25], [10.0, 8.0], absorber=ink)
    >>> round(100 * r.scatterer_fraction, 2)  # % Intralipid-20 stock
    4.01
    """
    wl = np.atleast_1d(np.asarray(wavelength_nm, dtype=np.float64))
    t_a = np.atleast_1d(np.asarray(mu_a_per_cm, dtype=np.float64))
    t_s = np.atleast_1d(np.asarray(mu_s_prime_per_cm, dtype=np.float64))
    if wl.ndim != 1 or t_a.shape != wl.shape or t_s.shape != wl.shape:
        raise input_error("phantom_recipe", f"{wl.size} wavelengths, {t_a.size} mu_a, {t_s.size} mu_s'",
                          "give one target mu_a and mu_s' per wavelength")
    for name, arr in (("wavelength_nm", wl), ("mu_a_per_cm", t_a), ("mu_s_prime_per_cm", t_s)):
        if not np.all(np.isfinite(arr)) or np.any(arr <= 0):
            raise input_error(name, f"got {arr.tolist()}", "give finite values > 0")
    key = str(scatterer).lower()
    if key not in SCATTERERS:
        raise input_error("scatterer", f"unknown scatterer {scatterer!r}", f"choose one of {', '.join(SCATTERERS)}")
    batch = positive_number("batch_ml", batch_ml)
    notes: list[str] = []
    diameter = None
    if key in SPHERE_MATERIALS:
        diameter = positive_number("diameter_um", diameter_um) if diameter_um is not None else _DEFAULT_DIAMETER_UM[key]
        if diameter_um is None:
            notes.append(f"sphere diameter {diameter:g} um is a typical choice; give the one you buy")
    u_s = _scattering_per_unit(key, wl, diameter)
    u_a = _absorption_per_unit(absorber, wl)
    water = absorption("water", wl)
    need_a = t_a - water
    if np.any(need_a <= 0):
        bad = wl[need_a <= 0]
        raise input_error("mu_a_per_cm", f"target at {bad.tolist()} nm is at or below water's own absorption",
                          "a water-based phantom cannot absorb less than water: raise the target or use other wavelengths")
    v_s = float(np.sum(u_s / t_s) / np.sum((u_s / t_s) ** 2))
    v_a = float(np.sum(u_a / need_a) / np.sum((u_a / need_a) ** 2))
    if v_s + v_a >= 1:
        raise input_error("phantom_recipe", f"needs {100 * v_s:.3g} % scatterer and {100 * v_a:.3g} % absorber",
                          "choose a stronger scatterer or absorber stock")
    name = absorber if isinstance(absorber, str) else str(getattr(absorber, "name", "measured absorber"))
    recipe = PhantomRecipe(key, name, diameter, v_s, v_a, batch, notes=notes, _absorber_obj=absorber)
    got_s = recipe.mu_s_prime_per_cm(wl)
    got_a = recipe.mu_a_per_cm(wl)
    recipe.table = [{"wavelength_nm": float(w), "target_mu_a_per_cm": float(a), "phantom_mu_a_per_cm": float(ga),
                     "mu_a_error_percent": 100.0 * float(ga / a - 1.0), "target_mu_s_prime_per_cm": float(s),
                     "phantom_mu_s_prime_per_cm": float(gs), "mu_s_prime_error_percent": 100.0 * float(gs / s - 1.0)}
                    for w, a, ga, s, gs in zip(wl, t_a, got_a, t_s, got_s, strict=True)]
    if isinstance(absorber, str):
        notes.append(INK_ASSUMPTION)
    if key.startswith("intralipid"):
        notes.append("Intralipid scattering from van Staveren et al. 1991 (Intralipid-20 % taken as twice the 10 % "
                     "stock); batches differ (Michels et al. 2008): measure the phantom before relying on it")
    if key in SPHERE_MATERIALS and v_s > 0.1:
        notes.append("sphere volume fraction above 0.1: dependent scattering lowers mu_s' below this estimate")
    return recipe
