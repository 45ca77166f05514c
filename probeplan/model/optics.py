"""Optics of an imaging channel: filters, excitation sources, cameras, the lens.

Units: wavelength nm, pixel pitch um, areas mm^2, time s, charge e-.

Filters
-------
Parameterised filters have smooth logistic edges: an edge at lambda_e with a 10-90 %
width w rises as expit((lambda - lambda_e)/s) with s = w / (2 ln 9) (a logistic goes from
10 % to 90 % over 2 s ln 9).  A bandpass is the product of a rising and a falling edge at
centre -/+ FWHM/2.  Out of band the transmission is floored at 10^-OD (the blocking
optical density):

    T(lambda) = 10^-OD + (T_peak - 10^-OD) * edges(lambda).

Trade notation read by :func:`parse_filter`: ``"820/40"`` (centre/FWHM, nm; also
``"BP 820/40"``), ``"LP 850"`` (long-pass cut-on), ``"SP 750"`` (short-pass cut-off),
each optionally followed by ``"OD6"``.  Unless given, a filter has the typical values of
a hard-coated interference filter (typical assumption): peak transmission 0.93, OD 6,
edge width 1 % of the edge wavelength.

Measured curves come from CSV (:func:`read_filter_csv`): transmission as a fraction 0-1;
percent is refused (divide by 100); a column named ``OD`` (or with unit ``[OD]``) is
converted explicitly with T = 10^-OD.
"""

from __future__ import annotations

import functools
import math
import re
import tomllib
from collections.abc import Callable
from dataclasses import dataclass, replace
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np
from scipy.special import expit

from probeplan.errors import did_you_mean, input_error
from probeplan.model.spectra import Spectrum, as_wavelengths_nm
from probeplan.units import UM_PER_MM  # noqa: F401

__all__ = [
    "Filter",
    "Bandpass",
    "Longpass",
    "Shortpass",
    "Dichroic",
    "TabulatedFilter",
    "FilterStack",
    "parse_filter",
    "read_filter_csv",
    "filter_from_spectrum",
    "equivalent_width_nm",
    "list_filters",
    "Laser",
    "LED",
    "Camera",
    "camera",
    "camera_from_dict",
    "list_cameras",
    "Lens",
    "Channel",
]

#: Typical peak transmission of a hard-coated interference filter (typical assumption).
TYPICAL_PEAK_TRANSMISSION = 0.93
#: Typical blocking optical density (typical assumption).
TYPICAL_BLOCKING_OD = 6.0
#: Typical 10-90 % edge width as a fraction of the edge wavelength (typical assumption).
TYPICAL_EDGE_FRACTION = 0.01
#: A logistic rises from 10 % to 90 % over this many scale lengths: 2 ln 9.
_LOGISTIC_10_90 = 2.0 * math.log(9.0)
#: Width of a Gaussian FWHM in standard deviations: 2 sqrt(2 ln 2).
_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
#: Typical linewidth (nm, FWHM) of a multimode diode laser (typical assumption).
TYPICAL_LASER_LINEWIDTH_NM = 1.0
#: Transmission columns whose largest value is at most this, but above 1, may be optical density.
_OD_SUSPECT_MAX = 12.0

_SOURCE_FILTERS = "generic example in trade notation; edges, peak and blocking are typical assumptions"


def _number(value: Any, name: str, *, minimum: float | None = 0.0, strict: bool = True, maximum: float | None = None) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise TypeError(f"{name}: expected a number, got {value!r}")
    v = float(value)
    if not math.isfinite(v):
        raise input_error(name, f"got {value!r}", "give a finite number")
    if minimum is not None and (v <= minimum if strict else v < minimum):
        raise input_error(name, f"got {v:g}, expected {'>' if strict else '>='} {minimum:g}", f"give a valid {name}")
    if maximum is not None and v > maximum:
        raise input_error(name, f"got {v:g}, expected <= {maximum:g}", f"give a valid {name}")
    return v


# --------------------------------------------------------------------------- filters


class Filter:
    """Base of all filters: ``transmission(wavelength_nm) -> ndarray`` (fraction 0-1), ``name``, ``description``."""

    name: str = "filter"

    def transmission(self, wavelength_nm) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    @property
    def description(self) -> str:  # pragma: no cover - overridden
        return self.name


def _edge_scale(edge_width_nm: float | None, edge_nm: float) -> tuple[float, float]:
    width = TYPICAL_EDGE_FRACTION * edge_nm if edge_width_nm is None else _number(edge_width_nm, "edge_width_nm")
    return width, width / _LOGISTIC_10_90


def _check_common(f) -> None:
    _number(f.peak_transmission, "peak_transmission", maximum=1.0)
    _number(f.blocking_od, "blocking_od", minimum=0.0, strict=False)
    if 10.0 ** -f.blocking_od >= f.peak_transmission:
        raise input_error("blocking_od", f"{f.blocking_od:g} leaves more out of band than the peak transmits",
                          "give a higher OD or a higher peak transmission")


