"""Wavelength grids, spectra, the one resampling rule, and spectra CSV import.

Units: wavelength in nm everywhere.  A :class:`WavelengthGrid` is a small,
hashable value object so results computed on it can be cached.  A
:class:`Spectrum` holds values on increasing wavelengths with a name, a unit, a
kind and its provenance.

The resampling rule (one rule, used everywhere)
-----------------------------------------------
Values are interpolated linearly between tabulated wavelengths.  Outside the
spectrum's own tabulated range:

* curves that describe light or optics (kinds ``"emission"``, ``"excitation"``,
  ``"filter"``, ``"qe"``) are taken as **zero**, and a note saying so is recorded
  on the resampled spectrum (``Spectrum.notes``);
* material properties (kind ``"material"``: absorption, extinction, scattering)
  are **refused** with :class:`~probeplan.errors.InputError` naming the valid range.
"""

from __future__ import annotations

import csv
import io
import math
import re
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

import numpy as np

from probeplan.errors import input_error

__all__ = [
    "WavelengthGrid",
    "grid_nm",
    "Spectrum",
    "SPECTRUM_KINDS",
    "as_wavelengths_nm",
    "read_spectra_csv",
    "parse_spectra_text",
]

SpectrumKind = Literal["emission", "excitation", "filter", "qe", "material", "other"]
#: Kinds of spectra; those in ``_ZERO_OUTSIDE`` are zero outside their range.
SPECTRUM_KINDS: tuple[str, ...] = ("emission", "excitation", "filter", "qe", "material", "other")
_ZERO_OUTSIDE = frozenset({"emission", "excitation", "filter", "qe"})
_NON_NEGATIVE = frozenset({"emission", "excitation", "filter", "qe", "material"})

#: Largest wavelength (nm) accepted anywhere: beyond the short-wave infrared.
MAX_WAVELENGTH_NM = 3000.0
#: Smallest wavelength (nm) accepted anywhere: the near ultraviolet.
MIN_WAVELENGTH_NM = 200.0
#: A wavelength column whose values all lie below this looks like micrometres.
_MICROMETRE_SUSPECT_NM = 20.0


