"""Calibration with a phantom: abundance (counts) against concentration (µM), and its use on abundance maps.

``PHANTOM.csv`` has one row per well or tube: ``file, component, concentration_uM, roi``
(``roi`` as ``x0,y0,x1,y1`` in pixels, end excluded, quoted), blanks at 0 µM.  Each file
is unmixed with the reference spectra; the mean abundance of the named component in the
ROI, with its standard error (pixel SD/√n), is one calibration point.

Fit, per component: weighted least squares with intercept, y = b + m·c, weights
1/SE² of each point; the coefficient covariance is scaled by the weighted residual
variance (the convention of ``statsmodels.WLS``, against which the tests check it),
r² is the weighted, centred coefficient of determination.

Limit of detection: LOD = 3·σ_blank / m (the IUPAC 3σ rule: Long & Winefordner 1983;
ICH Q2(R1) uses 3.3σ), with σ_blank the standard deviation of the blank wells' means when
there are two or more blanks, otherwise the pixel-to-pixel standard deviation inside the
one blank ROI (then the LOD is that of a single pixel).  Limit of quantification
LOQ = 10·σ_blank / m (ICH Q2(R1)).  The calibrated range is the lowest to the highest
non-zero standard.

Applying a calibration: c = (a − b)/m with variance
[SE_a² + var(b) + c²·var(m) + 2c·cov(b, m)]/m² (first-order propagation).  Values are
flagged ``below_lod``, ``below_range``, ``above_range`` or ``in_range``.  A calibration holds
only at the depth and in the medium of its phantom: the escaping light and its spectrum
change with depth, so applying it at another depth warns.

References
----------
G. L. Long, J. D. Winefordner, Anal. Chem. 55, 712A (1983), doi:10.1021/ac00258a724.
ICH Q2(R1), Validation of analytical procedures: text and methodology (2005).
"""

from __future__ import annotations

import csv
import math
import os
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from probeplan.errors import ModelValidityWarning, input_error, warn_at_caller

__all__ = [
    "PHANTOM_COLUMNS",
    "CALIBRATION_COLUMNS",
    "FLAGS",
    "LOD_SIGMAS",
    "LOQ_SIGMAS",
    "DEPTH_TOLERANCE_MM",
    "read_phantom_csv",
    "weighted_line_fit",
    "Calibration",
    "calibrate_points",
    "calibrate_phantom",
    "read_calibration_csv",
    "apply_calibration",
    "plot_calibration",
    "calibrate_outputs",
    "calibrate_measurements",
]

PHANTOM_COLUMNS = ("file", "component", "concentration_uM", "roi")
CALIBRATION_COLUMNS = ("component", "slope_counts_per_uM", "intercept_counts", "lod_uM", "r2", "range_low_uM",
                       "range_high_uM", "loq_uM", "slope_se", "intercept_se", "cov_intercept_slope", "sigma_blank_counts",
                       "blank_sigma_from", "n_points", "phantom_depth_mm", "phantom_tissue", "unit")
#: Flag codes of calibrated values.
FLAGS = {0: "in_range", 1: "below_lod", 2: "below_range", 3: "above_range", 255: "no_value"}
#: The IUPAC detection rule (3σ of the blank over the slope) and the ICH quantification rule (10σ).
LOD_SIGMAS = 3.0
LOQ_SIGMAS = 10.0
#: A calibration applied further than this from its phantom's depth warns.
DEPTH_TOLERANCE_MM = 0.5
_ROI = re.compile(r"^\s*(\d+)\s*,\s*(\d+)\s*,\s*(\d+)\s*,\s*(\d+)\s*$")