@dataclass(frozen=True)
class Bandpass(Filter):
    """Bandpass filter: centre and FWHM (nm), logistic edges, out-of-band floor 10^-OD.

    Examples
    --------
    >>> f = Bandpass(820.0, 40.0)
    >>> round(float(f.transmission(820.0)), 3), float(f.transmission(500.0))
    (0.93, 1e-06)
    """

    centre_nm: float
    fwhm_nm: float
    peak_transmission: float = TYPICAL_PEAK_TRANSMISSION
    edge_width_nm: float | None = None
    blocking_od: float = TYPICAL_BLOCKING_OD
    name: str = ""

    def __post_init__(self) -> None:
        as_wavelengths_nm(_number(self.centre_nm, "centre_nm"), name="centre_nm")
        _number(self.fwhm_nm, "fwhm_nm")
        if self.fwhm_nm >= 2 * self.centre_nm:
            raise input_error("fwhm_nm", f"{self.fwhm_nm:g} nm at centre {self.centre_nm:g} nm", "give a narrower band")
        width, _ = _edge_scale(self.edge_width_nm, self.centre_nm - self.fwhm_nm / 2)
        if width >= self.fwhm_nm:
            raise input_error("edge_width_nm", f"{width:g} nm is not smaller than the FWHM {self.fwhm_nm:g} nm",
                              "give sharper edges or a wider band")
        _check_common(self)
        if not self.name:
            object.__setattr__(self, "name", f"{self.centre_nm:g}/{self.fwhm_nm:g}")

    def transmission(self, wavelength_nm) -> np.ndarray:
        """Transmission (fraction) at the wavelengths (nm), any shape."""
        lam = as_wavelengths_nm(wavelength_nm)
        lo, hi = self.centre_nm - self.fwhm_nm / 2, self.centre_nm + self.fwhm_nm / 2
        _, s_lo = _edge_scale(self.edge_width_nm, lo)
        _, s_hi = _edge_scale(self.edge_width_nm, hi)
        band = expit((lam - lo) / s_lo) * expit((hi - lam) / s_hi)
        floor = 10.0 ** -self.blocking_od
        return floor + (self.peak_transmission - floor) * band

    @property
    def description(self) -> str:
        return (f"bandpass {self.centre_nm:g} nm centre, {self.fwhm_nm:g} nm FWHM, peak {self.peak_transmission:g}, "
                f"OD {self.blocking_od:g} blocking")


@dataclass(frozen=True)
class Longpass(Filter):
    """Long-pass filter: transmits above ``cut_on_nm`` (the 50 % point).

    Examples
    --------
    >>> f = Longpass(1000.0)
    >>> [round(float(t), 3) for t in f.transmission([900.0, 1000.0, 1100.0])]
    [0.0, 0.465, 0.93]
    """

    cut_on_nm: float
    peak_transmission: float = TYPICAL_PEAK_TRANSMISSION
    edge_width_nm: float | None = None
    blocking_od: float = TYPICAL_BLOCKING_OD
    name: str = ""

    def __post_init__(self) -> None:
        as_wavelengths_nm(_number(self.cut_on_nm, "cut_on_nm"), name="cut_on_nm")
        _edge_scale(self.edge_width_nm, self.cut_on_nm)
        _check_common(self)
        if not self.name:
            object.__setattr__(self, "name", f"LP {self.cut_on_nm:g}")

    def transmission(self, wavelength_nm) -> np.ndarray:
        """Transmission (fraction) at the wavelengths (nm), any shape."""
        lam = as_wavelengths_nm(wavelength_nm)
        _, s = _edge_scale(self.edge_width_nm, self.cut_on_nm)
        floor = 10.0 ** -self.blocking_od
        return floor + (self.peak_transmission - floor) * expit((lam - self.cut_on_nm) / s)

    @property
    def description(self) -> str:
        return f"long-pass, cut-on {self.cut_on_nm:g} nm, peak {self.peak_transmission:g}, OD {self.blocking_od:g} blocking"


@dataclass(frozen=True)
class Shortpass(Filter):
    """Short-pass filter: transmits below ``cut_off_nm`` (the 50 % point)."""

    cut_off_nm: float
    peak_transmission: float = TYPICAL_PEAK_TRANSMISSION
    edge_width_nm: float | None = None
    blocking_od: float = TYPICAL_BLOCKING_OD
    name: str = ""

    def __post_init__(self) -> None:
        as_wavelengths_nm(_number(self.cut_off_nm, "cut_off_nm"), name="cut_off_nm")
        _edge_scale(self.edge_width_nm, self.cut_off_nm)
        _check_common(self)
        if not self.name:
            object.__setattr__(self, "name", f"SP {self.cut_off_nm:g}")

    def transmission(self, wavelength_nm) -> np.ndarray:
        """Transmission (fraction) at the wavelengths (nm), any shape."""
        lam = as_wavelengths_nm(wavelength_nm)
        _, s = _edge_scale(self.edge_width_nm, self.cut_off_nm)
        floor = 10.0 ** -self.blocking_od
        return floor + (self.peak_transmission - floor) * expit((self.cut_off_nm - lam) / s)

    @property
    def description(self) -> str:
        return f"short-pass, cut-off {self.cut_off_nm:g} nm, peak {self.peak_transmission:g}, OD {self.blocking_od:g} blocking"


