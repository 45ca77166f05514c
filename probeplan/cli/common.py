"""Small helpers shared by the subcommands: printing tables as text or JSON."""

from __future__ import annotations

import contextlib
import json
import math
import sys
import warnings
from collections.abc import Iterator, Mapping, Sequence
from typing import Any

__all__ = ["print_table", "print_json", "format_value", "model_notes"]


def format_value(value: Any) -> str:
    """A short human-readable rendering of one table cell."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        if math.isnan(value):
            return "-"
        if value != 0 and (abs(value) >= 1e5 or abs(value) < 1e-3):
            return f"{value:.3e}"
        return f"{value:.4g}"
    return str(value)


def print_json(obj: Any) -> None:
    """Print ``obj`` as indented JSON to stdout (numpy values converted)."""
    from probeplan.io.atomic import _json_default

    sys.stdout.write(json.dumps(obj, indent=2, default=_json_default) + "\n")


def print_table(rows: Sequence[Mapping[str, Any]], columns: Sequence[str] | None = None, *, as_json: bool = False) -> None:
    """Print rows as an aligned text table, or as a JSON list with ``as_json``."""
    if as_json:
        print_json(list(rows))
        return
    if not rows:
        sys.stdout.write("(no rows)\n")
        return
    cols = list(columns) if columns is not None else list(rows[0].keys())
    cells = [[format_value(r.get(c, "")) for c in cols] for r in rows]
    widths = [max(len(c), *(len(row[i]) for row in cells)) for i, c in enumerate(cols)]
    sys.stdout.write("  ".join(c.ljust(w) for c, w in zip(cols, widths, strict=True)).rstrip() + "\n")
    sys.stdout.write("  ".join("-" * w for w in widths) + "\n")
    for row in cells:
        sys.stdout.write("  ".join(v.ljust(w) for v, w in zip(row, widths, strict=True)).rstrip() + "\n")


@contextlib.contextmanager
def model_notes() -> Iterator[list[str]]:
    """Collect the package's warnings raised inside the block as note lines (unique, sorted) instead of printing them.

    The list is filled when the block ends.
    """
    from probeplan.errors import ProbeplanWarning

    notes: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ProbeplanWarning)
        yield notes
    notes += sorted({str(w.message) for w in caught if issubclass(w.category, ProbeplanWarning)})
    for w in caught:
        if not issubclass(w.category, ProbeplanWarning):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