def read_phantom_csv(path: str | os.PathLike) -> pd.DataFrame:
    """Read and check ``PHANTOM.csv``; file paths are resolved relative to the CSV.

    Returns
    -------
    DataFrame
        Columns ``file`` (Path), ``component``, ``concentration_uM``, ``roi`` (tuple x0, y0, x1, y1), ``line``.

    Raises
    ------
    InputError
        A missing column, an empty file, a bad number or ROI (naming the file and line).
    """
    path = Path(path)
    if not path.is_file():
        raise input_error(str(path), "file not found", "give the phantom table (file, component, concentration_uM, roi)")
    with open(path, newline="", encoding="utf-8-sig") as fh:
        lines = [ln for ln in fh if ln.strip() and not ln.lstrip().startswith("#")]
    reader = csv.DictReader(lines)
    header = [h.strip() for h in (reader.fieldnames or [])]
    missing = [c for c in PHANTOM_COLUMNS if c not in header]
    if missing:
        raise input_error(f"{path}:1", f"missing column(s) {missing} (found {header})",
                          "give the header: file,component,concentration_uM,roi")
    rows = []
    for i, raw in enumerate(reader, start=2):
        row = {k.strip(): (v or "").strip() for k, v in raw.items() if k is not None}
        where = f"{path}:{i}"
        try:
            conc = float(row["concentration_uM"])
        except ValueError:
            raise input_error(f"{where}: concentration_uM", f"got {row['concentration_uM']!r}",
                              "give a number in µM (0 for a blank)") from None
        if not math.isfinite(conc) or conc < 0:
            raise input_error(f"{where}: concentration_uM", f"got {conc!r}", "give a finite number >= 0 in µM")
        m = _ROI.match(row["roi"])
        if not m:
            raise input_error(f"{where}: roi", f"got {row['roi']!r}", 'give "x0,y0,x1,y1" in pixels, quoted')
        x0, y0, x1, y1 = (int(g) for g in m.groups())
        if x1 <= x0 or y1 <= y0:
            raise input_error(f"{where}: roi", f"{row['roi']!r} is empty", "give x0 < x1 and y0 < y1")
        if not row["file"] or not row["component"]:
            raise input_error(where, "empty file or component", "name the stack file and the component in every row")
        rows.append({"file": (path.parent / row["file"]), "component": row["component"], "concentration_uM": conc,
                     "roi": (x0, y0, x1, y1), "line": i})
    if not rows:
        raise input_error(str(path), "no rows", "give one row per well or tube, blanks at 0 µM")
    return pd.DataFrame(rows)


def weighted_line_fit(concentration_uM, mean, se) -> dict:
    """Weighted least-squares line y = b + m·c with weights 1/se².

    Returns
    -------
    dict
        ``slope, intercept, slope_se, intercept_se, cov_intercept_slope, r2`` (statsmodels WLS conventions:
        covariance scaled by the weighted residual variance over n − 2 degrees of freedom; weighted centred r²).

    Examples
    --------
    >>> fit = weighted_line_fit([0, 1, 2, 4], [10.0, 20.0, 30.0, 50.0], [1.0, 1.0, 1.0, 1.0])
    >>> round(fit["slope"], 6), round(fit["intercept"], 6), round(fit["r2"], 6)
    (10.0, 10.0, 1.0)
    """
    c = np.asarray(concentration_uM, dtype=np.float64)
    y = np.asarray(mean, dtype=np.float64)
    s = np.asarray(se, dtype=np.float64)
    w = 1.0 / np.maximum(s, np.finfo(float).tiny) ** 2
    X = np.column_stack([np.ones_like(c), c])
    XtW = X.T * w
    cov_unscaled = np.linalg.inv(XtW @ X)
    beta = cov_unscaled @ (XtW @ y)
    resid = y - X @ beta
    dof = max(c.size - 2, 1)
    scale = float(np.sum(w * resid**2) / dof)
    cov = cov_unscaled * scale
    ybar = float(np.sum(w * y) / np.sum(w))
    ss_tot = float(np.sum(w * (y - ybar) ** 2))
    r2 = 1.0 - float(np.sum(w * resid**2)) / ss_tot if ss_tot > 0 else float("nan")
    return {"slope": float(beta[1]), "intercept": float(beta[0]), "slope_se": math.sqrt(cov[1, 1]),
            "intercept_se": math.sqrt(cov[0, 0]), "cov_intercept_slope": float(cov[0, 1]), "r2": r2}