@dataclass(frozen=True)
class Dichroic(Filter):
    """Dichroic mirror: reflects one side of ``edge_nm`` and transmits the other.

    ``reflect="short"`` (the usual epi-illumination beamsplitter) reflects shorter
    wavelengths (excitation) and transmits longer ones (emission).  Lossless:
    reflection = 1 - transmission; the transmitted side is floored at 10^-OD.

    Examples
    --------
    >>> d = Dichroic(900.0)
    >>> round(float(d.reflection(808.0)), 3), round(float(d.transmission(1000.0)), 3)
    (0.999, 0.93)
    """

    edge_nm: float
    reflect: str = "short"
    peak_transmission: float = TYPICAL_PEAK_TRANSMISSION
    edge_width_nm: float | None = None
    blocking_od: float = 3.0
    name: str = ""

    def __post_init__(self) -> None:
        as_wavelengths_nm(_number(self.edge_nm, "edge_nm"), name="edge_nm")
        if self.reflect not in ("short", "long"):
            raise input_error("reflect", f"got {self.reflect!r}", "use 'short' or 'long'")
        _edge_scale(self.edge_width_nm, self.edge_nm)
        _check_common(self)
        if not self.name:
            object.__setattr__(self, "name", f"dichroic {self.edge_nm:g} ({self.reflect}-reflecting)")

    def transmission(self, wavelength_nm) -> np.ndarray:
        """Transmitted fraction at the wavelengths (nm)."""
        lam = as_wavelengths_nm(wavelength_nm)
        _, s = _edge_scale(self.edge_width_nm, self.edge_nm)
        sign = 1.0 if self.reflect == "short" else -1.0
        floor = 10.0 ** -self.blocking_od
        return floor + (self.peak_transmission - floor) * expit(sign * (lam - self.edge_nm) / s)

    def reflection(self, wavelength_nm) -> np.ndarray:
        """Reflected fraction, 1 - transmission (lossless coating assumed)."""
        return 1.0 - self.transmission(wavelength_nm)

    @property
    def description(self) -> str:
        return f"dichroic, edge {self.edge_nm:g} nm, reflects {self.reflect}er wavelengths"


@dataclass(frozen=True)
class TabulatedFilter(Filter):
    """A measured filter curve (a :class:`~probeplan.model.spectra.Spectrum` of kind ``"filter"``, fraction 0-1).

    Outside its tabulated range the transmission is zero (the spectra resampling rule).
    """

    spectrum: Spectrum
    name: str = ""

    def __post_init__(self) -> None:
        if not isinstance(self.spectrum, Spectrum):
            raise TypeError(f"spectrum: expected a Spectrum, got {type(self.spectrum).__name__}")
        _check_fraction(self.spectrum.name, self.spectrum.unit, self.spectrum.values, self.spectrum.provenance)
        if not self.name:
            object.__setattr__(self, "name", self.spectrum.name)

    def transmission(self, wavelength_nm) -> np.ndarray:
        """Transmission (fraction) at the wavelengths (nm), zero outside the table."""
        return self.spectrum.values_at(wavelength_nm)

    @property
    def description(self) -> str:
        lo, hi = self.spectrum.range_nm
        return f"measured curve {lo:g}-{hi:g} nm ({self.spectrum.provenance})"


@dataclass(frozen=True)
class FilterStack(Filter):
    """Filters in series: the product of their transmissions.

    Examples
    --------
    >>> s = FilterStack((Longpass(1000.0), Shortpass(1400.0)))
    >>> s.name
    'LP 1000 + SP 1400'
    """

    filters: tuple[Filter, ...]
    name: str = ""

    def __post_init__(self) -> None:
        object.__setattr__(self, "filters", tuple(self.filters))
        if not self.filters or not all(isinstance(f, Filter) for f in self.filters):
            raise TypeError("filters: expected one or more Filter objects")
        if not self.name:
            object.__setattr__(self, "name", " + ".join(f.name for f in self.filters))

    def transmission(self, wavelength_nm) -> np.ndarray:
        """Product of the transmissions at the wavelengths (nm)."""
        out = np.ones_like(as_wavelengths_nm(wavelength_nm))
        for f in self.filters:
            out = out * f.transmission(wavelength_nm)
        return out

    @property
    def description(self) -> str:
        return "; ".join(f.description for f in self.filters)


_NUM = r"(\d+(?:\.\d+)?)"
_OD_SUFFIX = rf"(?:\s+OD\s*{_NUM})?"
_BANDPASS_RE = re.compile(rf"^(?:BP\s*)?{_NUM}\s*/\s*{_NUM}(?:\s*nm)?{_OD_SUFFIX}$", re.IGNORECASE)
_EDGE_RE = re.compile(rf"^(?:(LP|SP)\s*{_NUM}|{_NUM}\s*(LP|SP))(?:\s*nm)?{_OD_SUFFIX}$", re.IGNORECASE)


