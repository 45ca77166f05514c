"""The study table (``STUDY.csv``): which file holds which animal, group, time point and channel.

One row per file with the columns ``animal, group, time_h, file`` and, when a file holds a
single channel, ``channel`` (the file format is a stable interface).  Rows with the same
animal and time point and a ``channel`` each are assembled into one acquisition, matched to
the reference spectra by channel name.  A row whose ``channel`` cell is empty is a file
holding every channel.  Relative paths are relative to the table's folder.  Lines starting
with ``#`` are comments.

Everything is checked before any image is read: unknown or missing columns, empty cells,
times that are not finite numbers >= 0, an animal listed in two groups, a duplicate
animal x time (x channel) row, a missing file.  Each refusal names the file, the line and
the fix.
"""

from __future__ import annotations

import csv
import io
import math
import os
import re
from dataclasses import dataclass
from pathlib import Path

from probeplan.errors import input_error

__all__ = ["Acquisition", "read_study_table", "REQUIRED_COLUMNS", "OPTIONAL_COLUMNS"]

REQUIRED_COLUMNS = ("animal", "group", "time_h", "file")
OPTIONAL_COLUMNS = ("channel",)


@dataclass(frozen=True)
class Acquisition:
    """One animal at one time point: a multi-channel file, or one file per channel.

    Attributes
    ----------
    animal, group : str
    time_h : float
        Hours after injection (or the study's own time origin).
    files : tuple of Path (or str: the fsspec URL of an OME-Zarr image)
    channels : tuple of str or None
        The channel name of each file (one file per channel), or None for one multi-channel file.
    lines : tuple of int
        Lines of the study table these came from (for messages).
    key : str
        A name safe for files, unique in the study (``<animal>_<time>h``).
    where : str
        ``STUDY.csv:LINE[,LINE...]`` for messages.
    """

    animal: str
    group: str
    time_h: float
    files: tuple[Path, ...]
    channels: tuple[str, ...] | None
    lines: tuple[int, ...]
    key: str
    where: str


_FIX_COLUMNS = "give the columns animal, group, time_h, file and optionally channel"


def _is_zarr(path) -> bool:
    from probeplan.io.ngff import is_ome_zarr

    return is_ome_zarr(path)



def _safe(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "_", text).strip("._") or "x"