def as_wavelengths_nm(wavelength_nm, *, name: str = "wavelength_nm") -> np.ndarray:
    """Return wavelengths as a float64 array, refusing NaN, inf and non-positive values.

    Parameters
    ----------
    wavelength_nm : array_like
        Wavelengths in nm, any shape.
    name : str
        Parameter name used in error messages.

    Returns
    -------
    ndarray
        float64 array of the same shape.

    Raises
    ------
    InputError
        On NaN, inf, values <= 0, or values that look like micrometres.
    TypeError
        On non-numeric input.
    """
    try:
        arr = np.asarray(wavelength_nm, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise TypeError(f"{name}: expected numbers in nm, got {wavelength_nm!r}") from exc
    if not arr.size:
        return arr
    # two reductions check everything (the model validates its grids often): NaN propagates into min and
    # max, and an infinity shows in one of them
    lo, hi = float(arr.min()), float(arr.max())
    if not (math.isfinite(lo) and math.isfinite(hi)):
        raise input_error(name, "contains NaN or inf", "give finite wavelengths in nm")
    if lo <= 0:
        raise input_error(name, f"got {lo:g}, wavelengths must be > 0", "give wavelengths in nm")
    if hi < _MICROMETRE_SUSPECT_NM:
        raise input_error(
            name,
            f"largest value is {hi:g}, which looks like micrometres",
            "convert to nm (multiply by 1000)",
        )
    return arr


@dataclass(frozen=True)
class WavelengthGrid:
    """A regular wavelength grid in nm: ``start_nm``, ``stop_nm`` (inclusive), ``step_nm``.

    Built with :func:`numpy.linspace` from the point count, so the end point is
    exact.  Hashable: usable as a cache key.

    Examples
    --------
    >>> g = WavelengthGrid(600, 700, 10)
    >>> len(g), float(g.wavelengths_nm[-1])
    (11, 700.0)
    >>> WavelengthGrid(600, 700, 10) == g
    True
    """

    start_nm: float
    stop_nm: float
    step_nm: float = 1.0

    def __post_init__(self) -> None:
        for key in ("start_nm", "stop_nm", "step_nm"):
            value = getattr(self, key)
            if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
                raise TypeError(f"{key}: expected a number in nm, got {value!r}")
            if not math.isfinite(float(value)):
                raise input_error(key, f"got {value!r}", "give a finite number in nm")
            object.__setattr__(self, key, float(value))
        if self.step_nm <= 0:
            raise input_error("step_nm", f"got {self.step_nm:g}, expected > 0", "give a positive step in nm")
        if self.stop_nm <= self.start_nm:
            raise input_error(
                "stop_nm", f"got {self.stop_nm:g} <= start_nm {self.start_nm:g}", "give stop_nm > start_nm"
            )
        as_wavelengths_nm([self.start_nm, self.stop_nm], name="WavelengthGrid")
        span = (self.stop_nm - self.start_nm) / self.step_nm
        if abs(span - round(span)) > 1e-6 * max(1.0, span):
            raise input_error(
                "step_nm",
                f"{self.step_nm:g} nm does not divide {self.start_nm:g}-{self.stop_nm:g} nm",
                "choose a step that divides the span",
            )
        if round(span) + 1 > 1_000_000:
            raise input_error("step_nm", f"grid of {round(span) + 1} points", "use a coarser step")

    @classmethod
    def from_count(cls, start_nm: float, stop_nm: float, count: int) -> WavelengthGrid:
        """Grid of ``count`` points from ``start_nm`` to ``stop_nm`` inclusive."""
        if count < 2:
            raise input_error("count", f"got {count}", "give at least 2 points")
        return cls(start_nm, stop_nm, (stop_nm - start_nm) / (count - 1))

    def __len__(self) -> int:
        return int(round((self.stop_nm - self.start_nm) / self.step_nm)) + 1

    @property
    def wavelengths_nm(self) -> np.ndarray:
        """The grid points in nm, shape ``(len(self),)``."""
        return np.linspace(self.start_nm, self.stop_nm, len(self))


def grid_nm(start_nm: float, stop_nm: float, step_nm: float = 1.0, *, include_stop: bool = True) -> np.ndarray:
    """The wavelengths ``start_nm``, ``start_nm + step_nm``, ... up to ``stop_nm`` (nm): every regular grid of the package.

    The last point is the last multiple of the step from ``start_nm`` at or below ``stop_nm``
    (below it when ``include_stop`` is False); a span shorter than one step gives ``start_nm``
    alone.  The points come from :class:`WavelengthGrid` (``numpy.linspace`` over the point
    count, so no rounding drift accumulates).

    Examples
    --------
    >>> grid_nm(600, 620, 5).tolist(), grid_nm(600, 622.5, 5).tolist(), grid_nm(600, 620, 5, include_stop=False).tolist()
    ([600.0, 605.0, 610.0, 615.0, 620.0], [600.0, 605.0, 610.0, 615.0, 620.0], [600.0, 605.0, 610.0, 615.0])
    >>> grid_nm(700, 700, 10).tolist()
    [700.0]
    """
    start, stop, step = float(start_nm), float(stop_nm), float(step_nm)
    if not (math.isfinite(step) and step > 0):
        raise input_error("step_nm", f"got {step_nm!r}", "give a positive step in nm")
    if not (math.isfinite(start) and math.isfinite(stop)) or stop < start:
        raise input_error("stop_nm", f"got {start_nm!r}-{stop_nm!r}", "give finite wavelengths with stop_nm >= start_nm")
    n_steps = math.floor((stop - start) / step + 1e-9)
    if not include_stop and n_steps >= 1 and abs(start + n_steps * step - stop) <= 1e-9 * max(1.0, abs(stop)):
        n_steps -= 1
    if n_steps < 1:
        return np.array([start])
    return WavelengthGrid(start, start + n_steps * step, step).wavelengths_nm


def _check_increasing(wavelength_nm: np.ndarray, where: str) -> None:
    if wavelength_nm.ndim != 1 or wavelength_nm.size < 2:
        raise input_error(where, "needs at least two wavelengths in a 1-D array", "tabulate the spectrum")
    bad = np.nonzero(np.diff(wavelength_nm) <= 0)[0]
    if bad.size:
        i = int(bad[0]) + 1
        raise input_error(
            where,
            f"wavelength {wavelength_nm[i]:g} nm at position {i} is not greater than the one before",
            "sort the rows by strictly increasing wavelength and remove duplicates",
        )


@dataclass(frozen=True, eq=False)
class Spectrum:
    """Values tabulated on strictly increasing wavelengths (nm).

    Parameters
    ----------
    wavelength_nm : array_like, shape (N,)
        Strictly increasing wavelengths in nm.
    values : array_like, shape (N,)
        The tabulated quantity, in ``unit``.
    name : str
        What the spectrum is (e.g. ``"HbO2"``, ``"probe 1 emission"``).
    unit : str
        Unit of ``values`` (``"1"`` for dimensionless fractions).
    kind : {"emission", "excitation", "filter", "qe", "material", "other"}
        Decides the resampling rule outside the tabulated range (module docs).
    provenance : str
        Where the numbers come from.
    notes : tuple of str
        Notes recorded by operations (e.g. zero-filled outside the range).
    """

    wavelength_nm: np.ndarray
    values: np.ndarray
    name: str = "spectrum"
    unit: str = "1"
    kind: str = "other"
    provenance: str = "unspecified"
    notes: tuple[str, ...] = field(default=())

    def __post_init__(self) -> None:
        if self.kind not in SPECTRUM_KINDS:
            raise input_error("kind", f"got {self.kind!r}", f"use one of {', '.join(SPECTRUM_KINDS)}")
        wl = as_wavelengths_nm(self.wavelength_nm, name=f"{self.name}: wavelength_nm")
        try:
            vals = np.asarray(self.values, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise TypeError(f"{self.name}: values must be numbers, got {self.values!r}") from exc
        _check_increasing(wl, f"{self.name}: wavelength_nm")
        if vals.shape != wl.shape:
            raise input_error(
                f"{self.name}: values", f"shape {vals.shape} differs from wavelengths {wl.shape}", "give one value per wavelength"
            )
        if not np.all(np.isfinite(vals)):
            raise input_error(f"{self.name}: values", "contain NaN or inf", "fill or remove those rows")
        if self.kind in _NON_NEGATIVE and np.any(vals < 0):
            raise input_error(
                f"{self.name}: values", f"minimum {vals.min():g} is negative", f"a {self.kind} spectrum must be >= 0"
            )
        wl.setflags(write=False)
        vals.setflags(write=False)
        object.__setattr__(self, "wavelength_nm", wl)
        object.__setattr__(self, "values", vals)
        object.__setattr__(self, "notes", tuple(self.notes))

    @property
    def range_nm(self) -> tuple[float, float]:
        """First and last tabulated wavelength (nm)."""
        return float(self.wavelength_nm[0]), float(self.wavelength_nm[-1])

    def values_at(self, wavelength_nm) -> np.ndarray:
        """Values at any wavelengths (nm, any shape) by the module's resampling rule.

        Raises
        ------
        InputError
            For a material property asked for outside its tabulated range.
        """
        wl = as_wavelengths_nm(wavelength_nm)
        lo, hi = self.range_nm
        outside = (wl < lo) | (wl > hi)
        if np.any(outside) and self.kind not in _ZERO_OUTSIDE:
            bad = wl[outside].flat[0]
            raise input_error(
                f"{self.name}",
                f"asked at {bad:g} nm, outside the tabulated {lo:g}-{hi:g} nm",
                "stay inside that range or supply a wider table",
            )
        return np.interp(wl, self.wavelength_nm, self.values, left=0.0, right=0.0)

    def resample(self, grid: WavelengthGrid | Iterable[float]) -> Spectrum:
        """This spectrum on another grid, by the module's resampling rule.

        A note is recorded when part of the new grid lies outside the tabulated
        range and was set to zero.
        """
        wl = grid.wavelengths_nm if isinstance(grid, WavelengthGrid) else as_wavelengths_nm(list(grid))
        values = self.values_at(wl)
        notes = self.notes
        lo, hi = self.range_nm
        if wl.min() < lo or wl.max() > hi:
            notes = notes + (
                f"set to zero outside its tabulated {lo:g}-{hi:g} nm when resampled to {wl.min():g}-{wl.max():g} nm",
            )
        return Spectrum(wl, values, self.name, self.unit, self.kind, self.provenance, notes)

    def integrate(self, lo_nm: float | None = None, hi_nm: float | None = None) -> float:
        """Integral over wavelength (trapezoid rule), in ``unit``·nm.

        With ``lo_nm``/``hi_nm`` the integral runs over that band; the band's
        end points are interpolated by the resampling rule.
        """
        wl, vals = self.wavelength_nm, self.values
        if lo_nm is not None or hi_nm is not None:
            lo = self.range_nm[0] if lo_nm is None else float(lo_nm)
            hi = self.range_nm[1] if hi_nm is None else float(hi_nm)
            if hi <= lo:
                raise input_error("hi_nm", f"{hi:g} <= lo_nm {lo:g}", "give hi_nm > lo_nm")
            inner = wl[(wl > lo) & (wl < hi)]
            wl = np.concatenate([[lo], inner, [hi]])
            vals = self.values_at(wl)
        return float(np.trapezoid(vals, wl))

    def normalised(self, method: Literal["peak", "area"] = "peak") -> Spectrum:
        """Scaled to unit peak (``"peak"``) or unit area per nm (``"area"``)."""
        if method == "peak":
            scale = float(np.max(np.abs(self.values)))
            unit = "1 (peak = 1)"
        elif method == "area":
            scale = self.integrate()
            unit = "1/nm (area = 1)"
        else:
            raise input_error("method", f"got {method!r}", "use 'peak' or 'area'")
        if scale == 0:
            raise input_error(self.name, "is zero everywhere", "cannot normalise a zero spectrum")
        return Spectrum(
            self.wavelength_nm, self.values / scale, self.name, unit, self.kind, self.provenance, self.notes
        )

    @property
    def peak_nm(self) -> float:
        """Wavelength of the largest value (nm)."""
        return float(self.wavelength_nm[int(np.argmax(self.values))])


# --------------------------------------------------------------------------- CSV import

_HEADER_RE = re.compile(r"^\s*(?P<name>[^\[\(]+?)\s*(?:[\[\(](?P<unit>[^\]\)]*)[\]\)])?\s*$")
_WAVELENGTH_NAMES = {"wavelength_nm", "wavelength", "lambda", "wl", "wavelength_um", "wavelength_µm"}


def _split_header(cell: str) -> tuple[str, str | None]:
    m = _HEADER_RE.match(cell)
    if not m:
        return cell.strip(), None
    return m.group("name").strip(), (m.group("unit") or None)


def parse_spectra_text(
    text: str,
    *,
    source: str = "<text>",
    kind: str = "other",
    unit: str | None = None,
) -> dict[str, Spectrum]:
    """Parse spectra from CSV or TSV text (see :func:`read_spectra_csv`)."""
    if kind not in SPECTRUM_KINDS:
        raise input_error("kind", f"got {kind!r}", f"use one of {', '.join(SPECTRUM_KINDS)}")
    lines = text.splitlines()
    provenance_lines: list[str] = []
    rows: list[tuple[int, list[str]]] = []
    for lineno, raw in enumerate(lines, start=1):
        stripped = raw.strip()
        if not stripped:
            continue
        if stripped.startswith("#"):
            provenance_lines.append(stripped.lstrip("#").strip())
            continue
        rows.append((lineno, raw))  # type: ignore[arg-type]
    if not rows:
        raise input_error(source, "no header and no data rows", "start with a header such as 'wavelength_nm,probe_1'")
    header_line, header_raw = rows[0]
    delimiter = "\t" if "\t" in header_raw else ("," if "," in header_raw else ";" if ";" in header_raw else ",")
    parsed = list(csv.reader(io.StringIO("\n".join(r for _, r in rows)), delimiter=delimiter))
    header = [c.strip() for c in parsed[0]]
    first_name, first_unit = _split_header(header[0]) if header else ("", None)
    first_key = first_name.lower().replace(" ", "_")
    unit_hint = (first_unit or "").strip().lower()
    if first_key in {"wavelength_um", "wavelength_µm"} or unit_hint in {"um", "µm", "micron", "microns"}:
        raise input_error(
            f"{source}:{header_line}",
            f"wavelength column {header[0]!r} is in micrometres",
            "convert wavelengths to nm (multiply by 1000) and name the column 'wavelength_nm'",
        )
    if first_key not in _WAVELENGTH_NAMES:
        try:
            float(header[0])
            problem = "the first row is numbers, not a header"
        except ValueError:
            problem = f"first column is {header[0]!r}, not a wavelength"
        raise input_error(
            f"{source}:{header_line}",
            problem,
            "start with a header row whose first column is 'wavelength_nm' and one named column per spectrum",
        )
    if unit_hint and unit_hint not in {"nm"}:
        raise input_error(
            f"{source}:{header_line}", f"wavelength unit {first_unit!r} is not nm", "give wavelengths in nm"
        )
    if len(header) < 2:
        raise input_error(f"{source}:{header_line}", "only a wavelength column", "add at least one spectrum column")
    names: list[str] = []
    units: list[str | None] = []
    for col, cell in enumerate(header[1:], start=2):
        name, col_unit = _split_header(cell)
        if not name:
            raise input_error(f"{source}:{header_line}", f"column {col} has no name", "name every column")
        if name in names:
            raise input_error(f"{source}:{header_line}", f"column name {name!r} appears twice", "make names unique")
        names.append(name)
        units.append(col_unit)
    data = np.empty((len(parsed) - 1, len(header)), dtype=np.float64)
    for r, cells in enumerate(parsed[1:]):
        lineno = rows[r + 1][0]
        if len(cells) != len(header):
            raise input_error(
                f"{source}:{lineno}",
                f"{len(cells)} fields where the header has {len(header)}",
                "give one value per column on every row",
            )
        for c, cell in enumerate(cells):
            try:
                value = float(cell)
            except ValueError:
                raise input_error(
                    f"{source}:{lineno}",
                    f"column {header[c]!r}: {cell.strip()!r} is not a number",
                    "use plain decimal numbers (a '.' decimal point, no units in the cells)",
                ) from None
            if not math.isfinite(value):
                raise input_error(
                    f"{source}:{lineno}", f"column {header[c]!r}: {cell.strip()!r} is not finite", "fill or remove that row"
                )
            data[r, c] = value
    if data.shape[0] < 2:
        raise input_error(source, f"{data.shape[0]} data rows", "tabulate at least two wavelengths")
    wl = data[:, 0]
    if wl.max() < _MICROMETRE_SUSPECT_NM:
        raise input_error(
            f"{source}:{rows[1][0]}",
            f"wavelengths {wl.min():g}-{wl.max():g} look like micrometres",
            "convert wavelengths to nm (multiply by 1000)",
        )
    diffs = np.diff(wl)
    if np.any(diffs <= 0):
        i = int(np.nonzero(diffs <= 0)[0][0]) + 1
        raise input_error(
            f"{source}:{rows[i + 1][0]}",
            f"wavelength {wl[i]:g} nm is not greater than the previous {wl[i - 1]:g} nm",
            "sort rows by strictly increasing wavelength and remove duplicates",
        )
    if wl[0] < MIN_WAVELENGTH_NM or wl[-1] > MAX_WAVELENGTH_NM:
        raise input_error(
            f"{source}:{rows[1][0]}",
            f"wavelengths {wl[0]:g}-{wl[-1]:g} nm lie outside {MIN_WAVELENGTH_NM:g}-{MAX_WAVELENGTH_NM:g} nm",
            "check the wavelength unit (nm expected)",
        )
    provenance = " ".join(provenance_lines) or f"user file {source}"
    out: dict[str, Spectrum] = {}
    for c, name in enumerate(names, start=1):
        col = data[:, c]
        if kind in _NON_NEGATIVE and np.any(col < 0):
            r = int(np.nonzero(col < 0)[0][0])
            raise input_error(
                f"{source}:{rows[r + 1][0]}",
                f"column {name!r} is negative ({col[r]:g})",
                f"a {kind} spectrum cannot be negative: correct the baseline or clip at zero",
            )
        out[name] = Spectrum(wl.copy(), col.copy(), name, units[c - 1] or unit or "1", kind, provenance)
    return out


def read_spectra_csv(
    path: str | Path,
    *,
    kind: str = "other",
    unit: str | None = None,
) -> dict[str, Spectrum]:
    """Read one or more spectra from a CSV or TSV file.

    The file has optional ``#`` comment lines (kept as provenance), then a
    header whose first column is ``wavelength_nm`` (or ``wavelength (nm)``) and
    whose other columns name the spectra, optionally with a unit in brackets
    (``probe_1 [a.u.]``), then numeric rows.

    Parameters
    ----------
    path : str or Path
        The file; it is only read, never modified.
    kind : str
        Spectrum kind for all columns (decides non-negativity and resampling).
    unit : str, optional
        Unit for columns whose header gives none.

    Returns
    -------
    dict of str to Spectrum
        One spectrum per column, in file order.

    Raises
    ------
    InputError
        Naming the file, the line and the fix: missing header, wavelengths in
        µm, not strictly increasing, NaN or text cells, negative values where
        physical, ragged rows.
    """
    from probeplan.io.text import read_text_input

    p = Path(path)
    text = read_text_input(p, what="spectra file")
    if not text.strip():
        raise input_error(str(p), "is empty", "give a header row and data rows")
    return parse_spectra_text(text, source=str(p), kind=kind, unit=unit)