def parse_filter(text: str, *, peak_transmission: float = TYPICAL_PEAK_TRANSMISSION,
                 blocking_od: float | None = None, edge_width_nm: float | None = None) -> Filter:
    """A filter from trade notation: ``"820/40"``, ``"BP 820/40"``, ``"LP 850"``, ``"SP 750"``, optional ``"OD6"``.

    Parameters
    ----------
    text : str
        The notation; wavelengths in nm.
    peak_transmission, blocking_od, edge_width_nm
        Override the typical values (module notes); an ``OD`` in the text wins over
        the default but not over an explicit ``blocking_od``.

    Raises
    ------
    InputError
        Text that is none of the forms.

    Examples
    --------
    >>> parse_filter("820/40").description
    'bandpass 820 nm centre, 40 nm FWHM, peak 0.93, OD 6 blocking'
    >>> parse_filter("LP 1100 OD4").name
    'LP 1100'
    >>> parse_filter("1100LP").cut_on_nm
    1100.0
    """
    if not isinstance(text, str):
        raise TypeError(f"filter: expected text such as '820/40', got {text!r}")
    s = text.strip()
    m = _BANDPASS_RE.match(s)
    if m:
        od = blocking_od if blocking_od is not None else float(m.group(3)) if m.group(3) else TYPICAL_BLOCKING_OD
        return Bandpass(float(m.group(1)), float(m.group(2)), peak_transmission, edge_width_nm, od)
    m = _EDGE_RE.match(s)
    if m:
        kind = (m.group(1) or m.group(4)).upper()
        edge = float(m.group(2) or m.group(3))
        od = blocking_od if blocking_od is not None else float(m.group(5)) if m.group(5) else TYPICAL_BLOCKING_OD
        cls = Longpass if kind == "LP" else Shortpass
        return cls(edge, peak_transmission, edge_width_nm, od)
    raise input_error("filter", f"cannot read {text!r}",
                      "write centre/FWHM in nm such as '820/40', or 'LP 850' / 'SP 750', optionally with 'OD6'")


def _is_od_column(name: str, unit: str | None) -> bool:
    if unit is not None and unit.strip().lower() == "od":
        return True
    return re.search(r"(^|[\s_\-])od($|[\s_\-])", name.strip().lower()) is not None


def _check_fraction(name: str, unit: str | None, values: np.ndarray, source: str) -> None:
    where = f"{source}: {name}"
    if np.any(values < 0):
        raise input_error(where, f"transmission {values.min():g} is negative", "correct the baseline or clip at 0")
    vmax = float(values.max())
    if unit is not None and unit.strip() == "%":
        raise input_error(where, "transmission is in percent", "divide by 100 and give fractions 0-1 without the '%' unit")
    if vmax > 1.0:
        if vmax <= _OD_SUSPECT_MAX:
            raise input_error(where, f"values up to {vmax:g} exceed 1 and look like optical density (or percent)",
                              "name the column 'OD' to convert T = 10^-OD, or divide percent by 100")
        raise input_error(where, f"values up to {vmax:g} exceed 1 and look like percent", "divide by 100")


def filter_from_spectrum(spectrum: Spectrum, *, optical_density: bool = False) -> TabulatedFilter:
    """A :class:`TabulatedFilter` from a spectrum, checked (fraction 0-1, no percent).

    With ``optical_density=True`` the values are OD and converted, T = 10^-OD.

    Examples
    --------
    >>> s = Spectrum([600, 700], [2.0, 0.0], name="OD")
    >>> [float(t) for t in filter_from_spectrum(s, optical_density=True).transmission([600, 700])]
    [0.01, 1.0]
    """
    if not isinstance(spectrum, Spectrum):
        raise TypeError(f"spectrum: expected a Spectrum, got {type(spectrum).__name__}")
    values = spectrum.values
    name = spectrum.name
    if optical_density:
        if np.any(values < 0):
            raise input_error(f"{spectrum.provenance}: {name}", f"OD {values.min():g} is negative", "give OD >= 0")
        values = 10.0 ** -values
        name = re.sub(r"(^|[\s_\-])od($|[\s_\-])", " ", name, flags=re.IGNORECASE).strip() or "filter"
    else:
        _check_fraction(name, spectrum.unit, values, spectrum.provenance)
    curve = Spectrum(spectrum.wavelength_nm, values, name, "1", "filter", spectrum.provenance, spectrum.notes)
    return TabulatedFilter(curve)


