"""A whole study: every acquisition unmixed, ROI statistics per animal and time point, then groups and kinetics.

:func:`measure_acquisition` is the unit of work: it takes one :class:`Acquisition` (paths and
names only, so it can run as a separate task) and returns a small table of ROI statistics,
writing the acquisition's abundance, standard-error and residual maps when asked.
:func:`run_study` reads the study table, checks every input before anything is written,
runs the acquisitions (a rerun skips those whose inputs, settings and outputs are unchanged),
compares the groups (:mod:`probeplan.study.stats`) and fits the time courses
(:mod:`probeplan.study.kinetics`).

Memory: an acquisition is never held whole.  :func:`measure_acquisition` reads its files, the
dark frame and the flat field by blocks of rows (as many as ``StudySettings.memory_limit_mb``
allows), unmixes each block, writes it into the maps at its rows and adds it to the ROI
statistics; the client of a distributed run holds only the small tables.

ROI statistics are not biased by the non-negativity constraint: the maps are unmixed by the
chosen method (exact NNLS by default), but each ROI's mean is the unconstrained
least-squares abundance of its pixels, which equals the least-squares unmixing of the ROI's
mean spectrum (the estimator is linear).  Clamping each pixel at zero first would bias the
mean upwards wherever a component is near zero (an absent probe reads about +0.4 sigma:
E[max(0, Z)] = 1/sqrt(2 pi) sigma for Gaussian noise) and bias the target-to-background ratio.  The standard
error of an ROI mean is the pixels' standard deviation over sqrt(n); neighbouring pixels
are correlated by the tissue's blur, so it understates the uncertainty of one animal's
value — the group comparisons use the spread between animals instead.
"""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from probeplan.errors import input_error
from probeplan.io.atomic import check_outputs, current_policy, file_sha256, make_output_folder, output_batch, readable_path
from probeplan.io.ngff import is_url, location_name
from probeplan.study.table import Acquisition, read_study_table
from probeplan.unmixing.references import abundance_unit

__all__ = [
    "MEASUREMENT_COLUMNS",
    "StudySettings",
    "StudyResult",
    "load_acquisition",
    "measure_acquisition",
    "run_study",
    "abundance_unit",
    "write_table_csv",
    "read_table_csv",
    "MANIFEST_NAME",
    "MEASUREMENTS_NOTES",
]

#: Columns of ``measurements.csv`` (the first eight are the stable interface).
MEASUREMENT_COLUMNS = ("animal", "group", "time_h", "roi", "component", "mean", "se", "tbr", "tbr_se", "sd",
                       "n_pixels", "n_excluded", "unit", "acquisition", "channel_match")
#: Files a study writes at the top of its output folder (a rerun into the same folder may replace them).
_OWN_FILES = ("measurements.csv", "groups.csv", "kinetics.csv", "report.html", "rois.json",
              "references_from_controls.csv")
#: Manifest of finished acquisitions in the output folder (checksums), used to resume.
MANIFEST_NAME = "study_manifest.json"
MEASUREMENTS_NOTES = (
    "One row per animal x time point x ROI x component.",
    "mean: the ROI's mean abundance from unconstrained least squares over its pixels (= the ROI's mean spectrum "
    "unmixed), not the mean of the non-negative (NNLS) map, which is biased upwards where a component is near zero.",
    "se: standard error of that mean (pixel SD / sqrt(n_pixels)); pixels are correlated by blur, so it understates "
    "the uncertainty; group comparisons use the spread between animals.",
    "tbr: mean / mean of the background ROI for the same component (NaN when that mean is <= 0); tbr_se by the "
    "delta method.",
    "n_excluded: NaN or saturated pixels left out.",
)


@dataclass(frozen=True)
class StudySettings:
    """How every acquisition of a study is processed (the same for all; part of the resume check).

    Attributes
    ----------
    method : {"nnls", "ls", "wls"}
        Unmixing of the maps written.
    rois : tuple of str
        Rectangles ``"name:x0,y0,x1,y1"``, ellipses ``"name:ellipse:cx,cy,rx,ry"``, polygons
        ``"name:polygon:x1,y1,..."`` (:func:`probeplan.unmixing.roi.parse_roi`).
    labels_path : Path or None
        A label TIFF (each non-zero label an ROI).
    roi_background : str
        Name of the background ROI for the TBR.
    dark_path, flat_path : Path or None
        Dark frame and flat field stacks (channels matched by name when they have names).
    channel_axis : int or None
        For plain files whose axes are not named.
    gain_e_per_count, read_noise_e : float
        Camera noise model of the standard-error maps.
    write_maps : bool
        Write the abundance, standard-error and residual maps of every acquisition.
    roi_file : Path or None
        An ROI file (:mod:`probeplan.unmixing.roifile`: rectangles, ellipses, polygons, label
        regions), e.g. one saved from the page or ``rois.json`` of an earlier run.
    auto_rois : tuple of str
        ``"NAME=COMPONENT"``: an ROI per acquisition from that component's abundance map by
        Otsu's threshold (:func:`probeplan.unmixing.roi.otsu_roi`).
    memory_limit_mb : float
        Working-memory bound of one acquisition: its files are read, unmixed, measured and
        written by blocks of rows sized to it (as ``probeplan unmix --memory-mb``); the
        results do not depend on it.
    """

    method: str = "nnls"
    rois: tuple[str, ...] = ()
    labels_path: Path | None = None
    roi_background: str = "background"
    dark_path: Path | None = None
    flat_path: Path | None = None
    channel_axis: int | None = None
    gain_e_per_count: float = 1.0
    read_noise_e: float = 0.0
    write_maps: bool = True
    roi_file: Path | None = None
    auto_rois: tuple[str, ...] = ()
    memory_limit_mb: float = 256.0  # the unmix command's default, probeplan.unmixing.pipeline.DEFAULT_MEMORY_MB