@dataclass
class Calibration:
    """Calibration lines per component (a DataFrame of :data:`CALIBRATION_COLUMNS`) and its points."""

    table: pd.DataFrame
    points: pd.DataFrame = field(default_factory=pd.DataFrame)
    notes: list[str] = field(default_factory=list)

    def row(self, component: str) -> pd.Series:
        """The line of one component."""
        hit = self.table[self.table["component"] == component]
        if hit.empty:
            raise input_error("calibration", f"no line for component {component!r}",
                              f"calibrate it, or use one of {list(self.table['component'])}")
        return hit.iloc[0]


def calibrate_points(points: pd.DataFrame, *, depth_mm: float, tissue: str = "phantom",
                     where: str = "phantom") -> Calibration:
    """Fit the calibration lines from measured points.

    Parameters
    ----------
    points : DataFrame
        Columns ``component, concentration_uM, mean, se, pixel_sd`` (and ``line``, the CSV line, for messages).
    depth_mm : float
        Depth of the phantom's wells below its surface (mm), recorded.
    tissue : str
        The phantom's medium, recorded.
    where : str
        The phantom file, for messages.

    Raises
    ------
    InputError
        Fewer than three concentrations, no blank, or a response that does not rise with concentration.
    """
    rows, notes = [], []
    for comp, grp in points.groupby("component", sort=False):
        line = int(grp["line"].iloc[0]) if "line" in grp else 0
        levels = grp.groupby("concentration_uM")["mean"].mean().sort_index()
        if levels.size < 3:
            raise input_error(f"{where}:{line}", f"component {comp!r} has {levels.size} concentration(s) "
                              f"({levels.index.tolist()} µM)", "give at least three, one of them a blank at 0 µM")
        if levels.index[0] != 0:
            raise input_error(f"{where}:{line}", f"component {comp!r} has no blank (0 µM) well",
                              "add a row with concentration_uM 0 for the blank")
        steps = np.diff(levels.to_numpy())
        if np.any(steps <= 0):
            j = int(np.argmax(steps <= 0)) + 1
            bad = grp[grp["concentration_uM"] == levels.index[j]]
            bad_line = int(bad["line"].iloc[0]) if "line" in bad else 0
            raise input_error(f"{where}:{bad_line}", f"component {comp!r}: the response at {levels.index[j]:g} µM "
                              f"({levels.iloc[j]:.4g}) is not above that at {levels.index[j - 1]:g} µM "
                              f"({levels.iloc[j - 1]:.4g}); the response is not monotonic",
                              "check that row's file, ROI and concentration (saturation, a wrong well, a mix-up)")
        fit = weighted_line_fit(grp["concentration_uM"], grp["mean"], grp["se"])
        blanks = grp[grp["concentration_uM"] == 0]
        if len(blanks) >= 2:
            sigma, source = float(np.std(blanks["mean"], ddof=1)), "blank wells"
        else:
            sigma, source = float(blanks["pixel_sd"].iloc[0]), "blank pixels"
        slope = fit["slope"]
        nonzero = grp.loc[grp["concentration_uM"] > 0, "concentration_uM"]
        rows.append({"component": comp, "slope_counts_per_uM": slope, "intercept_counts": fit["intercept"],
                     "lod_uM": LOD_SIGMAS * sigma / slope, "r2": fit["r2"], "range_low_uM": float(nonzero.min()),
                     "range_high_uM": float(nonzero.max()), "loq_uM": LOQ_SIGMAS * sigma / slope,
                     "slope_se": fit["slope_se"], "intercept_se": fit["intercept_se"],
                     "cov_intercept_slope": fit["cov_intercept_slope"], "sigma_blank_counts": sigma,
                     "blank_sigma_from": source, "n_points": int(len(grp)), "phantom_depth_mm": float(depth_mm),
                     "phantom_tissue": tissue, "unit": "abundance counts per uM"})
        if source == "blank pixels":
            notes.append(f"{comp}: one blank well, so the LOD uses the pixel-to-pixel SD of the blank (a single-pixel "
                         "LOD); image two or more blanks for a well-to-well LOD")
    return Calibration(pd.DataFrame(rows, columns=list(CALIBRATION_COLUMNS)), points, notes)