def read_filter_csv(path: str | Path) -> dict[str, TabulatedFilter]:
    """Filters from a CSV/TSV of transmission curves (see :func:`probeplan.model.spectra.read_spectra_csv`).

    Each column is one filter, transmission as a fraction 0-1.  A column named ``OD`` (or
    ``..._OD``, or with unit ``[OD]``) holds optical density and is converted, T = 10^-OD;
    values above 1 in any other column are refused (divide percent by 100, or name an OD
    column so).  The file is only read.

    Raises
    ------
    InputError
        As :func:`~probeplan.model.spectra.read_spectra_csv`, and for percent or unlabelled OD.
    """
    from probeplan.model.spectra import read_spectra_csv

    spectra = read_spectra_csv(path, kind="other")
    out: dict[str, TabulatedFilter] = {}
    for name, spectrum in spectra.items():
        spectrum = replace(spectrum, provenance=str(path)) if spectrum.provenance.startswith("user file") else spectrum
        f = filter_from_spectrum(spectrum, optical_density=_is_od_column(name, spectrum.unit))
        out[f.name] = f
    return out


def equivalent_width_nm(filt: Filter, lo_nm: float, hi_nm: float, *, step_nm: float = 0.05) -> float:
    """Equivalent width of a filter, the integral of T d(lambda) over ``lo_nm``-``hi_nm`` (nm).

    A flat spectrum of 1 per nm passed through the filter gives this many units.
    Trapezoid rule on a grid of ``step_nm``.

    Examples
    --------
    >>> round(equivalent_width_nm(Bandpass(800.0, 40.0, peak_transmission=1.0, blocking_od=9), 600, 1000), 2)
    40.0
    """
    lo = _number(lo_nm, "lo_nm")
    hi = _number(hi_nm, "hi_nm")
    if hi <= lo:
        raise input_error("hi_nm", f"{hi:g} <= lo_nm {lo:g}", "give hi_nm > lo_nm")
    n = int(math.ceil((hi - lo) / _number(step_nm, "step_nm"))) + 1
    lam = np.linspace(lo, hi, n)
    return float(np.trapezoid(filt.transmission(lam), lam))


_EXAMPLE_FILTERS = ("700/40", "750/50", "800/40", "840/40", "LP 900", "LP 1000", "LP 1100", "LP 1300", "1300/50",
                    "LP 1500", "SP 750", "SP 900")


def list_filters() -> list[dict[str, Any]]:
    """The built-in example filters (generic trade notation; build one with :func:`parse_filter`).

    Examples
    --------
    >>> list_filters()[0]["name"]
    '700/40'
    """
    return [{"name": n, "kind": "filter", "description": parse_filter(n).description, "source": _SOURCE_FILTERS}
            for n in _EXAMPLE_FILTERS]


# --------------------------------------------------------------------------- sources


class _GaussianSource:
    """Shared spectrum of a source: a Gaussian in wavelength, optionally through a clean-up filter."""

    _POINTS = 4001
    _SPAN_FWHM = 8.0

    centre_nm: float

    def _fwhm(self) -> float:  # pragma: no cover - overridden
        raise NotImplementedError

    def _raw(self, lam: np.ndarray) -> np.ndarray:
        sigma = self._fwhm() / _FWHM_PER_SIGMA
        return np.exp(-0.5 * ((lam - self.centre_nm) / sigma) ** 2) / (sigma * math.sqrt(2.0 * math.pi))

    def support_nm(self) -> np.ndarray:
        """A fine grid (nm) covering the source's emission, +/- 8 FWHM around the centre."""
        half = self._SPAN_FWHM * self._fwhm()
        return np.linspace(max(self.centre_nm - half, 1.0), self.centre_nm + half, self._POINTS)

    @functools.cached_property
    def _cleanup_norm(self) -> float:
        lam = self.support_nm()
        area = float(np.trapezoid(self._raw(lam) * self.cleanup.transmission(lam), lam))  # type: ignore[attr-defined]
        if area <= 0:
            raise input_error("cleanup", "blocks the whole source spectrum", "choose a clean-up filter that passes it")
        return area

    def spectrum_per_nm(self, wavelength_nm) -> np.ndarray:
        """Spectral density (1/nm) with unit area over all wavelengths, at the wavelengths (nm).

        With a clean-up filter the density is source x T, renormalised to unit area (the
        power is what reaches the sample).  A line narrower than a grid's step is poorly
        sampled: use :meth:`spectral_average` or :attr:`centre_nm` instead.
        """
        lam = as_wavelengths_nm(wavelength_nm)
        raw = self._raw(lam)
        if self.cleanup is None:  # type: ignore[attr-defined]
            return raw
        return raw * self.cleanup.transmission(lam) / self._cleanup_norm  # type: ignore[attr-defined]

    def spectral_average(self, func: Callable[[np.ndarray], np.ndarray]) -> float:
        """Mean of ``func(wavelength_nm)`` weighted by the source spectrum (on :meth:`support_nm`).

        Examples
        --------
        >>> round(Laser(808.0, 2.0).spectral_average(lambda wl: wl), 6)
        808.0
        """
        lam = self.support_nm()
        weight = self.spectrum_per_nm(lam)
        return float(np.trapezoid(weight * np.asarray(func(lam), dtype=float), lam) / np.trapezoid(weight, lam))