@dataclass
class StudyResult:
    """What :func:`run_study` found: the three tables (pandas DataFrames), notes and written files."""

    measurements: pd.DataFrame
    groups: pd.DataFrame
    kinetics: pd.DataFrame
    acquisitions: list[Acquisition]
    unit: str
    notes: list[str] = field(default_factory=list)
    outputs: dict[str, Path] = field(default_factory=dict)
    skipped: list[str] = field(default_factory=list)


# --------------------------------------------------------------------------- one acquisition
def _read_one(path: Path, channel_axis, allow_plane: bool):
    from probeplan.io.stacks import open_stack

    with open_stack(path, channel_axis=channel_axis, allow_plane=allow_plane) as r:
        return r.read_rows_channel_first(0, r.info.n_rows), r.info


def load_acquisition(acq: Acquisition, *, channel_axis: int | None = None):
    """The acquisition as one channel-first array with its channel names and pixel size.

    Returns
    -------
    data : ndarray, shape (C, ..., Y, X)
    channel_names : tuple of str or None
    pixel_size_um : (float, float) or None
    spatial_axes : str

    Raises
    ------
    InputError
        A per-channel file that holds several channels, files of different shapes or pixel sizes.
    """
    if acq.channels is None:
        data, info = _read_one(acq.files[0], channel_axis, False)
        return data, info.channel_names, info.pixel_size_um, info.spatial_axes
    planes, sizes, shape = [], set(), None
    for f, ch in zip(acq.files, acq.channels, strict=True):
        d, info = _read_one(f, None, True)
        if d.shape[0] != 1:
            raise input_error(f"{acq.where} ({location_name(f)})", f"channel {ch!r} is a file of {d.shape[0]} channels",
                              "list a multi-channel file with an empty channel cell, or give one file per channel")
        if shape is not None and d.shape != shape:
            raise input_error(f"{acq.where} ({location_name(f)})", f"shape {d.shape[1:]} differs from {shape[1:]} of the other "
                              "channels", "give every channel of one acquisition the same image size")
        shape = d.shape
        planes.append(d[0])
        if info.pixel_size_um is not None:
            sizes.add(tuple(round(v, 9) for v in info.pixel_size_um))
    if len(sizes) > 1:
        raise input_error(acq.where, f"the channel files give different pixel sizes {sorted(sizes)} µm",
                          "give files of one acquisition with one pixel size")
    dtype = np.result_type(*(p.dtype for p in planes))
    return np.stack(planes).astype(dtype, copy=False), tuple(acq.channels), (sizes.pop() if sizes else None), "YX"


def _matched_references(references, names, where):
    """References ordered as the stack's channels; how they were matched."""
    if names is not None and references.channel_names is not None:
        return references.for_channels(names, where=where), "by name"
    return references, "by position (the file names no channels)"


def _rois(settings: StudySettings, shape_yx):
    """The drawn ROIs (rectangles, ellipses, polygons, label images, an ROI file) with their label image."""
    from probeplan.unmixing.roi import parse_roi, rois_from_labels
    from probeplan.unmixing.roifile import read_roi_file

    labels = None
    out = []
    if settings.labels_path is not None:
        import tifffile

        try:
            labels = tifffile.imread(settings.labels_path)
        except Exception as exc:  # tifffile raises many kinds on damaged files
            raise input_error(str(settings.labels_path), f"cannot be read as TIFF ({exc})",
                              "give an integer label TIFF") from None
        if labels.shape != tuple(shape_yx):
            raise input_error(str(settings.labels_path), f"shape {labels.shape}, images are {tuple(shape_yx)}",
                              "give a label image of the stacks' Y x X size")
        out += rois_from_labels(labels)
    if settings.roi_file is not None:
        roi_file = read_roi_file(settings.roi_file, image_size=(int(shape_yx[1]), int(shape_yx[0])))
        file_rois, file_labels = roi_file.rois, roi_file.labels
        if file_labels is not None:
            if labels is not None:
                raise input_error(str(settings.roi_file), "uses a label image and another label image was given",
                                  "give one label image")
            if file_labels.shape != tuple(shape_yx):
                raise input_error(str(settings.roi_file), f"its label image is {file_labels.shape}, images are "
                                  f"{tuple(shape_yx)}", "give an ROI file made for these images")
            labels = file_labels
        out += [r for r in file_rois if r.labels_file is None or not r.labels_file.endswith("_auto_roi.tif")]
    for spec in settings.rois:
        out.append(parse_roi(spec, shape=tuple(shape_yx)))
    names = [r.name for r in out] + [a.split("=", 1)[0].strip() for a in settings.auto_rois]
    if not names:
        raise input_error("rois", "no region of interest given", "give an ROI 'name:x0,y0,x1,y1' (and one named "
                          f"{settings.roi_background!r} for the TBR), a label TIFF, an ROI file or an automatic ROI")
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise input_error("rois", f"ROI name(s) {repeated} given twice", "give each ROI its own name")
    return out, labels


def _auto_specs(settings: StudySettings, comps) -> list[tuple[str, str]]:
    specs = []
    for a in settings.auto_rois:
        name, sep, comp = a.partition("=")
        name, comp = name.strip(), comp.strip()
        if not sep or not name or not comp:
            raise input_error("auto_rois", f"{a!r} is not NAME=COMPONENT", "give e.g. 'tumour=probe A'")
        if comp not in comps:
            raise input_error("auto_rois", f"component {comp!r} is not in the references ({', '.join(comps)})",
                              "name a component of the references")
        specs.append((name, comp))
    return specs


def roi_least_squares(y, M):
    """Unconstrained least-squares abundances of pixel spectra ``y`` (C, N): ``(MᵀM)⁻¹Mᵀy``, shape (K, N)."""
    # the small (K, C) pseudo-inverse first, then one matrix product: a solve with N right-hand sides
    # costs about 25x more on a 768² image
    return np.linalg.solve(M.T @ M, M.T) @ y


