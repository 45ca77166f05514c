"""The one number formatter: how the command line, the page and the report write a number.

Significant figures (4 unless said), scientific notation outside 1e-3 .. 1e5 where it keeps the
figure short, ``–`` for a missing value (None or NaN), ``∞`` / ``−∞`` for infinite ones, ``yes`` /
``no`` for booleans; anything else as ``str``.
"""

from __future__ import annotations

import math
from typing import Any

__all__ = ["format_number", "format_value", "MISSING", "DEFAULT_DIGITS"]

#: Shown for a missing value (None or NaN).
MISSING = "–"
#: Significant figures unless said.
DEFAULT_DIGITS = 4
#: Magnitudes outside [_SMALL, _LARGE) are written in scientific notation.
_SMALL, _LARGE = 1e-3, 1e5


def format_number(value: float, digits: int = DEFAULT_DIGITS) -> str:
    """A number as short text for tables: ``digits`` significant figures, scientific outside 1e-3..1e5.

    Examples
    --------
    >>> format_number(0.123456), format_number(1.5e6), format_number(float("inf")), format_number(float("nan"))
    ('0.1235', '1.500e+06', '∞', '–')
    >>> format_number(-float("inf")), format_number(0.0), format_number(2.5e-4, 3)
    ('−∞', '0', '2.50e-04')
    """
    value = float(value)
    if math.isnan(value):
        return MISSING
    if math.isinf(value):
        return "∞" if value > 0 else "−∞"
    if value != 0 and (abs(value) >= _LARGE or abs(value) < _SMALL):
        return f"{value:.{digits - 1}e}"
    return f"{value:.{digits}g}"


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