def calibrate_phantom(phantom_csv, references, *, depth_mm: float, tissue: str = "phantom", method: str = "nnls",
                      dark=None, gain_e_per_count: float = 1.0, read_noise_e: float = 0.0) -> Calibration:
    """Unmix every phantom file and fit the calibration lines (see the module notes).

    Parameters
    ----------
    phantom_csv : path
        ``PHANTOM.csv`` (:data:`PHANTOM_COLUMNS`).
    references : ReferenceSpectra
        Reference spectra (:func:`probeplan.unmixing.references.read_references_csv`).
    depth_mm : float
        Depth of the wells below the phantom's surface (mm; 0 for wells imaged from above).
    tissue : str
        The phantom's medium (recorded with the calibration).
    method, dark, gain_e_per_count, read_noise_e :
        As :func:`probeplan.unmixing.pipeline.unmix_stack`; ``dark`` is a path or an array.

    Returns
    -------
    Calibration
    """
    from probeplan.errors import positive_number
    from probeplan.io.stacks import read_stack
    from probeplan.unmixing.pipeline import unmix_stack

    depth = positive_number("depth_mm", depth_mm, allow_zero=True)
    table = read_phantom_csv(phantom_csv)
    names = list(references.component_names)
    for _, r in table.iterrows():
        if r["component"] not in names:
            raise input_error(f"{phantom_csv}:{r['line']}: component", f"{r['component']!r} is not in the references "
                              f"({names})", "name a component of the reference spectra CSV, or add its column there")
    dark_arr = read_stack(dark)[0] if isinstance(dark, (str, os.PathLike)) else dark
    cache: dict = {}
    points = []
    for _, r in table.iterrows():
        f = Path(r["file"])
        if f not in cache:
            if not f.is_file():
                raise input_error(f"{phantom_csv}:{r['line']}: file", f"{str(f)!r} not found",
                                  "give the stack's path relative to the phantom CSV")
            data, info = read_stack(f)
            refs = references.for_channels(info.channel_names, where=str(f))
            res = unmix_stack(data, refs, method=method, channel_axis=0, dark=dark_arr,
                              gain_e_per_count=gain_e_per_count, read_noise_e=read_noise_e)
            cache[f] = res.abundances
        a = cache[f]
        x0, y0, x1, y1 = r["roi"]
        if y1 > a.shape[-2] or x1 > a.shape[-1]:
            raise input_error(f"{phantom_csv}:{r['line']}: roi", f"{r['roi']} extends past the image "
                              f"({a.shape[-1]} x {a.shape[-2]} pixels)", "keep the rectangle inside the image")
        vals = np.asarray(a[names.index(r["component"]), ..., y0:y1, x0:x1], dtype=np.float64).ravel()
        vals = vals[np.isfinite(vals)]
        if vals.size < 2:
            raise input_error(f"{phantom_csv}:{r['line']}: roi", "fewer than two valid pixels",
                              "enlarge the ROI or check for saturated pixels")
        sd = float(np.std(vals, ddof=1))
        points.append({"component": r["component"], "concentration_uM": r["concentration_uM"], "file": str(f),
                       "roi": ",".join(str(v) for v in r["roi"]), "mean": float(vals.mean()),
                       "se": sd / math.sqrt(vals.size), "pixel_sd": sd, "pixels": int(vals.size), "line": r["line"]})
    return calibrate_points(pd.DataFrame(points), depth_mm=depth, tissue=tissue, where=str(phantom_csv))