@dataclass(frozen=True, eq=False)
class Laser(_GaussianSource):
    """Laser line: ``wavelength_nm`` and Gaussian ``linewidth_nm`` (FWHM), optional clean-up filter.

    The default linewidth (1 nm) is typical of a multimode diode laser (typical assumption).
    Lasers can injure eyes and skin: follow the laser safety officer's rules.
    """

    wavelength_nm: float
    linewidth_nm: float = TYPICAL_LASER_LINEWIDTH_NM
    cleanup: Filter | None = None
    name: str = ""

    def __post_init__(self) -> None:
        as_wavelengths_nm(_number(self.wavelength_nm, "wavelength_nm"), name="wavelength_nm")
        _number(self.linewidth_nm, "linewidth_nm")
        if self.cleanup is not None and not isinstance(self.cleanup, Filter):
            raise TypeError(f"cleanup: expected a Filter, got {type(self.cleanup).__name__}")
        if not self.name:
            object.__setattr__(self, "name", f"laser {self.wavelength_nm:g} nm")

    def _fwhm(self) -> float:
        return self.linewidth_nm

    @property
    def centre_nm(self) -> float:
        """Nominal wavelength, nm."""
        return float(self.wavelength_nm)


@dataclass(frozen=True, eq=False)
class LED(_GaussianSource):
    """LED: ``centre_nm`` and ``fwhm_nm``, a Gaussian in wavelength (asymmetric tails ignored), optional clean-up filter.

    Examples
    --------
    >>> wl = np.arange(600.0, 800.0, 0.5)
    >>> round(float(np.trapezoid(LED(700.0, 30.0).spectrum_per_nm(wl), wl)), 6)
    1.0
    """

    centre_nm: float
    fwhm_nm: float
    cleanup: Filter | None = None
    name: str = ""

    def __post_init__(self) -> None:
        as_wavelengths_nm(_number(self.centre_nm, "centre_nm"), name="centre_nm")
        _number(self.fwhm_nm, "fwhm_nm")
        if self.fwhm_nm >= self.centre_nm:
            raise input_error("fwhm_nm", f"{self.fwhm_nm:g} nm", "give an FWHM smaller than the centre wavelength")
        if self.cleanup is not None and not isinstance(self.cleanup, Filter):
            raise TypeError(f"cleanup: expected a Filter, got {type(self.cleanup).__name__}")
        if not self.name:
            object.__setattr__(self, "name", f"LED {self.centre_nm:g} nm")

    def _fwhm(self) -> float:
        return self.fwhm_nm


# --------------------------------------------------------------------------- cameras


