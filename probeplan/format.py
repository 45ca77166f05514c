"""The one number formatter: how the command line, the page and the report write a number.

Significant figures (4 unless said), scientific notation outside 1e-3 .. 1e5 where it keeps the
figure short, ``–`` for a missing value (None or NaN), ``∞`` / ``−∞`` for infinite ones, ``yes`` /
``no`` for booleans; anything else as ``str``.
"""

from __future__ import annotations

import math
from typing import Any

__all__ = ["format_number", "format_value", "column_label", "MISSING", "DEFAULT_DIGITS"]

#: Shown for a missing value (None or NaN).
MISSING = "–"
#: Significant figures unless said.
DEFAULT_DIGITS = 4
#: Magnitudes outside [_SMALL, _LARGE) are written in scientific notation.
_SMALL, _LARGE = 1e-3, 1e5


def format_number(value: float | None, digits: int = DEFAULT_DIGITS) -> str:
    """A number as short text for tables: ``digits`` significant figures, scientific outside 1e-3..1e5.

    Examples
    --------
    >>> format_number(0.123456), format_number(1.5e6), format_number(float("inf")), format_number(float("nan"))
    ('0.1235', '1.500e+06', '∞', '–')
    >>> format_number(-float("inf")), format_number(0.0), format_number(2.5e-4, 3), format_number(1500.0, 3)
    ('−∞', '0', '2.50e-04', '1500')
    >>> format_number(2.4000000000000004), format_number(0.0046, 2), format_number(None)
    ('2.4', '0.0046', '–')
    """
    if value is None:
        return MISSING
    value = float(value)
    if math.isnan(value):
        return MISSING
    if math.isinf(value):
        return "∞" if value > 0 else "−∞"
    if value != 0 and (abs(value) >= _LARGE or abs(value) < _SMALL):
        return f"{value:.{digits - 1}e}"
    if value == 0:
        return "0"
    # fixed notation rounded to ``digits`` significant figures, trailing zeros dropped ('g' would switch to
    # exponents for 1500 at 3 figures)
    decimals = max(0, digits - 1 - math.floor(math.log10(abs(value))))
    text = f"{round(value, decimals):.{decimals}f}"
    return text.rstrip("0").rstrip(".") if "." in text else text


def format_value(value: Any, digits: int = DEFAULT_DIGITS) -> str:
    """One table cell as text: numbers by :func:`format_number`, None as ``–``, booleans as yes/no.

    Examples
    --------
    >>> [format_value(v) for v in (None, True, 3, 0.5, "CdTe")]
    ['–', 'yes', '3', '0.5', 'CdTe']
    """
    if value is None:
        return MISSING
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float) or hasattr(value, "__float__") and not isinstance(value, str):
        try:
            return format_number(float(value), digits)
        except (TypeError, ValueError):
            return str(value)
    return str(value)


#: Unit suffixes of column names and how a reader writes them (longest first).
_UNIT_SUFFIXES = (
    ("_mw_per_cm2", "mW/cm²"), ("_j_per_cm2", "J/cm²"),
    ("_nmol_per_kg", "nmol/kg"), ("_ml_per_kg", "mL/kg"), ("_e_per_s", "e⁻/s"), ("_per_m_cm", "M⁻¹ cm⁻¹"),
    ("_per_cm", "cm⁻¹"), ("_ul", "µL"), ("_ml", "mL"), ("_um", "µm"), ("_uM", "µM"), ("_mm", "mm"), ("_nm", "nm"),
    ("_mw", "mW"), ("_min", "min"), ("_s", "s"), ("_h", "h"), ("_g", "g"), ("_e", "e⁻"),
)
_WORDS = {"sbr": "SBR", "snr": "SNR", "tbr": "TBR", "mpe": "MPE", "fwhm": "FWHM", "qc": "QC", "rms": "RMS", "od": "OD"}


def column_label(name: str) -> str:
    """A column name as a reader writes it: words, acronyms in capitals, the unit in brackets.

    Examples
    --------
    >>> column_label("volume_ul"), column_label("skin_mpe_mw_per_cm2"), column_label("sbr"), column_label("probe")
    ('volume (µL)', 'skin MPE (mW/cm²)', 'SBR', 'probe')
    """
    if " " in name or not name:
        return name
    unit = ""
    for suffix, text in _UNIT_SUFFIXES:
        if name.endswith(suffix) and len(name) > len(suffix):
            name, unit = name[: -len(suffix)], text
            break
    words = [_WORDS.get(w, w) for w in name.split("_")]
    return " ".join(words) + (f" ({unit})" if unit else "")