def read_calibration_csv(path: str | os.PathLike) -> Calibration:
    """Read a ``calibration.csv`` written by :func:`calibrate_phantom` (the required columns are checked)."""
    path = Path(path)
    if not path.is_file():
        raise input_error(str(path), "file not found", "give the calibration.csv written by 'probeplan calibrate'")
    try:
        table = pd.read_csv(path)
    except (ValueError, pd.errors.ParserError) as exc:
        raise input_error(str(path), f"is not a CSV table ({exc})", "give the calibration.csv written by 'probeplan calibrate'") from None
    needed = list(CALIBRATION_COLUMNS[:7])
    missing = [c for c in needed if c not in table.columns]
    if missing:
        raise input_error(str(path), f"missing column(s) {missing}", "give the calibration.csv written by 'probeplan calibrate'")
    for c in needed[1:]:
        if not np.all(np.isfinite(pd.to_numeric(table[c], errors="coerce"))):
            raise input_error(f"{path}: {c}", "holds a non-numeric or empty value", "re-run 'probeplan calibrate'")
    if np.any(table["slope_counts_per_uM"] <= 0):
        raise input_error(f"{path}: slope_counts_per_uM", "a slope is not positive", "re-run 'probeplan calibrate'")
    for c in ("slope_se", "intercept_se", "cov_intercept_slope"):
        if c not in table.columns:
            table[c] = 0.0
    if "phantom_depth_mm" not in table.columns:
        table["phantom_depth_mm"] = np.nan
    return Calibration(table)


def apply_calibration(abundance, standard_error, component_names, calibration: Calibration, *,
                      depth_mm: float | None = None) -> dict:
    """Abundances (counts) → concentrations (µM) with standard errors and range flags.

    Parameters
    ----------
    abundance, standard_error : ndarray, shape (K, ...)
    component_names : sequence of str
        Names of the K components; those without a calibration line are skipped.
    calibration : Calibration
    depth_mm : float, optional
        Depth of the target being measured; a :class:`~probeplan.errors.ModelValidityWarning` is
        given when it differs from the phantom's by more than :data:`DEPTH_TOLERANCE_MM`, or when
        it is not given.

    Returns
    -------
    dict
        ``names`` (calibrated components), ``concentration_uM`` and ``se_uM`` (K', ...), ``flags`` (K', ...) uint8
        (codes :data:`FLAGS`), ``unit`` ``"uM"``.

    Examples
    --------
    >>> import pandas as pd, numpy as np
    >>> cal = Calibration(pd.DataFrame([{"component": "A", "slope_counts_per_uM": 100.0, "intercept_counts": 10.0,
    ...     "lod_uM": 0.05, "r2": 1.0, "range_low_uM": 0.1, "range_high_uM": 2.0, "slope_se": 0.0,
    ...     "intercept_se": 0.0, "cov_intercept_slope": 0.0, "phantom_depth_mm": 0.0}]))
    >>> out = apply_calibration(np.array([[110.0, 410.0]]), np.array([[5.0, 5.0]]), ["A"], cal, depth_mm=0.0)
    >>> out["concentration_uM"].tolist(), out["flags"].tolist()
    ([[1.0, 4.0]], [[0, 3]])
    """
    a = np.asarray(abundance, dtype=np.float64)
    se = np.asarray(standard_error, dtype=np.float64)
    names = [n for n in component_names if n in set(calibration.table["component"])]
    if not names:
        raise input_error("calibration", f"no line for any of {list(component_names)}",
                          "calibrate with a phantom of the same probes (names must match the references)")
    phantom_depths = {float(d) for d in calibration.table["phantom_depth_mm"] if np.isfinite(d)}
    if depth_mm is None:
        warn_at_caller("calibration applied without the target's depth: abundances drift with depth, so µM values are "
                      "only as good as the match between phantom and target depth", ModelValidityWarning)
    elif any(abs(depth_mm - d) > DEPTH_TOLERANCE_MM for d in phantom_depths):
        warn_at_caller(f"calibration from a phantom at {sorted(phantom_depths)} mm applied at {depth_mm:g} mm: "
                      "the escaping light changes with depth, so these µM values are biased; calibrate at the "
                      "target's depth", ModelValidityWarning)
    conc, err, flags = [], [], []
    for name in names:
        k = list(component_names).index(name)
        r = calibration.row(name)
        m, b = float(r["slope_counts_per_uM"]), float(r["intercept_counts"])
        c = (a[k] - b) / m
        var = (se[k] ** 2 + float(r["intercept_se"]) ** 2 + c**2 * float(r["slope_se"]) ** 2
               + 2.0 * c * float(r["cov_intercept_slope"])) / m**2
        f = np.zeros(c.shape, np.uint8)
        f[c > float(r["range_high_uM"])] = 3
        f[c < float(r["range_low_uM"])] = 2
        f[c < float(r["lod_uM"])] = 1
        f[~np.isfinite(c)] = 255
        conc.append(c)
        err.append(np.sqrt(np.maximum(var, 0.0)))
        flags.append(f)
    return {"names": names, "concentration_uM": np.stack(conc), "se_uM": np.stack(err), "flags": np.stack(flags),
            "unit": "uM"}


