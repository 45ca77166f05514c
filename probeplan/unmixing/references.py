"""Reference spectra for unmixing: the ``(C, K)`` matrix of channel responses per component.

Three sources give the same :class:`ReferenceSpectra` value:

* a CSV file (the documented format): a ``channel`` column naming each channel, then one column per
  component (probe or autofluorescence) — :func:`read_references_csv`;
* single-probe control stacks and an unlabelled control — :func:`references_from_controls`;
* a matrix computed elsewhere (e.g. a channel model) — :func:`references_from_matrix`.

Normalisation (``normalise=``): ``"sum"`` (default) scales each column to sum to 1 over
the channels, so an abundance is the component's total counts summed over all channels;
``"max"`` scales each column's peak to 1 (abundance = counts in the component's brightest
channel); ``None`` keeps the values as given (abundance in the matrix's own units).
"""

from __future__ import annotations

import csv
import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from probeplan.errors import AssumptionWarning, input_error, warn_at_caller
from probeplan.io.atomic import table_to_csv_text, write_text_atomic

__all__ = [
    "reference_spectra",
    "ReferenceSpectra",
    "NORMALISATIONS",
    "normalise_columns",
    "read_references_csv",
    "write_references_csv",
    "references_from_matrix",
    "references_from_controls",
    "DEFAULT_TOP_FRACTION",
    "abundance_unit",
    "as_references",
    "references_from_control_files",
    "parse_control_specs",
]

NORMALISATIONS = ("sum", "max", None)

#: Negative channel means (noise) smaller than this fraction of the peak are set to 0 silently.
_NEGATIVE_TOLERANCE = 0.01

#: Fraction of the brightest control pixels used when no ROI mask is given.
DEFAULT_TOP_FRACTION = 0.01


@dataclass(frozen=True)
class ReferenceSpectra:
    """Reference spectra: ``matrix[c, k]`` is component ``k``'s signal in channel ``c``.

    Attributes
    ----------
    matrix : ndarray, shape (C, K), float64
    component_names : tuple of str
    channel_names : tuple of str or None
    source : str
        Where the spectra came from (file path, "controls", "matrix").
    normalisation : str or None
    """

    matrix: np.ndarray
    component_names: tuple[str, ...]
    channel_names: tuple[str, ...] | None = None
    source: str = "matrix"
    normalisation: str | None = None

    @property
    def n_channels(self) -> int:
        return self.matrix.shape[0]

    @property
    def n_components(self) -> int:
        return self.matrix.shape[1]

    def for_channels(self, channel_names: Sequence[str] | None, *, where: str = "stack") -> ReferenceSpectra:
        """Rows reordered to match a stack's channel names (unchanged when either lacks names).

        Raises
        ------
        InputError
            When the stack has a channel the references do not name, names a channel twice, or the counts differ.
        """
        if channel_names is None or self.channel_names is None:
            return self
        repeated = sorted({c for c in channel_names if list(channel_names).count(c) > 1})
        if repeated:
            raise input_error(
                where, f"channel name(s) {repeated} appear more than once, so rows cannot be matched by name",
                "give each channel a distinct name in the file's metadata",
            )
        missing = [c for c in channel_names if c not in self.channel_names]
        if missing:
            raise input_error(
                self.source, f"no row for channel(s) {missing} of {where} (references name {list(self.channel_names)})",
                "add a row per stack channel to the references, or rename the channels to match",
            )
        if len(channel_names) != len(self.channel_names):
            raise input_error(
                self.source, f"{len(self.channel_names)} channel rows but {where} has {len(channel_names)} channels",
                "give exactly one row per stack channel",
            )
        order = [self.channel_names.index(c) for c in channel_names]
        return ReferenceSpectra(self.matrix[order], self.component_names, tuple(channel_names), self.source,
                                self.normalisation)

    def with_component(self, name: str, column) -> ReferenceSpectra:
        """A copy with one more component (e.g. an autofluorescence spectrum)."""
        column = np.asarray(column, dtype=np.float64).reshape(-1, 1)
        return references_from_matrix(np.hstack([self.matrix, column]), [*self.component_names, name],
                                      self.channel_names, source=self.source)