class _AcquisitionRows:
    """An acquisition's files opened for reading by blocks of rows (one multi-channel file, or one file per channel).

    The same checks as :func:`load_acquisition`, made on the headers; :meth:`read_rows` gives
    rows ``r0:r1`` channel first, ``(C, ..., r1 - r0, X)``, with the dtype the whole array would have.
    """

    def __init__(self, acq: Acquisition, channel_axis: int | None):
        from probeplan.io.stacks import open_stack

        self.readers = []
        self.one_file = acq.channels is None
        try:
            if acq.channels is None:
                r = open_stack(acq.files[0], channel_axis=channel_axis)
                self.readers.append(r)
                info = r.info
                self.channel_names, self.pixel_size_um = info.channel_names, info.pixel_size_um
                self.spatial_axes, self.spatial_shape, self.dtype = info.spatial_axes, info.spatial_shape, info.dtype
                self.n_channels = info.n_channels
            else:
                sizes, shape = set(), None
                for f, ch in zip(acq.files, acq.channels, strict=True):
                    r = open_stack(f, allow_plane=True)
                    self.readers.append(r)
                    info = r.info
                    if info.n_channels != 1:
                        raise input_error(f"{acq.where} ({location_name(f)})", f"channel {ch!r} is a file of {info.n_channels} "
                                          "channels", "list a multi-channel file with an empty channel cell, or give "
                                          "one file per channel")
                    if shape is not None and info.spatial_shape != shape:
                        raise input_error(f"{acq.where} ({location_name(f)})", f"shape {info.spatial_shape} differs from {shape} "
                                          "of the other channels", "give every channel of one acquisition the same "
                                          "image size")
                    shape = info.spatial_shape
                    if info.pixel_size_um is not None:
                        sizes.add(tuple(round(v, 9) for v in info.pixel_size_um))
                if len(sizes) > 1:
                    raise input_error(acq.where, f"the channel files give different pixel sizes {sorted(sizes)} µm",
                                      "give files of one acquisition with one pixel size")
                self.channel_names, self.pixel_size_um = tuple(acq.channels), (sizes.pop() if sizes else None)
                self.spatial_axes, self.spatial_shape = "YX", shape
                self.dtype = np.result_type(*(r.info.dtype for r in self.readers))
                self.n_channels = len(self.readers)
        except BaseException:
            self.close()
            raise
        self.n_rows = self.spatial_shape[-2]

    def read_rows(self, r0: int, r1: int) -> np.ndarray:
        if self.one_file:
            return self.readers[0].read_rows_channel_first(r0, r1)
        return np.stack([r.read_rows_channel_first(r0, r1)[0] for r in self.readers]).astype(self.dtype, copy=False)

    def close(self) -> None:
        for r in self.readers:
            r.close()


class _CorrectionRows:
    """A dark frame or flat field opened for reading by rows, its channels in the acquisition's order."""

    def __init__(self, path, names, data_shape, where, what):
        from probeplan.io.stacks import open_stack

        self.reader = open_stack(path)
        info = self.reader.info
        self.index = None
        n = info.n_channels
        if names is not None and info.channel_names is not None:
            missing = [c for c in names if c not in info.channel_names]
            if missing:
                self.close()
                raise input_error(str(path), f"no {what} channel {missing} for {where}",
                                  f"give a {what} stack with the acquisition's channels")
            self.index = [info.channel_names.index(c) for c in names]
            n = len(self.index)
        shape = (n, *info.spatial_shape)
        if shape != tuple(data_shape):
            self.close()
            raise input_error(str(path), f"shape {shape} (channels first) differs from {where}'s {tuple(data_shape)}",
                              f"give a {what} stack of the acquisition's shape")

    def read_rows(self, r0: int, r1: int) -> np.ndarray:
        arr = self.reader.read_rows_channel_first(r0, r1).astype(np.float64)
        return arr[self.index] if self.index is not None else arr

    def close(self) -> None:
        self.reader.close()


class _PlaneSpill:
    """A (Y, X) float64 map written by rows into an unnamed temporary file, with its finite count and range."""

    def __init__(self, width: int):
        import tempfile

        self.file = tempfile.TemporaryFile(prefix="probeplan-map-")
        self.width = int(width)
        self.n, self.lo, self.hi = 0, np.inf, -np.inf

    def write_rows(self, r0: int, rows) -> None:
        rows = np.ascontiguousarray(rows, dtype=np.float64)
        os.pwrite(self.file.fileno(), memoryview(rows).cast("B"), r0 * self.width * 8)
        v = rows[np.isfinite(rows)]
        if v.size:
            self.n += int(v.size)
            self.lo, self.hi = min(self.lo, float(v.min())), max(self.hi, float(v.max()))

    def read_rows(self, r0: int, r1: int) -> np.ndarray:
        buf = os.pread(self.file.fileno(), (r1 - r0) * self.width * 8, r0 * self.width * 8)
        return np.frombuffer(buf, np.float64).reshape(r1 - r0, self.width)

    def close(self) -> None:
        self.file.close()


def study_rows_per_block(shape, n_channels: int, dtype, n_components: int, memory_limit_mb: float) -> int:
    """Rows of one acquisition read, unmixed and measured at a time within ``memory_limit_mb``.

    ``shape`` is the acquisition's spatial shape (``(..., Y, X)``); the bound is the unmix
    command's (:func:`probeplan.unmixing.pipeline._rows_per_chunk`), which budgets every
    channel's corrected float64 copies and the solver's work per pixel.
    """
    from types import SimpleNamespace

    from probeplan.unmixing.pipeline import _rows_per_chunk

    if not 0 < memory_limit_mb < np.inf:
        raise input_error("memory_limit_mb", f"{memory_limit_mb} is not a finite number > 0",
                          "give a positive memory bound in MiB")
    info = SimpleNamespace(spatial_shape=tuple(shape), n_rows=int(shape[-2]), n_channels=int(n_channels),
                           dtype=np.dtype(dtype))
    return _rows_per_chunk(info, int(n_components), float(memory_limit_mb), 1)