def plot_calibration(calibration: Calibration):
    """A figure: each component's points (± SE) and fitted line, the LOD marked. Returns a matplotlib Figure."""
    from matplotlib.figure import Figure

    comps = list(calibration.table["component"])
    fig = Figure(figsize=(4.0 * max(len(comps), 1), 3.4), layout="constrained")
    axes = fig.subplots(1, max(len(comps), 1), squeeze=False)[0]
    for ax, comp in zip(axes, comps, strict=False):
        r = calibration.row(comp)
        pts = calibration.points[calibration.points["component"] == comp] if not calibration.points.empty else None
        if pts is not None:
            ax.errorbar(pts["concentration_uM"], pts["mean"], yerr=pts["se"], fmt="o", color="0.2", ms=4,
                        label="phantom wells (mean ± SE)")
            c = np.linspace(0.0, float(pts["concentration_uM"].max()), 50)
        else:
            c = np.linspace(0.0, float(r["range_high_uM"]), 50)
        ax.plot(c, r["intercept_counts"] + r["slope_counts_per_uM"] * c, color="tab:blue",
                label=f"fit: {r['slope_counts_per_uM']:.4g} counts/µM, r² {r['r2']:.4f}")
        ax.axvline(r["lod_uM"], color="tab:red", ls="--", lw=1, label=f"LOD {r['lod_uM']:.3g} µM (3σ blank / slope)")
        ax.set_title(comp, fontsize=9)
        ax.set_xlabel("concentration (µM)")
        ax.set_ylabel("abundance (counts)")
        ax.legend(fontsize=7)
    return fig