@dataclass(frozen=True)
class Camera:
    """A camera: QE curve and noise figures (per physical pixel).

    Parameters
    ----------
    name : str
    qe_curve : Spectrum
        Quantum efficiency, kind ``"qe"``, fraction 0-1; zero outside its table.
    read_noise_e : float
        Read noise, e- rms per read pixel.
    dark_current_e_per_px_s : float
        Dark current, e- per physical pixel per s.
    full_well_e : float
        Full-well capacity, e- per physical pixel.
    bit_depth : int
    pixel_pitch_um : float
    binning : int
        Pixels binned per side (1 = none).
    charge_binning : bool
        True: binned pixels are summed as charge before read-out (one read noise);
        False: summed digitally (read noise adds in quadrature).
    output_node_full_well_e : float, optional
        Charge capacity of the summing well / output node that holds a charge-binned
        pixel, e-; used only with ``charge_binning`` (see :attr:`binned_full_well_e`).
    description, source : str

    Examples
    --------
    >>> cam = camera("ingaas")
    >>> round(float(cam.qe(1300.0)), 2), cam.with_binning(2).effective_pixel_um
    (0.87, 30.0)
    """

    name: str
    qe_curve: Spectrum
    read_noise_e: float
    dark_current_e_per_px_s: float
    full_well_e: float
    bit_depth: int
    pixel_pitch_um: float
    binning: int = 1
    charge_binning: bool = False
    output_node_full_well_e: float | None = None
    description: str = "generic, typical values"
    source: str = ""

    def __post_init__(self) -> None:
        if not isinstance(self.qe_curve, Spectrum):
            raise TypeError(f"qe_curve: expected a Spectrum, got {type(self.qe_curve).__name__}")
        if self.qe_curve.kind != "qe":
            raise input_error(f"{self.name}: qe_curve", f"kind {self.qe_curve.kind!r}", "give a spectrum of kind 'qe'")
        if self.qe_curve.values.max() > 1.0:
            raise input_error(f"{self.name}: qe_curve", f"values up to {self.qe_curve.values.max():g} exceed 1",
                              "give QE as a fraction (divide percent by 100)")
        _number(self.read_noise_e, "read_noise_e", strict=False)
        _number(self.dark_current_e_per_px_s, "dark_current_e_per_px_s", strict=False)
        _number(self.full_well_e, "full_well_e")
        if self.output_node_full_well_e is not None:
            _number(self.output_node_full_well_e, "output_node_full_well_e")
        _number(self.pixel_pitch_um, "pixel_pitch_um")
        for key, lo, hi in (("bit_depth", 1, 32), ("binning", 1, 64)):
            value = getattr(self, key)
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
                raise TypeError(f"{key}: expected an integer, got {value!r}")
            if not lo <= value <= hi:
                raise input_error(key, f"got {value}", f"give an integer {lo}-{hi}")

    def qe(self, wavelength_nm) -> np.ndarray:
        """Quantum efficiency (fraction) at the wavelengths (nm); zero outside the table."""
        return self.qe_curve.values_at(wavelength_nm)

    @property
    def effective_pixel_um(self) -> float:
        """Side of a binned pixel, um."""
        return float(self.pixel_pitch_um * self.binning)

    @property
    def binned_full_well_e(self) -> float:
        """Electrons one binned pixel holds before it saturates.

        Digital binning: each physical pixel is read on its own and summed after
        read-out, so each of the binning² pixels may fill its own well: binning² ×
        ``full_well_e``.  Charge binning: the charges are summed in the summing well /
        output node before read-out, so the binned pixel is limited by that node as
        well: min(binning² × ``full_well_e``, ``output_node_full_well_e``); when the
        node's capacity is not given, one pixel's ``full_well_e`` is used (the
        conservative choice; :attr:`binned_full_well_note` says so).  Without binning
        it is ``full_well_e``.  (CCD and CMOS binning as described in EMVA 1288
        practice and camera makers' notes: common practice.)
        """
        b2 = self.binning**2
        if self.binning == 1:
            return float(self.full_well_e)
        if not self.charge_binning:
            return float(b2 * self.full_well_e)
        if self.output_node_full_well_e is None:
            return float(self.full_well_e)
        return float(min(b2 * self.full_well_e, self.output_node_full_well_e))

    @property
    def binned_full_well_note(self) -> str:
        """Which full well limits a binned pixel, in words."""
        if self.binning == 1:
            return f"full well {self.full_well_e:g} e- per pixel (no binning)"
        if not self.charge_binning:
            return (f"digital {self.binning}x{self.binning} binning: each pixel saturates at its own full well, "
                    f"{self.binned_full_well_e:g} e- per binned pixel")
        if self.output_node_full_well_e is None:
            return (f"charge {self.binning}x{self.binning} binning with the output node's capacity unknown: one "
                    f"pixel's full well ({self.full_well_e:g} e-) is used, conservatively; give "
                    "output_node_full_well_e for your camera")
        return (f"charge {self.binning}x{self.binning} binning: the summed charge is limited to "
                f"{self.binned_full_well_e:g} e- per binned pixel (output node {self.output_node_full_well_e:g} e-)")

    @property
    def read_noise_per_binned_px_e(self) -> float:
        """Read noise of one binned pixel, e- rms: sigma (charge binning) or binning x sigma (digital sum)."""
        return float(self.read_noise_e if self.charge_binning else self.read_noise_e * self.binning)

    @property
    def dark_current_e_per_binned_px_s(self) -> float:
        """Dark current of one binned pixel, e-/s: binning^2 physical pixels."""
        return float(self.dark_current_e_per_px_s * self.binning**2)

    def with_binning(self, binning: int) -> Camera:
        """A copy with another binning."""
        return replace(self, binning=binning)


def camera_from_dict(name: str, data: dict[str, Any], *, source: str = "user file") -> Camera:
    """A :class:`Camera` from a table shaped as ``cameras.toml`` (numbers plain or ``{value=, source=}``).

    Raises
    ------
    InputError
        Missing keys (named), bad values.
    """
    def get(key: str) -> Any:
        if key not in data:
            raise input_error(f"{source}: {key}", "missing", f"give {key} for camera {name!r}")
        item = data[key]
        return item["value"] if isinstance(item, dict) else item

    wl, qe = get("qe_wavelength_nm"), get("qe")
    curve = Spectrum(wl, qe, f"{name} QE", "1", "qe", str(data.get("qe_source", source)))
    return Camera(
        name=name,
        qe_curve=curve,
        read_noise_e=float(get("read_noise_e")),
        dark_current_e_per_px_s=float(get("dark_current_e_per_px_s")),
        full_well_e=float(get("full_well_e")),
        bit_depth=int(get("bit_depth")),
        pixel_pitch_um=float(get("pixel_pitch_um")),
        binning=int(data.get("binning", 1)),
        charge_binning=bool(data.get("charge_binning", False)),
        output_node_full_well_e=(float(get("output_node_full_well_e")) if "output_node_full_well_e" in data
                                 else None),
        description=str(data.get("description", "generic, typical values")),
        source=str(data.get("source", source)),
    )


@functools.lru_cache(maxsize=1)
def _camera_table() -> dict[str, dict[str, Any]]:
    text = resources.files("probeplan").joinpath("data", "cameras.toml").read_text(encoding="utf-8")
    return tomllib.loads(text)["cameras"]


_CAMERA_SOURCE = ("generic, typical values; probeplan/data/cameras.toml after the project's references "
                  "(back-illuminated silicon and InGaAs QE figures; other values typical assumptions)")