def _roi_abundances(block, dk, ff, M, sat):
    """Unconstrained least-squares abundances of every pixel of a block, NaN where a pixel is left out.

    ``block`` (C, ...) raw counts; a pixel is left out when a corrected channel is not finite
    or a raw channel is at or above ``sat``.
    """
    C = block.shape[0]
    raw = block.reshape(C, -1).astype(np.float64)
    y = raw - dk if dk is not None else raw
    if ff is not None:
        y = y / ff
    bad = ~np.isfinite(y).all(axis=0)
    if sat is not None:
        bad |= (raw >= sat).any(axis=0)
    y[:, bad] = 0.0
    a = roi_least_squares(y, M)
    a[:, bad] = np.nan
    return a.reshape(M.shape[1], *block.shape[1:])


def _automatic_rois(acq, autos, spills, blocks, src, corrections, M, sat, comps, shape_yx, out_dir) -> list[dict]:
    """The automatic ROIs of one acquisition, by blocks of rows: thresholds, mask files, statistics rows.

    Otsu's threshold of each map comes from its histogram gathered by blocks
    (:func:`probeplan.unmixing.roi.otsu_threshold_by_blocks`: the threshold of the whole map);
    then, in a second pass over the acquisition's rows, each block's mask is written into the
    ROI's label TIFF at its rows and the ROI's statistics are added up.
    """
    import contextlib

    import tifffile

    from probeplan.io.atomic import atomic_path
    from probeplan.io.stacks import _pwrite_rows
    from probeplan.unmixing.roi import Roi, RoiAccumulator, otsu_threshold_by_blocks
    from probeplan.unmixing.roifile import write_roi_file

    thresholds = {}
    for name, comp in autos:
        spill = spills[comp]
        if spill.n < 2 or spill.hi == spill.lo:
            raise input_error(f"automatic ROI {name!r}", "the component's map is flat or empty",
                              "draw the ROI instead (--roi), or choose a component with signal")
        thresholds[name] = otsu_threshold_by_blocks((spill.read_rows(r0, r1) for r0, r1 in blocks),
                                                    (spill.lo, spill.hi))
    total = RoiAccumulator([Roi(name) for name, _ in autos], comps)
    with contextlib.ExitStack() as stack:
        masks = {}  # the label TIFF of each automatic ROI, written by rows (uint8, 1 inside)
        if out_dir is not None:
            for name, _ in autos:
                path = Path(out_dir) / f"{acq.key}_{_safe_name(name)}_auto_roi.tif"
                tmp = stack.enter_context(atomic_path(path))
                offset, _ = tifffile.imwrite(tmp, shape=tuple(shape_yx), dtype=np.uint8, returnoffset=True)
                fd = os.open(tmp, os.O_RDWR)
                stack.callback(os.close, fd)
                masks[name] = (fd, int(offset), path)
        for r0, r1 in blocks:
            block = src.read_rows(r0, r1)
            a = _roi_abundances(block, *corrections(r0, r1, block.shape[0]), M, sat)
            parts = []
            for name, comp in autos:
                plane = spills[comp].read_rows(r0, r1)
                inside = np.isfinite(plane) & (plane > thresholds[name])
                if name in masks:
                    fd, offset, path = masks[name]
                    _pwrite_rows(fd, offset, tuple(shape_yx), 0, np.uint8, r0, inside.astype(np.uint8), where=path)
                parts.append(Roi(name, pixel_mask=inside))
            part = RoiAccumulator(parts, comps)
            part.add(a, 0)  # the masks hold this block's rows only
            total.merge(part)
    if out_dir is not None:
        saved = [Roi(name, label=1, labels_file=f"{acq.key}_{_safe_name(name)}_auto_roi.tif") for name, _ in autos]
        write_roi_file(Path(out_dir) / f"{acq.key}_auto_rois.json", saved,
                       image_size=(int(shape_yx[1]), int(shape_yx[0])),
                       note=f"automatic ROIs of {acq.key}: Otsu's threshold on a component's abundance map")
    return total.rows(None)


