"""Helpers shared by the subcommands: output options, option ranges, printing tables as text or JSON.

* :func:`add_output_options` gives a command that writes files its ``--overwrite`` option;
  :func:`probeplan.cli.main.main` runs every command inside an output policy (no existing
  file replaced unless it was written by this run or ``--overwrite`` is given) and an
  output batch (the files of the run appear together when it succeeds, none when it fails).
* :data:`OPTION_RANGES` is the one table of allowed ranges for every numeric option of every
  command, keyed by the option's ``dest``; :func:`check_option_ranges` checks a parsed
  command line against it before any work (``main`` calls it).
"""

from __future__ import annotations

import argparse
import contextlib
import math
import sys
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

__all__ = ["print_table", "print_json", "format_value", "model_notes", "add_output_options", "OptionRange",
           "OPTION_RANGES", "check_option_ranges", "numeric_options"]


@dataclass(frozen=True)
class OptionRange:
    """Allowed values of a numeric option: ``low`` to ``high`` (``low`` excluded when ``open_low``)."""

    low: float
    high: float
    unit: str = ""
    open_low: bool = False

    def describe(self) -> str:
        """``"1 to 64"``, ``"above 0 up to 3600 s"``, ``"above 0 counts"``."""
        unit = f" {self.unit}" if self.unit else ""
        if math.isinf(self.high):
            return f"{'above' if self.open_low else 'at least'} {self.low:g}{unit}"
        if self.open_low:
            return f"above {self.low:g} up to {self.high:g}{unit}"
        return f"{self.low:g} to {self.high:g}{unit}"

    def contains(self, value: float) -> bool:
        v = float(value)
        if math.isnan(v):
            return False
        return (v > self.low if self.open_low else v >= self.low) and v <= self.high


def _r(low, high, unit="", open_low=False):
    return OptionRange(float(low), float(high), unit, open_low)


#: Allowed range of every numeric command-line option, by ``dest`` (one meaning per name across
#: commands).  Physical limits where they exist (wavelengths of the far-red to NIR-II windows, an
#: aperture's f-number, a probability); elsewhere practical limits well beyond any real study, chosen
#: so that no value can make a command run for hours or eat the machine's memory.  A test checks that
#: every numeric option of every command is listed here.
OPTION_RANGES: dict[str, OptionRange] = {
    # light and optics
    "excitation_nm": _r(200, 3000, "nm"),
    "linewidth_nm": _r(0, 500, "nm", True),
    "led_fwhm_nm": _r(0, 500, "nm", True),
    "irradiance": _r(0, 1e5, "mW/cm^2", True),
    "illumination_s": _r(0, 86400, "s", True),
    "f_number": _r(0.5, 64),
    "magnification": _r(0, 100, "", True),
    "binning": _r(1, 64),
    "exposure_s": _r(0, 3600, "s", True),
    # target and probes
    "extinction": _r(0, 1e9, "M^-1 cm^-1", True),
    "size_mm": _r(0, 100, "mm", True),
    "concentration_uM": _r(0, 1e6, "uM", True),
    "uptake_ratio": _r(1, 1e6),
    "af_yield": _r(0, 100, "cm^-1"),
    "depth_mm": _r(0, 100, "mm"),
    "depth_max_mm": _r(0, 100, "mm", True),
    "depth_step_mm": _r(0.001, 100, "mm"),
    "sbr_threshold": _r(0, 1e6, "", True),
    # design search
    "k": _r(1, 16, "probes"),
    "channels": _r(1, 64, "channels"),
    "top": _r(1, 1000, "combinations"),
    # dots calculator
    "peak": _r(200, 3000, "nm"),
    "emission": _r(200, 3000, "nm"),
    "diameter": _r(0, 100, "nm", True),
    "absorbance": _r(0, 10),
    "path_cm": _r(0, 100, "cm", True),
    "dose_nmol_per_kg": _r(0, 1e6, "nmol/kg", True),
    "volume_ul": _r(0, 1e5, "uL", True),
    "mass_g": _r(0, 5000, "g", True),
    "stock_uM": _r(0, 1e6, "uM", True),
    "shell_nm": _r(0, 100, "nm"),
    # phantoms
    "wavelength_nm": _r(200, 3000, "nm"),
    "mu_a": _r(0, 1000, "cm^-1"),
    "mu_s_prime": _r(0, 1000, "cm^-1", True),
    "diameter_um": _r(0, 100, "um", True),
    "batch_ml": _r(0, 1e5, "mL", True),
    # unmixing
    "channel_axis": _r(-8, 7),
    "saturation": _r(0, math.inf, "counts", True),
    "gain": _r(0, 1e6, "e-/count", True),
    "read_noise": _r(0, 1e6, "e- rms"),
    "min_snr": _r(0, 1e6, ""),
    "confidence": _r(0, 1, "", True),
    "memory_mb": _r(0, 1e6, "MiB", True),
    # the page
    "port": _r(1, 65535),
    "max_upload_mb": _r(1, 10000, "MB"),
}


def numeric_options(parser: argparse.ArgumentParser) -> Iterator[tuple[argparse.Action, argparse.ArgumentParser]]:
    """Every option of ``parser`` (and of its nested sub-commands) that takes an int or a float."""
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for sub in dict.fromkeys(action.choices.values()):
                yield from numeric_options(sub)
        elif action.type in (int, float):
            yield action, parser


def check_option_ranges(args: argparse.Namespace, parser: argparse.ArgumentParser) -> None:
    """Refuse any numeric option of ``args`` outside :data:`OPTION_RANGES` (before any work).

    Raises
    ------
    InputError
        ``--option: got VALUE, allowed LOW to HIGH UNIT; give a value in that range``.
    """
    from probeplan.errors import input_error

    for action, _ in numeric_options(parser):
        value = getattr(args, action.dest, None)
        rng = OPTION_RANGES.get(action.dest)
        if value is None or rng is None:
            continue
        for v in value if isinstance(value, list) else [value]:
            if not rng.contains(v):
                shown = f"{v:g}" if isinstance(v, float) else str(v)
                raise input_error(action.option_strings[-1] if action.option_strings else action.dest,
                                  f"got {shown}, allowed {rng.describe()}", "give a value in that range")


def add_output_options(parser: argparse.ArgumentParser) -> None:
    """Add ``--overwrite`` to a command that writes files (see the module notes)."""
    parser.add_argument("--overwrite", action="store_true",
                        help="replace output files that already exist (by default an existing file is never replaced)")


def format_value(value: Any) -> str:
    """One table cell as text: the package's one formatter (:func:`probeplan.format.format_value`)."""
    from probeplan.format import format_value as _format

    return _format(value)


def print_json(obj: Any) -> None:
    """Print ``obj`` as indented, strict JSON to stdout (the package's one JSON writer)."""
    from probeplan.io.atomic import json_text

    sys.stdout.write(json_text(obj))


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
    from probeplan.notes import collect_notes

    notes: list[str] = []
    with collect_notes() as collected:
        yield notes
    notes += sorted(collected)