def camera(name: str) -> Camera:
    """A built-in generic camera by name (see :func:`list_cameras`).

    Raises
    ------
    InputError
        Unknown name, with the closest match.

    Examples
    --------
    >>> camera("si-back").read_noise_e
    1.6
    """
    table = _camera_table()
    if name not in table:
        raise input_error("camera", f"unknown camera {name!r}", did_you_mean(name, list(table)))
    return camera_from_dict(name, table[name], source=_CAMERA_SOURCE)


def list_cameras() -> list[dict[str, Any]]:
    """One dict per built-in camera: name, description, source, QE range and noise figures."""
    rows = []
    for name in _camera_table():
        cam = camera(name)
        rows.append({
            "name": name,
            "description": cam.description,
            "source": cam.source,
            "qe_range_nm": cam.qe_curve.range_nm,
            "peak_qe": float(cam.qe_curve.values.max()),
            "read_noise_e": cam.read_noise_e,
            "dark_current_e_per_px_s": cam.dark_current_e_per_px_s,
            "full_well_e": cam.full_well_e,
            "pixel_pitch_um": cam.pixel_pitch_um,
        })
    return rows


# --------------------------------------------------------------------------- lens and channel


@dataclass(frozen=True)
class Lens:
    """Imaging lens: ``f_number`` (at infinity), ``magnification`` (image/object size), ``transmission``.

    ``transmission`` defaults to 1 (an ideal lens): give the measured value when known.

    Examples
    --------
    >>> lens = Lens(f_number=1.4, magnification=0.1)
    >>> f"{lens.collection_efficiency():.3e}"
    '1.054e-03'
    """

    f_number: float
    magnification: float
    transmission: float = 1.0
    name: str = ""

    def __post_init__(self) -> None:
        _number(self.f_number, "f_number")
        _number(self.magnification, "magnification")
        _number(self.transmission, "transmission", maximum=1.0)
        if self.object_sin_theta() > 1.0:
            raise input_error("f_number", f"f/{self.f_number:g} at magnification {self.magnification:g} "
                              "gives an object-side sin(theta) above 1", "give a larger f-number")
        if not self.name:
            object.__setattr__(self, "name", f"f/{self.f_number:g}, {self.magnification:g}x")

    def object_sin_theta(self) -> float:
        """Object-side numerical aperture in air, sin(theta) = 1 / (2 N (1 + 1/m))."""
        return 1.0 / (2.0 * self.f_number * (1.0 + 1.0 / self.magnification))

    def collection_efficiency(self) -> float:
        """Fraction of a Lambertian surface's exitance that enters the lens (geometric; excludes ``transmission``).

        Notes
        -----
        A Lambertian surface of radiance L sends L cos(t) per unit solid angle; into a
        cone of half-angle theta it sends int_0^theta L cos t 2 pi sin t dt = pi L sin^2 theta,
        of a total exitance pi L: the fraction is sin^2 theta.  The image-side working
        f-number is N (1 + m) (unit pupil magnification), so the image-side
        sin(theta') = 1/(2 N (1 + m)); the Abbe sine condition n sin(theta) = m n' sin(theta')
        in air gives sin(theta) = m / (2 N (1 + m)) = 1 / (2 N (1 + 1/m)).  For a distant
        object (m -> 0) this tends to the entrance pupil's half-angle D/(2u) = m/(2N).

        References
        ----------
        Born & Wolf, Principles of Optics (sine condition); common practice for the
        working f-number.
        """
        return self.object_sin_theta() ** 2

    def collected_fraction(self) -> float:
        """Collection efficiency times lens transmission."""
        return self.collection_efficiency() * self.transmission

    def object_pixel_area_mm2(self, cam: Camera) -> float:
        """Area (mm^2) of the animal's surface seen by one (binned) camera pixel.

        Examples
        --------
        >>> round(Lens(2.0, 0.1).object_pixel_area_mm2(camera("ingaas")), 6)
        0.0225
        """
        side_mm = cam.effective_pixel_um / UM_PER_MM / self.magnification
        return side_mm**2


@dataclass(frozen=True)
class Channel:
    """One acquisition channel: excitation source, emission filter, camera, lens and exposure (s, optional)."""

    name: str
    source: Laser | LED
    emission_filter: Filter
    camera: Camera
    lens: Lens
    exposure_s: float | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.source, _GaussianSource):
            raise TypeError(f"source: expected a Laser or LED, got {type(self.source).__name__}")
        if not isinstance(self.emission_filter, Filter):
            raise TypeError(f"emission_filter: expected a Filter, got {type(self.emission_filter).__name__}")
        if not isinstance(self.camera, Camera):
            raise TypeError(f"camera: expected a Camera, got {type(self.camera).__name__}")
        if not isinstance(self.lens, Lens):
            raise TypeError(f"lens: expected a Lens, got {type(self.lens).__name__}")
        if self.exposure_s is not None:
            object.__setattr__(self, "exposure_s", _number(self.exposure_s, "exposure_s"))

