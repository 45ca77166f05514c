"""A study's result tables read back for display: measurements, group comparisons and kinetics.

The files and their columns are the study interchange formats that ``probeplan study`` writes
(``DIR/measurements.csv``, ``DIR/groups.csv``, ``DIR/kinetics.csv``, with ``#`` note lines first);
each reader checks that the required columns
are there and numeric where they must be, and refuses the file otherwise (one
:class:`~probeplan.errors.InputError` line naming the file, the column and the fix).
Extra columns are kept.  Tables are pandas DataFrames.
"""

from __future__ import annotations

import io
import os

from probeplan.errors import input_error

__all__ = ["REQUIRED_MEASUREMENT_COLUMNS", "REQUIRED_GROUP_COLUMNS", "REQUIRED_KINETICS_COLUMNS",
           "read_measurements", "read_groups", "read_kinetics"]

#: Required columns of each table (more may follow; the study run writes more, see probeplan.study.runs).
REQUIRED_MEASUREMENT_COLUMNS = ("animal", "group", "time_h", "roi", "component", "mean", "se", "tbr")
REQUIRED_GROUP_COLUMNS = ("time_h", "roi", "component", "quantity", "group_a", "group_b", "n_a", "n_b", "difference",
                 "ci_low", "ci_high", "p_welch", "p_rank", "p_adjusted")
REQUIRED_KINETICS_COLUMNS = ("animal", "roi", "component", "model", "half_life_h", "t_peak_h")

_NUMERIC = {
    "measurements": ("time_h", "mean", "se", "tbr"),
    "groups": ("time_h", "n_a", "n_b", "difference", "ci_low", "ci_high", "p_welch", "p_rank", "p_adjusted"),
    "kinetics": ("half_life_h", "t_peak_h"),
}
_TEXT = {"measurements": ("animal", "group", "roi", "component"), "groups": ("roi", "component", "quantity",
                                                                             "group_a", "group_b"),
         "kinetics": ("animal", "roi", "component", "model")}


def _read(source, kind: str, required: tuple[str, ...], name: str | None):
    import pandas as pd

    where = name or (str(source) if isinstance(source, (str, os.PathLike)) else f"{kind}.csv")
    try:
        if isinstance(source, bytes):
            source = io.BytesIO(source)
        df = pd.read_csv(source, comment="#", skipinitialspace=True, encoding="utf-8-sig")
    except FileNotFoundError:
        raise input_error(where, "does not exist", "give the study's results folder") from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, OSError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise input_error(where, f"cannot be read as CSV ({first})", f"give the study's {kind}.csv") from None
    df.columns = [str(c).strip() for c in df.columns]
    missing = [c for c in required if c not in df.columns]
    if missing:
        raise input_error(where, f"has no column {missing[0]!r}", f"give a {kind}.csv with {', '.join(required)}")
    if df.empty:
        raise input_error(where, "has no rows", f"give the study's {kind}.csv")
    for c in _TEXT[kind]:
        df[c] = df[c].astype(str).str.strip()
    for c in _NUMERIC[kind]:
        values = pd.to_numeric(df[c], errors="coerce")
        bad = values.isna() & df[c].notna() & (df[c].astype(str).str.strip() != "")
        if bad.any():
            row = int(bad.to_numpy().nonzero()[0][0]) + 2  # header is line 1
            raise input_error(f"{where}:{row}", f"{c} = {df[c].iloc[row - 2]!r} is not a number",
                              "write numbers (empty for missing)")
        df[c] = values.astype(float)
    return df


def read_measurements(source, *, name: str | None = None):
    """``measurements.csv``: one row per animal, time, ROI and component (path, bytes or file object)."""
    return _read(source, "measurements", REQUIRED_MEASUREMENT_COLUMNS, name)


def read_groups(source, *, name: str | None = None):
    """``groups.csv``: group comparisons per time, ROI, component and quantity."""
    return _read(source, "groups", REQUIRED_GROUP_COLUMNS, name)


def read_kinetics(source, *, name: str | None = None):
    """``kinetics.csv``: kinetics fits per animal, ROI and component."""
    return _read(source, "kinetics", REQUIRED_KINETICS_COLUMNS, name)