def normalise_columns(matrix, how: str | None = "sum") -> np.ndarray:
    """Scale each column to unit sum (``"sum"``), unit peak (``"max"``) or not at all (``None``).

    Examples
    --------
    >>> normalise_columns([[1.0, 2.0], [3.0, 2.0]]).tolist()
    [[0.25, 0.5], [0.75, 0.5]]
    """
    m = np.array(matrix, dtype=np.float64)
    if how not in NORMALISATIONS:
        raise input_error("normalise", f"{how!r} is not known", "choose 'sum', 'max' or None")
    if how is None:
        return m
    scale = m.sum(axis=0) if how == "sum" else m.max(axis=0)
    if np.any(scale <= 0):
        k = int(np.flatnonzero(scale <= 0)[0])
        raise input_error(f"references column {k}", "is all zero", "give a spectrum with signal in some channel")
    return m / scale


def _check_values(m: np.ndarray, names: Sequence[str], where: str) -> None:
    bad = ~np.isfinite(m)
    if bad.any():
        c, k = np.argwhere(bad)[0]
        raise input_error(where, f"component {names[k]!r} has a non-finite value ({m[c, k]}) in row {c}",
                          "give finite numbers for every channel")
    if (m < 0).any():
        c, k = np.argwhere(m < 0)[0]
        raise input_error(where, f"component {names[k]!r} has a negative value ({m[c, k]}) in row {c}",
                          "reference spectra must be >= 0; subtract background before, not after")


def references_from_matrix(matrix, component_names: Sequence[str], channel_names: Sequence[str] | None = None, *,
                           normalise: str | None = None, source: str = "matrix") -> ReferenceSpectra:
    """Reference spectra from a ``(C, K)`` array (e.g. expected channel responses of a model).

    Examples
    --------
    >>> r = references_from_matrix([[2.0], [2.0]], ["dot705"], ["ch1", "ch2"], normalise="sum")
    >>> r.matrix[:, 0].tolist(), r.component_names
    ([0.5, 0.5], ('dot705',))
    """
    m = np.array(matrix, dtype=np.float64)
    if m.ndim != 2:
        raise input_error(source, f"matrix shape {m.shape}, expected (channels, components)", "give a 2-D array")
    names = tuple(str(n) for n in component_names)
    if len(names) != m.shape[1] or len(set(names)) != len(names):
        raise input_error(source, f"component names {list(names)} do not fit {m.shape[1]} unique columns",
                          "give one unique name per column")
    if channel_names is not None:
        channel_names = tuple(str(c) for c in channel_names)
        if len(channel_names) != m.shape[0] or len(set(channel_names)) != len(channel_names):
            raise input_error(source, f"channel names {list(channel_names)} do not fit {m.shape[0]} unique rows",
                              "give one unique name per row")
    _check_values(m, names, source)
    return ReferenceSpectra(normalise_columns(m, normalise), names, channel_names, source, normalise)


def read_references_csv(path: str | os.PathLike, *, normalise: str | None = "sum") -> ReferenceSpectra:
    """Read reference spectra from CSV: ``channel,<component>,<component>...``, one row per channel.

    Lines starting with ``#`` are comments.  Every value must be a finite number >= 0.

    Raises
    ------
    InputError
        Naming the file and line: missing ``channel`` column, duplicate names, a value
        that is not a number, NaN or negative.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "ref.csv"
    >>> _ = p.write_text("# example\\nchannel,dotA,dotB\\nch1,3,1\\nch2,1,1\\n")
    >>> r = read_references_csv(p)
    >>> r.channel_names, r.component_names, r.matrix[:, 0].tolist()
    (('ch1', 'ch2'), ('dotA', 'dotB'), [0.75, 0.25])
    """
    path = Path(path)
    where = str(path)
    from probeplan.io.text import read_text_input

    text = read_text_input(path, what="reference spectra CSV")
    lines = [(i + 1, line) for i, line in enumerate(text.splitlines()) if line.strip() and not line.lstrip().startswith("#")]
    if not lines:
        raise input_error(where, "no header and no rows", "write a header 'channel,<component>,...' and one row per channel")
    # one row per line: an unbalanced quote must not swallow the lines after it
    rows = [next(csv.reader([line]), []) for _, line in lines]
    header = [h.strip() for h in rows[0]]
    hline = lines[0][0]
    if not header or header[0].lower() != "channel":
        raise input_error(f"{where}:{hline}", f"first column is {header[0]!r}, expected 'channel'",
                          "start the header with 'channel'")
    comps = header[1:]
    if not comps or any(not c for c in comps) or len(set(comps)) != len(comps):
        raise input_error(f"{where}:{hline}", f"component columns {comps} are missing, empty or repeated",
                          "name each component column once")
    channels: list[str] = []
    values = []
    for (lineno, _), row in zip(lines[1:], rows[1:], strict=True):
        loc = f"{where}:{lineno}"
        if len(row) != len(header):
            raise input_error(loc, f"{len(row)} fields, header has {len(header)}", "give one value per component")
        name = row[0].strip()
        if not name or name in channels:
            raise input_error(loc, f"channel name {name!r} is empty or repeated", "name each channel once")
        vals = []
        for comp, cell in zip(comps, row[1:], strict=True):
            try:
                v = float(cell)
            except ValueError:
                raise input_error(loc, f"{comp}={cell.strip()!r} is not a number", "give a number >= 0") from None
            if not math.isfinite(v) or v < 0:
                raise input_error(loc, f"{comp}={cell.strip()!r} is NaN, infinite or negative",
                                  "reference spectra must be finite and >= 0")
            vals.append(v)
        channels.append(name)
        values.append(vals)
    if not values:
        raise input_error(where, "no channel rows", "add one row per channel")
    return references_from_matrix(np.array(values), comps, channels, normalise=normalise, source=where)