def measure_acquisition(acq: Acquisition, references, settings: StudySettings = StudySettings(), *,
                        out_dir: str | os.PathLike | None = None, unit: str | None = None) -> pd.DataFrame:
    """ROI statistics of one acquisition (and its maps written into ``out_dir``).

    The acquisition streams through by blocks of rows (:func:`study_rows_per_block`, bounded by
    ``settings.memory_limit_mb``): each block of every file is read, dark- and flat-corrected,
    unmixed, written into the maps at its rows and added to the ROI statistics
    (:class:`probeplan.unmixing.roi.RoiAccumulator`), so no stack is ever held whole.
    Automatic ROIs (``settings.auto_rois``) need the whole map of their component: it is
    written by rows into an unnamed temporary file (float64, one (Y, X) plane per component),
    thresholded from its histogram, and the ROI's mask and statistics are made in a second
    pass over the rows.

    Parameters
    ----------
    acq : Acquisition
    references : ReferenceSpectra
    settings : StudySettings
    out_dir : path-like, optional
        Folder for ``<key>_abundance.ome.tif``, ``<key>_stderr.ome.tif``, ``<key>_residual.ome.tif``.
    unit : str, optional
        The abundance unit written in the table (default from the references' normalisation).

    Returns
    -------
    DataFrame
        Columns :data:`MEASUREMENT_COLUMNS`.
    """
    from probeplan.unmixing.pipeline import _check_noise_model, _Params, default_saturation, design_matrix, unmix_block
    from probeplan.unmixing.roi import Roi, RoiAccumulator

    src = _AcquisitionRows(acq, settings.channel_axis)
    opened = [src]
    writers = []
    try:
        names = src.channel_names
        refs, match = _matched_references(references, names, acq.where)
        M, comps = design_matrix(refs, n_channels=src.n_channels)
        K = len(comps)
        data_shape = (src.n_channels, *src.spatial_shape)
        dark = flat = None
        if settings.dark_path is not None:
            dark = _CorrectionRows(settings.dark_path, names, data_shape, acq.where, "dark")
            opened.append(dark)
        if settings.flat_path is not None:
            flat = _CorrectionRows(settings.flat_path, names, data_shape, acq.where, "flat")
            opened.append(flat)
        rows = study_rows_per_block(src.spatial_shape, src.n_channels, src.dtype, K, settings.memory_limit_mb)
        blocks = [(r0, min(src.n_rows, r0 + rows)) for r0 in range(0, src.n_rows, rows)]
        if flat is not None:  # refused before any work
            for r0, r1 in blocks:
                if not (flat.read_rows(r0, r1) > 0).all():
                    raise input_error(str(settings.flat_path), "has values <= 0 or NaN",
                                      "give a flat field that is > 0 everywhere")
        shape_yx = src.spatial_shape[-2:]
        rois, labels = _rois(settings, shape_yx)
        autos = _auto_specs(settings, comps)
        sat = default_saturation(src.dtype)
        unit = abundance_unit(refs, unit)
        write = out_dir is not None and settings.write_maps
        _check_noise_model(settings.gain_e_per_count, settings.read_noise_e, 1.0)
        # the options unmix_stack gives (default saturation, variance floor 1 count, automatic engine)
        params = _Params(M, settings.method, sat, float(settings.gain_e_per_count), float(settings.read_noise_e), 1.0,
                         "auto", write)
        if write:
            from probeplan.unmixing.pipeline import _out_axes, open_map_writers

            open_map_writers(writers, map_paths(Path(out_dir), acq.key), comps, src.spatial_shape,
                             _out_axes(src.spatial_axes), src.pixel_size_um)
        # automatic ROIs: their component's map, averaged over leading planes, goes to a temporary file by rows
        spills = {}
        for comp in dict.fromkeys(c for _, c in autos):
            spills[comp] = _PlaneSpill(shape_yx[1])
            opened.append(spills[comp])
        acc = RoiAccumulator(rois, comps, labels)

        def corrections(r0, r1, C):
            return (None if dark is None else dark.read_rows(r0, r1).reshape(C, -1),
                    None if flat is None else flat.read_rows(r0, r1).reshape(C, -1))

        for r0, r1 in blocks:
            block = src.read_rows(r0, r1)
            C, sp = block.shape[0], block.shape[1:]
            dk, ff = corrections(r0, r1, C)
            if write or spills:
                x, se, resid, _ = unmix_block(block.reshape(C, -1), params, dk, ff)
                x = x.reshape(K, *sp)
                if write:
                    writers[0].write_rows(r0, x)
                    writers[1].write_rows(r0, se.reshape(K, *sp))
                    writers[2].write_rows(r0, resid.reshape(1, *sp))
                for comp, spill in spills.items():
                    part = x[comps.index(comp)].reshape(-1, r1 - r0, shape_yx[1])
                    with np.errstate(all="ignore"):
                        spill.write_rows(r0, np.nanmean(part, axis=0) if part.shape[0] > 1 else part[0])
                del x, se, resid
            acc.add(_roi_abundances(block, dk, ff, M, sat), r0)
        stat_rows = acc.rows(None)
        if autos:
            stat_rows += _automatic_rois(acq, autos, spills, blocks, src, corrections, M, sat, comps, shape_yx,
                                         out_dir)
            rois = [*rois, *(Roi(name) for name, _ in autos)]
        for w in writers:
            w.commit()
    except BaseException:
        for w in writers:
            w.abort()
        raise
    finally:
        for r in opened:
            r.close()
    stats = {}
    for i, roi in enumerate(rois):
        part = stat_rows[i * K : (i + 1) * K]
        mean = np.array([r["mean"] for r in part])
        sd = np.array([r["sd"] for r in part])
        stats[roi.name] = (mean, sd, part[0]["n_pixels"], part[0]["n_nan"])
    bg = stats.get(settings.roi_background)
    rows = []
    for roi in rois:
        mean, sd, n, excluded = stats[roi.name]
        se = sd / np.sqrt(n) if n > 1 else np.full(len(comps), np.nan)
        for k, comp in enumerate(comps):
            tbr = tbr_se = np.nan
            if bg is not None and bg[0][k] > 0:
                b, b_se = bg[0][k], bg[1][k] / np.sqrt(bg[2]) if bg[2] > 1 else np.nan
                tbr = mean[k] / b
                # delta method for a ratio of independent means
                tbr_se = abs(tbr) * np.sqrt((se[k] / mean[k]) ** 2 + (b_se / b) ** 2) if mean[k] != 0 else np.nan
                if roi.name == settings.roi_background:
                    tbr_se = 0.0
            rows.append({"animal": acq.animal, "group": acq.group, "time_h": acq.time_h, "roi": roi.name,
                         "component": comp, "mean": float(mean[k]), "se": float(se[k]), "tbr": float(tbr),
                         "tbr_se": float(tbr_se), "sd": float(sd[k]), "n_pixels": int(n), "n_excluded": excluded,
                         "unit": unit, "acquisition": acq.key, "channel_match": match})
    return pd.DataFrame(rows, columns=list(MEASUREMENT_COLUMNS))


def map_paths(out_dir: Path, key: str) -> dict[str, Path]:
    """Files written for one acquisition: abundance, standard error and residual maps."""
    return {"abundance": out_dir / f"{key}_abundance.ome.tif", "stderr": out_dir / f"{key}_stderr.ome.tif",
            "residual": out_dir / f"{key}_residual.ome.tif"}