def read_study_table(path: str | os.PathLike) -> list[Acquisition]:
    """Read and check ``STUDY.csv``; return the acquisitions in table order.

    Parameters
    ----------
    path : path-like

    Returns
    -------
    list of Acquisition

    Raises
    ------
    InputError
        Naming the file, the line and the fix (see the module notes).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> for n in ("m1.tif", "m2_a.tif", "m2_b.tif"):
    ...     _ = (d / n).write_bytes(b"")
    >>> _ = (d / "study.csv").write_text("animal,group,time_h,file,channel\\n"
    ...     "m1,ctrl,24,m1.tif,\\nm2,treated,24,m2_a.tif,700/30\\nm2,treated,24,m2_b.tif,800/40\\n")
    >>> [(a.animal, a.time_h, a.channels) for a in read_study_table(d / "study.csv")]
    [('m1', 24.0, None), ('m2', 24.0, ('700/30', '800/40'))]
    """
    # The csv module rather than pandas: messages name the line of the file, and pandas does
    # not keep line numbers once comment lines are dropped.
    from probeplan.io.text import read_text_input

    path = Path(path)
    where = str(path)
    text = read_text_input(path, what="study table CSV")
    lines = [(i + 1, line) for i, line in enumerate(text.splitlines()) if line.strip() and not line.lstrip().startswith("#")]
    if not lines:
        raise input_error(where, "holds no header and no rows", _FIX_COLUMNS)
    try:
        parsed = list(csv.reader(io.StringIO("\n".join(line for _, line in lines)), strict=True))
    except csv.Error as exc:
        raise input_error(where, f"is not valid CSV ({exc})", "check the quotes and separators") from None
    header = [h.strip() for h in parsed[0]]
    hline = lines[0][0]
    unknown = [h for h in header if h not in REQUIRED_COLUMNS + OPTIONAL_COLUMNS]
    if unknown:
        raise input_error(f"{where}:{hline}", f"unknown column(s) {unknown}", _FIX_COLUMNS + " (remove or rename the others)")
    missing = [c for c in REQUIRED_COLUMNS if c not in header]
    if missing:
        raise input_error(f"{where}:{hline}", f"missing column(s) {missing}", _FIX_COLUMNS)
    repeated = sorted({h for h in header if header.count(h) > 1})
    if repeated:
        raise input_error(f"{where}:{hline}", f"column(s) {repeated} appear twice", "keep one of each")
    if len(parsed) < 2:
        raise input_error(where, "has a header but no rows", "add one row per image file")
    base = path.parent
    rows = []
    for (lineno, _), cells in zip(lines[1:], parsed[1:], strict=True):
        loc = f"{where}:{lineno}"
        if len(cells) != len(header):
            raise input_error(loc, f"{len(cells)} cells but the header has {len(header)} columns",
                              "give one value per column (quote cells that contain commas)")
        row = {h: c.strip() for h, c in zip(header, cells, strict=True)}
        for col in REQUIRED_COLUMNS:
            if not row[col]:
                raise input_error(loc, f"empty {col!r}", f"fill in the {col} of every row")
        try:
            t = float(row["time_h"])
        except ValueError:
            raise input_error(loc, f"time_h {row['time_h']!r} is not a number", "give the time in hours, e.g. 24") from None
        if not (math.isfinite(t) and t >= 0):
            raise input_error(loc, f"time_h {row['time_h']!r} is not a finite number >= 0", "give the time in hours, >= 0")
        if "://" in row["file"]:
            # an fsspec URL of an OME-Zarr image (s3://, gs://, file://...): read where it lies, by every worker
            f = row["file"]
            if not _is_zarr(f):
                raise input_error(loc, f"file {f!r} is not an OME-Zarr image that can be opened at that URL",
                                  "give the URL of an OME-Zarr image folder (with its fsspec back-end installed, e.g. "
                                  "s3fs for s3://), or a local or shared path")
            rows.append((lineno, row["animal"], row["group"], t, f, row.get("channel", "") or None))
            continue
        f = Path(row["file"])
        f = f if f.is_absolute() else base / f
        if not (f.is_file() or (f.is_dir() and _is_zarr(f))):
            raise input_error(loc, f"file {row['file']!r} not found (looked for {f})",
                              "correct the path (relative paths are relative to the study table's folder)")
        rows.append((lineno, row["animal"], row["group"], t, f, row.get("channel", "") or None))
    group_of: dict[str, tuple[str, int]] = {}
    for lineno, animal, group, *_ in rows:
        if animal in group_of and group_of[animal][0] != group:
            raise input_error(f"{where}:{lineno}", f"animal {animal!r} is in group {group!r} here but in "
                              f"{group_of[animal][0]!r} on line {group_of[animal][1]}",
                              "give each animal one group (use distinct animal names across groups)")
        group_of.setdefault(animal, (group, lineno))
    acquisitions: dict[tuple[str, float], list] = {}
    for r in rows:
        acquisitions.setdefault((r[1], r[3]), []).append(r)
    from probeplan.io.ngff import location_name

    out = []
    keys: set[str] = set()
    for (animal, t), items in acquisitions.items():
        first = items[0][0]
        chans = [r[5] for r in items]
        if len(items) > 1 and any(c is None for c in chans):
            raise input_error(f"{where}:{items[1][0]}", f"animal {animal!r} at time_h {t:g} is listed again "
                              f"(first on line {first})",
                              "list an animal x time point once, or name the channel of each single-channel file")
        seen: dict[str, int] = {}
        for lineno, *_, ch in items:
            if ch is not None and ch in seen:
                raise input_error(f"{where}:{lineno}", f"animal {animal!r}, time_h {t:g}, channel {ch!r} is listed again "
                                  f"(first on line {seen[ch]})", "list each animal x time x channel once")
            if ch is not None:
                seen[ch] = lineno
        key = _safe(f"{animal}_{t:g}h")
        base_key, n = key, 2
        while key in keys:  # different names can map to one safe name; never share output files
            key, n = f"{base_key}-{n}", n + 1
        keys.add(key)
        lines_ = tuple(r[0] for r in items)
        out.append(Acquisition(
            animal=animal, group=items[0][2], time_h=t, files=tuple(r[4] for r in items),
            channels=None if chans[0] is None else tuple(chans), lines=lines_, key=key,
            where=f"{where}:{','.join(str(n) for n in lines_)}" + (f" ({location_name(items[0][4])})"
                                                                   if len(items) == 1 else ""),
        ))
    return out