def write_references_csv(path: str | os.PathLike, references: ReferenceSpectra) -> Path:
    """Write reference spectra as CSV (atomic), readable by :func:`read_references_csv`."""
    chans = references.channel_names or tuple(f"channel_{c + 1}" for c in range(references.n_channels))
    rows = [
        {"channel": ch, **{k: repr(float(references.matrix[c, j])) for j, k in enumerate(references.component_names)}}
        for c, ch in enumerate(chans)
    ]
    return write_text_atomic(path, table_to_csv_text(rows, ["channel", *references.component_names]))


def references_from_controls(
    controls: Mapping[str, np.ndarray],
    unlabelled: np.ndarray,
    *,
    channel_axis: int = 0,
    roi: np.ndarray | Mapping[str, np.ndarray] | None = None,
    top_fraction: float = DEFAULT_TOP_FRACTION,
    channel_names: Sequence[str] | None = None,
    normalise: str | None = "sum",
) -> ReferenceSpectra:
    """Reference spectra from single-probe control stacks and an unlabelled control.

    Parameters
    ----------
    controls : mapping of name -> ndarray
        One stack per probe (same channel count), each with only that probe.
    unlabelled : ndarray
        A stack with no probe (tissue autofluorescence + camera offset).
    channel_axis : int
    roi : bool mask or mapping name -> mask, optional
        Pixels (spatial shape) to average in each control.  Without it, the automatic
        choice is used (see Notes).
    top_fraction : float
        Fraction of the brightest pixels used by the automatic choice (default 1 %).
    channel_names : sequence of str, optional
    normalise : {"sum", "max", None}

    Returns
    -------
    ReferenceSpectra

    Notes
    -----
    Background per channel ``b_c`` = mean of the unlabelled control in channel ``c``.
    For each control, ``d = y − b`` per pixel; without an ROI the pixels whose total
    ``Σ_c d_c`` is in the top ``top_fraction`` are averaged (a bright, probe-dominated
    region; common practice, no source).  Negative means (noise in channels without
    signal) are set to 0; an :class:`AssumptionWarning` is given when one is below −1 % of
    the spectrum's peak (a background mismatch).  NaN pixels are ignored.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> bg = np.full((2, 20, 20), 10.0)
    >>> ctrl = bg + np.array([3.0, 1.0])[:, None, None] * rng.random((1, 20, 20)) * 100
    >>> r = references_from_controls({"dotA": ctrl}, bg)
    >>> np.round(r.matrix[:, 0], 3).tolist()
    [0.75, 0.25]
    """
    if not 0 < top_fraction <= 1:
        raise input_error("top_fraction", f"{top_fraction} outside (0, 1]", "give e.g. 0.01 for the brightest 1 %")
    if not controls:
        raise input_error("controls", "no control stacks", "give one single-probe control per component")
    bg_stack = np.moveaxis(np.asarray(unlabelled, dtype=np.float64), channel_axis, 0)
    C = bg_stack.shape[0]
    background = np.nanmean(bg_stack.reshape(C, -1), axis=1)
    cols = []
    for name, stack in controls.items():
        d = np.moveaxis(np.asarray(stack, dtype=np.float64), channel_axis, 0)
        if d.shape[0] != C:
            raise input_error(f"control {name!r}", f"{d.shape[0]} channels, unlabelled control has {C}",
                              "acquire all controls with the same channels")
        d = d.reshape(C, -1) - background[:, None]
        mask = roi.get(name) if isinstance(roi, Mapping) else roi
        if mask is not None:
            sel = np.asarray(mask, dtype=bool).reshape(-1)
            if sel.size != d.shape[1]:
                raise input_error(f"roi for {name!r}", f"{sel.size} pixels, control has {d.shape[1]}",
                                  "give a mask of the control's spatial shape")
        else:
            total = d.sum(axis=0)
            finite = np.isfinite(total)
            n_top = max(1, int(round(top_fraction * finite.sum())))
            threshold = np.sort(total[finite])[-n_top]
            sel = finite & (total >= threshold)
        if not sel.any():
            raise input_error(f"roi for {name!r}", "selects no pixel", "give a mask with the probe's region")
        spectrum = np.nanmean(d[:, sel], axis=1)
        if not spectrum.max() > 0:
            raise input_error(f"control {name!r}", "has no signal above the unlabelled control",
                              "check the control holds the probe and the unlabelled control matches it")
        if (spectrum < -_NEGATIVE_TOLERANCE * spectrum.max()).any():

            warn_at_caller(
                f"control {name!r}: mean signal below background in channel(s) "
                f"{np.flatnonzero(spectrum < 0).tolist()}; set to 0", AssumptionWarning)
        spectrum = np.clip(spectrum, 0.0, None)
        cols.append(spectrum)
    return references_from_matrix(np.stack(cols, axis=1), list(controls), channel_names, normalise=normalise,
                                  source="controls")