def _auto_roi_paths(out_dir: Path, key: str, settings: StudySettings) -> list[Path]:
    """Files written for the automatic ROIs of one acquisition (masks and their ROI file)."""
    if not settings.auto_rois:
        return []
    names = [a.split("=", 1)[0].strip() for a in settings.auto_rois]
    return [*(out_dir / f"{key}_{_safe_name(n)}_auto_roi.tif" for n in names), out_dir / f"{key}_auto_rois.json"]


def _safe_name(text: str) -> str:
    import re

    return re.sub(r"[^A-Za-z0-9._-]+", "_", text).strip("._") or "roi"


# --------------------------------------------------------------------------- tables with notes
def write_table_csv(path: str | os.PathLike, table: pd.DataFrame, notes: Sequence[str] = ()) -> Path:
    """Write a table as CSV (atomic), its notes first as ``# `` lines (read back by :func:`read_table_csv`)."""
    from probeplan.io.atomic import write_text_atomic

    head = "".join(f"# {n}\n" for n in notes)
    return write_text_atomic(path, head + table.to_csv(index=False, lineterminator="\n"))


def read_table_csv(path: str | os.PathLike) -> pd.DataFrame:
    """Read a table written by :func:`write_table_csv` (the leading ``#`` note lines skipped)."""
    with open(path, encoding="utf-8") as fh:
        skip = 0
        for line in fh:
            if not line.startswith("#"):
                break
            skip += 1
    return pd.read_csv(path, skiprows=skip, keep_default_na=True)


# --------------------------------------------------------------------------- the study
_sha256 = file_sha256


def _write_shared_rois(path: Path, settings: StudySettings, shape_yx) -> Path:
    """The study's drawn ROIs as an ROI file, to reuse with ``--rois`` (automatic ROIs are per acquisition)."""
    from dataclasses import replace

    from probeplan.unmixing.roifile import write_roi_file

    rois, _ = _rois(replace(settings, auto_rois=()), shape_yx) if (settings.rois or settings.labels_path
                                                                  or settings.roi_file) else ([], None)
    label_file = None
    if settings.labels_path is not None:
        label_file = str(Path(settings.labels_path).resolve())
    elif settings.roi_file is not None:
        label_file = next((str((Path(settings.roi_file).parent / r.labels_file).resolve()) for r in rois
                           if r.labels_file), None)
    rois = [replace(r, labels_file=label_file) if r.label is not None else r for r in rois]
    note = "the study's drawn ROIs" + (f"; automatic ROIs ({', '.join(settings.auto_rois)}) are in "
                                       "acquisitions/<acquisition>_auto_rois.json" if settings.auto_rois else "")
    background = settings.roi_background if settings.roi_background in [r.name for r in rois] else None
    return write_roi_file(path, rois, image_size=(int(shape_yx[1]), int(shape_yx[0])), background=background,
                          note=note)


def _settings_digest(settings: StudySettings, refs, unit: str) -> str:
    d = {
        "method": settings.method, "rois": list(settings.rois), "roi_background": settings.roi_background,
        "labels": _sha256(settings.labels_path) if settings.labels_path else None,
        "dark": _sha256(settings.dark_path) if settings.dark_path else None,
        "flat": _sha256(settings.flat_path) if settings.flat_path else None,
        "channel_axis": settings.channel_axis, "gain": settings.gain_e_per_count, "read_noise": settings.read_noise_e,
        "write_maps": settings.write_maps, "components": list(refs.component_names),
        "roi_file": _sha256(settings.roi_file) if settings.roi_file else None, "auto_rois": list(settings.auto_rois),
        "channels": list(refs.channel_names or []), "matrix": np.asarray(refs.matrix).tolist(), "unit": unit,
    }
    return hashlib.sha256(json.dumps(d, sort_keys=True).encode()).hexdigest()


def _read_manifest(path: Path) -> dict:
    """The study folder's manifest; an unreadable one counts as empty (everything is redone)."""
    try:
        loaded = json.loads(Path(path).read_text(encoding="utf-8"))
        if isinstance(loaded, dict) and isinstance(loaded.get("entries"), dict):
            return loaded
    except (ValueError, OSError):
        pass
    return {"entries": {}}


def _record(path: Path, key: str, entry: dict) -> None:
    """Add one acquisition's entry to the manifest under a lock (concurrent runs keep every entry)."""
    from probeplan.io.atomic import update_json_file

    def add(manifest: dict) -> dict:
        manifest["entries"][key] = entry
        return manifest

    update_json_file(path, add, read=_read_manifest)


def _done(entry, acq, digest) -> bool:
    if not isinstance(entry, dict) or entry.get("settings_sha256") != digest or entry.get("status", "done") != "done":
        return False
    if entry.get("inputs") != {str(f): _sha256(f) for f in acq.files}:
        return False
    outs = entry.get("outputs")
    if not isinstance(outs, dict):
        return False
    return all(isinstance(h, str) and Path(p).exists() and _sha256(p) == h for p, h in outs.items())


def _check_acquisition(acq: Acquisition, refs, settings: StudySettings):
    """Headers only: every file readable, channels matching the references, ROIs inside the image."""
    from probeplan.io.stacks import open_stack

    shapes = []
    names = []
    for f, ch in zip(acq.files, acq.channels or (None,) * len(acq.files), strict=True):
        with open_stack(f, channel_axis=settings.channel_axis if ch is None else None, allow_plane=ch is not None) as r:
            info = r.info
        if ch is not None and info.n_channels != 1:
            raise input_error(f"{acq.where} ({location_name(f)})", f"channel {ch!r} is a file of {info.n_channels} channels",
                              "list a multi-channel file with an empty channel cell, or give one file per channel")
        shapes.append(info.spatial_shape)
        names = info.channel_names if ch is None else None
    if len(set(shapes)) > 1:
        raise input_error(acq.where, f"the channel files have different shapes {sorted(set(shapes))}",
                          "give every channel of one acquisition the same image size")
    chans = acq.channels if acq.channels is not None else names
    n = len(acq.files) if acq.channels is not None else info.n_channels
    if chans is not None and refs.channel_names is not None:
        refs.for_channels(chans, where=acq.where)
    elif n != refs.n_channels:
        raise input_error(acq.where, f"{n} channels but the references have {refs.n_channels} rows",
                          "give one reference row per channel (a plain 3-D TIFF is read channels-first; "
                          "give channel_axis=2 for channels last)")
    _rois(settings, shapes[0][-2:])
    _auto_specs(settings, list(refs.component_names))
    return shapes[0][-2:]