def calibrate_outputs(outputs: dict, calibration: Calibration, *, depth_mm: float | None = None, rois=(),
                      background: str | None = "background") -> dict:
    """Write µM maps next to an unmixing's outputs (:func:`probeplan.unmixing.pipeline.unmix_file`).

    Writes ``<stem>_uM.ome.tif`` (concentration, µM), ``<stem>_uM_se.ome.tif`` (its standard error, µM),
    ``<stem>_uM_flags.ome.tif`` (uint8 codes of :data:`FLAGS`) and, with ``rois``, ``<stem>_uM_roi.csv``
    (ROI statistics in µM with a ``unit`` column and the range flag of each ROI mean).  Components the
    calibration does not hold are left out (they stay in counts in the abundance file).

    Returns
    -------
    dict
        Paths by kind (``uM``, ``uM_se``, ``uM_flags``, ``uM_roi``) and ``names``, ``n_flagged`` (pixels per flag name).
    """
    from probeplan.io.atomic import readable_path, write_csv_atomic
    from probeplan.io.stacks import read_stack, write_stack
    from probeplan.unmixing.roi import roi_statistics
    from probeplan.unmixing.roifile import regions_for_image

    abundance, info = read_stack(readable_path(outputs["abundance"]))  # written in this run: maybe still staged
    stderr, _ = read_stack(readable_path(outputs["stderr"]))
    names = list(info.channel_names or [])
    res = apply_calibration(abundance, stderr, names, calibration, depth_mm=depth_mm)
    base = Path(outputs["abundance"])
    stem = base.name
    for ext in (".ome.tiff", ".ome.tif", ".tiff", ".tif"):
        if stem.lower().endswith(ext):
            stem = stem[: -len(ext)]
            break
    paths = {"uM": base.with_name(stem + "_uM.ome.tif"), "uM_se": base.with_name(stem + "_uM_se.ome.tif"),
             "uM_flags": base.with_name(stem + "_uM_flags.ome.tif")}
    cal_names = res["names"]
    write_stack(paths["uM"], res["concentration_uM"], channel_names=[f"{n} [uM]" for n in cal_names],
                pixel_size_um=info.pixel_size_um)
    write_stack(paths["uM_se"], res["se_uM"], channel_names=[f"{n} standard error [uM]" for n in cal_names],
                pixel_size_um=info.pixel_size_um)
    write_stack(paths["uM_flags"], res["flags"], channel_names=[f"{n} flag" for n in cal_names],
                pixel_size_um=info.pixel_size_um, dtype=np.uint8)
    counts = {FLAGS[code]: int(np.sum(res["flags"] == code)) for code in FLAGS}
    if rois:
        roi_list, _drawn, labels = regions_for_image(rois, abundance.shape[-2:])
        rows = roi_statistics(res["concentration_uM"], roi_list, cal_names, labels=labels,
                              background=background).to_dict("records")
        for row in rows:
            line = calibration.row(row["component"])
            mean = row["mean"]
            row["flag"] = ("no_value" if not np.isfinite(mean) else "below_lod" if mean < line["lod_uM"]
                           else "below_range" if mean < line["range_low_uM"]
                           else "above_range" if mean > line["range_high_uM"] else "in_range")
            row["unit"] = "uM"
        paths["uM_roi"] = base.with_name(stem + "_uM_roi.csv")
        write_csv_atomic(paths["uM_roi"], rows, ["roi", "component", "n_pixels", "n_nan", "mean", "sd", "tbr", "unit",
                                                 "flag"])
    return {**paths, "names": cal_names, "n_flagged": counts}


def calibrate_measurements(measurements: pd.DataFrame, calibration: Calibration, *,
                           depth_mm: float | None = None) -> pd.DataFrame:
    """A study's ROI measurements in µM: ``mean``, ``se`` (and ``sd``) converted, ``unit`` set, ``flag`` added.

    Components without a calibration line are left out (they stay in ``measurements.csv`` in counts).
    ``tbr`` is recomputed from the calibrated means (the intercept changes it).  See :func:`apply_calibration`.
    """
    names = [n for n in dict.fromkeys(measurements["component"]) if n in set(calibration.table["component"])]
    if not names:
        raise input_error("calibration", f"no line for any measured component {sorted(set(measurements['component']))}",
                          "calibrate with a phantom of the same probes (names must match the references)")
    out = measurements[measurements["component"].isin(names)].copy()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ModelValidityWarning)
        for name in names:
            rows = out["component"] == name
            res = apply_calibration(out.loc[rows, "mean"].to_numpy()[None], out.loc[rows, "se"].to_numpy()[None],
                                    [name], calibration, depth_mm=depth_mm)
            out.loc[rows, "mean"] = res["concentration_uM"][0]
            out.loc[rows, "se"] = res["se_uM"][0]
            if "sd" in out:
                out.loc[rows, "sd"] = out.loc[rows, "sd"] / float(calibration.row(name)["slope_counts_per_uM"])
            out.loc[rows, "flag"] = [FLAGS[int(f)] for f in res["flags"][0]]
    for w in {str(w.message): w for w in caught}.values():
        warn_at_caller(w.message, w.category)
    out["unit"] = "uM"
    key = ["animal", "time_h", "component"]
    if "background" in set(out["roi"]):
        bg = out[out["roi"] == "background"].set_index(key)["mean"]
        ref = out.set_index(key).index.map(bg.to_dict().get)
        with np.errstate(divide="ignore", invalid="ignore"):
            out["tbr"] = np.where(np.asarray(ref, dtype=float) > 0, out["mean"] / np.asarray(ref, dtype=float), np.nan)
    return out.drop(columns=[c for c in ("tbr_se",) if c in out.columns])