def abundance_unit(references, unit: str | None = None) -> str:
    """What one unit of abundance means, from the references' normalisation (or the unit given).

    Examples
    --------
    >>> abundance_unit(references_from_matrix([[1.0], [3.0]], ["dotA"], normalise="sum"))
    'counts (summed over all channels)'
    """
    if unit:
        return unit
    how = getattr(references, "normalisation", None)
    if how == "sum":
        return "counts (summed over all channels)"
    if how == "max":
        return "counts (in the component's brightest channel)"
    return "reference units (the abundance that gives the reference spectrum as written)"


def as_references(references, *, normalise: str | None = "sum", where: str = "references") -> ReferenceSpectra:
    """Reference spectra from a CSV path, a DataFrame with a ``channel`` column, or :class:`ReferenceSpectra`.

    Paths and DataFrames are scaled by ``normalise``; a :class:`ReferenceSpectra` is returned as it is.

    Examples
    --------
    >>> import pandas as pd
    >>> r = as_references(pd.DataFrame({"channel": ["a", "b"], "dotA": [1.0, 3.0]}))
    >>> r.channel_names, r.matrix[:, 0].tolist()
    (('a', 'b'), [0.25, 0.75])
    """
    if isinstance(references, ReferenceSpectra):
        return references
    if isinstance(references, (str, os.PathLike)):
        return read_references_csv(references, normalise=normalise)
    try:
        import pandas as pd
    except ImportError:  # pragma: no cover - a dependency of the package
        pd = None
    if pd is not None and isinstance(references, pd.DataFrame):
        if "channel" not in references.columns:
            raise input_error(where, "the DataFrame has no 'channel' column",
                              "give a column 'channel' naming each row's channel, then one column per component")
        comps = [str(c) for c in references.columns if c != "channel"]
        try:
            values = references[comps].to_numpy(dtype=np.float64)
        except (TypeError, ValueError):
            raise input_error(where, "a component column holds text", "give numbers >= 0 in every component column") from None
        return references_from_matrix(values, comps, references["channel"].astype(str).tolist(), normalise=normalise,
                                      source=where)
    return references