def load_references(references, *, unit: str | None = None):
    """Reference spectra from a path, a DataFrame with a ``channel`` column, or :class:`ReferenceSpectra`.

    With ``unit`` the references are used as written (abundance in that unit, e.g. ``"uM"``
    when they are counts per µM); without it each column is scaled to sum 1.
    """
    from probeplan.unmixing.references import ReferenceSpectra, as_references

    refs = as_references(references, normalise=None if unit else "sum")
    if not isinstance(refs, ReferenceSpectra):
        raise TypeError(f"references: expected a CSV path, a DataFrame or ReferenceSpectra, got {type(refs).__name__}")
    return refs


def _acquisition_task(job) -> pd.DataFrame:
    """One acquisition, here or on a worker: measured, its files written together, then recorded.

    ``job`` is ``(acquisition, references, settings, maps_dir, unit, manifest_path, digest,
    policy)``.  Inside one output group the maps and the table are written; the manifest
    records the acquisition as being written, the group is moved into place, and the manifest
    records it as done with the checksums (under the manifest's lock, so workers finishing at
    once keep every entry).  ``policy`` is None here (the caller's overwrite rule applies) and
    ``(overwrite, replaceable, option)`` on a worker, which opens the same rule for itself.
    ``names`` (on a worker) is ``(files, maps_dir)`` as the client named them: the manifest
    records those names, so that a rerun on the client recognises its entries.
    """
    import contextlib

    from probeplan.io.atomic import output_policy

    acq, refs, settings, maps_dir, unit, manifest_path, digest, policy, names = job
    files_named, dir_named = names if names is not None else (acq.files, maps_dir)
    rule = (output_policy(overwrite=policy[0], replaceable=policy[1], option=policy[2]) if policy is not None
            else contextlib.nullcontext())
    with rule, output_batch() as batch:  # each acquisition's files appear together, then are recorded
        table = measure_acquisition(acq, refs, settings, out_dir=maps_dir, unit=unit)
        if maps_dir is not None:
            mfile = write_table_csv(maps_dir / f"{acq.key}_measurements.csv", table, MEASUREMENTS_NOTES)
            written = [mfile, *(map_paths(maps_dir, acq.key).values() if settings.write_maps else []),
                       *_auto_roi_paths(maps_dir, acq.key, settings)]
            named = [str(Path(dir_named) / p.name) for p in written]
            _record(manifest_path, acq.key, {"status": "writing", "outputs": dict.fromkeys(named)})
            entry = {"status": "done", "settings_sha256": digest,
                     "inputs": {str(n): _sha256(f) for n, f in zip(files_named, acq.files, strict=True)},
                     "outputs": {n: _sha256(readable_path(p)) for n, p in zip(named, written, strict=True)}}
            batch.commit()
            _record(manifest_path, acq.key, entry)
    return table


def _absolute_acquisition(acq: Acquisition) -> Acquisition:
    import dataclasses

    # paths made absolute for the workers; fsspec URLs are sent as they are
    return dataclasses.replace(acq, files=tuple(f if is_url(f) else Path(f).absolute() for f in acq.files))


def _absolute_settings(settings: StudySettings) -> StudySettings:
    import dataclasses

    return dataclasses.replace(settings, **{k: Path(getattr(settings, k)).absolute()
                                            for k in ("labels_path", "dark_path", "flat_path", "roi_file")
                                            if getattr(settings, k) is not None})


def run_study(study_csv: str | os.PathLike, references, *, out_dir: str | os.PathLike | None = None,
              settings: StudySettings | None = None, unit: str | None = None, planned_effect: dict | None = None,
              progress: Callable[[Acquisition, str], None] | None = None, scheduler=None,
              **options) -> StudyResult:
    """Unmix every acquisition of a study, measure its ROIs, compare the groups and fit the kinetics.

    Parameters
    ----------
    study_csv : path-like
        The study table (:mod:`probeplan.study.table`).
    references : path-like, DataFrame or ReferenceSpectra
        Reference spectra with channel names (see :func:`load_references`).
    out_dir : path-like, optional
        Folder for ``measurements.csv``, ``groups.csv``, ``kinetics.csv`` and the maps of each
        acquisition (under ``acquisitions/``).  Without it nothing is written.
    settings : StudySettings, optional
        Or give its fields as keyword arguments (``rois=["tumour:..."]``, ``method="ls"``...).
    unit : str, optional
        Use the references as written and call the abundance unit this (see :func:`load_references`).
    planned_effect : dict, optional
        ``{"effect_size": ..., "sd": ...}`` assumed by the plan's power analysis, shown beside
        the observed effect sizes.
    progress : callable, optional
        Called with ``(acquisition, "done" | "skipped")`` after each acquisition.
    scheduler : str or distributed.Client, optional
        A dask.distributed scheduler address (or a connected client): one task per acquisition;
        each worker reads the acquisition's files and writes its maps and table itself (the
        inputs and ``out_dir`` must be on a filesystem the workers share; paths are sent
        absolute), and only the small ROI table and checksums come back.

    Returns
    -------
    StudyResult

    Raises
    ------
    InputError
        Any bad input, found before anything is written (see :mod:`probeplan.study.table`).
    """
    from probeplan.study.kinetics import KINETICS_NOTES, fit_time_courses
    from probeplan.study.stats import GROUPS_NOTES, compare_groups

    if settings is None:
        opts = dict(options)
        for k in ("labels_path", "dark_path", "flat_path", "roi_file"):
            if opts.get(k) is not None:
                opts[k] = Path(opts[k])
        for k in ("rois", "auto_rois"):
            if k in opts:
                opts[k] = tuple(opts[k])
        try:
            settings = StudySettings(**opts)
        except TypeError as exc:
            raise TypeError(f"run_study: {exc}") from None
    elif options:
        raise TypeError(f"run_study: give either settings or its fields, not both ({sorted(options)})")
    from probeplan.unmixing.pipeline import METHODS

    if settings.method not in METHODS:
        raise input_error("method", f"{settings.method!r} is not known", f"choose one of {', '.join(METHODS)}")
    if not 0 < settings.memory_limit_mb < np.inf:
        raise input_error("memory_limit_mb", f"{settings.memory_limit_mb} is not a finite number > 0",
                          "give a positive memory bound in MiB")
    for what, p in (("dark_path", settings.dark_path), ("flat_path", settings.flat_path), ("labels_path", settings.labels_path),
                    ("roi_file", settings.roi_file)):
        if p is not None and not Path(p).is_file():
            raise input_error(str(p), "file not found", f"give an existing file as {what}")
    refs = load_references(references, unit=unit)
    unit_text = abundance_unit(refs, unit)
    acqs = read_study_table(study_csv)
    shape_yx = None
    for acq in acqs:
        shape_yx = _check_acquisition(acq, refs, settings)
    out = Path(out_dir) if out_dir is not None else None
    maps_dir = None
    manifest: dict = {"entries": {}}
    outputs: dict[str, Path] = {}
    if out is not None:
        from probeplan.io.atomic import refuse_input_paths

        if out.exists() and not out.is_dir():
            raise input_error("out", f"{str(out)!r} is a file", "give a folder for the study's outputs")
        inputs = [Path(study_csv), *(f for a in acqs for f in a.files if not is_url(f))]
        inputs += [p for p in (settings.dark_path, settings.flat_path, settings.labels_path, settings.roi_file)
                   if p is not None]
        if isinstance(references, (str, os.PathLike)):
            inputs.append(Path(references))
        if any(Path(p).resolve().parent == out.resolve() / "acquisitions" for p in inputs) or any(
                Path(p).resolve() == out.resolve() for p in inputs):
            raise input_error("out", f"{str(out)!r} holds input files", "give a separate output folder")
        refuse_input_paths([out / n for n in ("measurements.csv", "groups.csv", "kinetics.csv", "report.html")],
                           inputs, option="out")
        maps_dir = out / "acquisitions"
        make_output_folder(maps_dir)
        mpath = out / MANIFEST_NAME
        if mpath.is_file():
            manifest = _read_manifest(mpath)
            # a rerun into the study's own folder resumes it: what the earlier run wrote may be replaced
            policy = current_policy()
            if policy is not None:
                policy.allow([out / n for n in _OWN_FILES])
                policy.allow(p for e in manifest["entries"].values() if isinstance(e, dict)
                             for p in (e.get("outputs") or {}))
        check_outputs([out / n for n in _OWN_FILES])
    digest = _settings_digest(settings, refs, unit_text)
    tables: list = [None] * len(acqs)
    skipped = []
    todo = []
    for i, acq in enumerate(acqs):
        entry = manifest["entries"].get(acq.key)
        if maps_dir is not None and _done(entry, acq, digest):
            tables[i] = read_table_csv(maps_dir / f"{acq.key}_measurements.csv")
            skipped.append(acq.key)
            if progress is not None:
                progress(acq, "skipped")
        else:
            todo.append(i)
    manifest_path = None if out is None else out / MANIFEST_NAME

    def record(i, table):
        tables[i] = table
        if progress is not None:
            progress(acqs[i], "done")

    if scheduler is None:
        for i in todo:
            record(i, _acquisition_task((acqs[i], refs, settings, maps_dir, unit, manifest_path, digest, None, None)))
    elif todo:
        # one task per acquisition: the worker reads its files and writes its maps and table itself
        # (absolute paths on a filesystem it shares) and records it in the manifest; only the small
        # table comes back
        from probeplan.unmixing.cluster import connect, run_tasks

        remote = _absolute_settings(settings)
        policy = current_policy()
        rule = (bool(policy.overwrite), sorted(str(p) for p in policy.replaceable), policy.option) if policy else None
        remote_dir = None if maps_dir is None else maps_dir.absolute()
        remote_manifest = None if manifest_path is None else manifest_path.absolute()
        jobs = [(_absolute_acquisition(acqs[i]), refs, remote, remote_dir, unit, remote_manifest, digest, rule,
                 (acqs[i].files, maps_dir)) for i in todo]
        client = connect(scheduler) if isinstance(scheduler, str) else scheduler
        try:
            run_tasks(client, _acquisition_task, jobs, on_result=lambda j, result: record(todo[j], result))
        finally:
            if isinstance(scheduler, str):
                client.close()
    measurements = pd.concat(tables, ignore_index=True)
    measurements["time_h"] = measurements["time_h"].astype(float)
    groups, group_notes = compare_groups(measurements, background=settings.roi_background,
                                         planned_effect=planned_effect)
    kinetics, kinetic_notes = fit_time_courses(measurements, background=settings.roi_background)
    notes = [f"Abundance unit: {unit_text}."]
    if out is not None:
        outputs["measurements"] = write_table_csv(out / "measurements.csv", measurements,
                                                  [*MEASUREMENTS_NOTES, notes[0]])
        outputs["groups"] = write_table_csv(out / "groups.csv", groups, [*GROUPS_NOTES, *group_notes])
        outputs["kinetics"] = write_table_csv(out / "kinetics.csv", kinetics, [*KINETICS_NOTES, *kinetic_notes])
        outputs["rois"] = _write_shared_rois(out / "rois.json", settings, shape_yx)
    return StudyResult(measurements, groups, kinetics, acqs, unit_text, notes + group_notes + kinetic_notes, outputs,
                       skipped)