def parse_control_specs(specs: Sequence[str], *, option: str = "--control") -> dict[str, Path]:
    """``["NAME=STACK.tif", ...]`` -> ``{NAME: Path}`` (names unique, files existing).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "a.tif"; _ = p.write_bytes(b"")
    >>> list(parse_control_specs([f"dot A={p}"]))
    ['dot A']
    """
    out: dict[str, Path] = {}
    for spec in specs:
        name, sep, file = spec.partition("=")
        name, file = name.strip(), file.strip()
        if not sep or not name or not file:
            raise input_error(option, f"{spec!r} is not NAME=STACK", f"give e.g. {option} 'probe A=control_1.tif'")
        if name in out:
            raise input_error(option, f"component {name!r} given twice", "give one control stack per component")
        if not Path(file).is_file():
            raise input_error(file, "control stack not found", f"check the path given to {option}")
        out[name] = Path(file)
    return out


def references_from_control_files(controls: Mapping[str, str | os.PathLike], unlabelled: str | os.PathLike, *,
                                  normalise: str | None = "sum", unlabelled_name: str | None = None,
                                  top_fraction: float = DEFAULT_TOP_FRACTION) -> ReferenceSpectra:
    """Reference spectra from single-probe control stack files and an unlabelled control file.

    Each stack is read with its channel names (OME-TIFF, ImageJ); the controls' channels are
    matched to the unlabelled control's by name when they have names.  See
    :func:`references_from_controls` for the rule.  With ``unlabelled_name`` the unlabelled
    control's own mean spectrum (its autofluorescence plus camera offset, the constant part
    of every pixel) is added as one more component of that name.
    """
    from probeplan.io.stacks import read_stack

    def load(path):
        data, info = read_stack(path)
        return np.moveaxis(data, info.channel_axis, 0).astype(np.float64), info.channel_names

    bg, names = load(unlabelled)
    stacks = {}
    for comp, path in controls.items():
        d, n = load(path)
        if names is not None and n is not None and tuple(n) != tuple(names):
            if sorted(n) != sorted(names):
                raise input_error(str(path), f"channels {list(n)} differ from the unlabelled control's {list(names)}",
                                  "acquire every control with the same channels")
            d = d[[list(n).index(c) for c in names]]
        stacks[comp] = d
    refs = references_from_controls(stacks, bg, channel_names=names, normalise=normalise, top_fraction=top_fraction)
    refs = ReferenceSpectra(refs.matrix, refs.component_names, refs.channel_names,
                            "controls: " + ", ".join(f"{k}={Path(v).name}" for k, v in controls.items()),
                            refs.normalisation)
    if unlabelled_name:
        column = np.nanmean(bg.reshape(bg.shape[0], -1), axis=1)
        column = normalise_columns(column[:, None], normalise)[:, 0]
        refs = ReferenceSpectra(np.hstack([refs.matrix, column[:, None]]), (*refs.component_names, unlabelled_name),
                                refs.channel_names, refs.source, refs.normalisation)
    return refs


def reference_spectra(
    tissue,
    probes,
    channels,
    *,
    irradiance_mw_per_cm2: float,
    depth_mm: float,
    target_size_mm: float = 2.0,
    gain_e_per_count: float = 1.0,
):
    """Reference spectra predicted by the channel model at one depth, for unmixing.

    Entry (c, k) is the camera counts per µM of probe k in channel c in that
    channel's exposure (1 s when unset): the response matrix × exposure ÷ gain.
    Unmixing with these references (not normalised) gives abundances in µM.

    Returns
    -------
    ReferenceSpectra
    """
    from probeplan.model.channels import response_matrix

    if not 0 < gain_e_per_count < np.inf:
        raise input_error("gain_e_per_count", f"got {gain_e_per_count!r}", "give the camera gain in e-/count (> 0)")
    resp = response_matrix(tissue, probes, channels, irradiance_mw_per_cm2=irradiance_mw_per_cm2,
                           depth_mm=[float(depth_mm)], target_size_mm=target_size_mm)[0]
    exposure = np.array([float(getattr(ch, "exposure_s", None) or 1.0) for ch in channels])
    return references_from_matrix(
        resp * exposure[:, None] / gain_e_per_count,
        [str(getattr(p, "name", f"probe {i + 1}")) for i, p in enumerate(probes)],
        [str(getattr(ch, "name", f"channel {i + 1}")) for i, ch in enumerate(channels)],
        normalise=None,
    )
