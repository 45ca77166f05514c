"""Region-of-interest statistics of abundance maps: mean ± SD per probe and target-to-background ratio.

ROIs are rectangles ``"name:x0,y0,x1,y1"`` (pixel indices; ``x0, y0`` included, ``x1, y1``
excluded; x is the column, y the row), ellipses ``"name:ellipse:cx,cy,rx,ry"``, polygons
``"name:polygon:x1,y1,x2,y2,x3,y3[,...]"`` or the non-zero labels of a label image
(``label_<n>``, or a name per label from an ROI file).  Ellipses and polygons are in pixel
coordinates with the origin at the image's top-left corner: pixel ``(x, y)`` belongs to the
ROI when its centre ``(x + 0.5, y + 0.5)`` lies inside (so a polygon tracing a rectangle's
corners selects exactly that rectangle).  ROIs are saved to and read from an ROI file of our
own (:func:`write_roi_file`, :func:`read_roi_file`; JSON, described there).  For stacks with
leading axes (Z or T), an ROI pools the pixels of all planes.  The target-to-background ratio
(TBR) of ROI ``r`` for probe ``k`` is ``mean_r,k / mean_background,k`` where the background is
the ROI named by ``background`` (default ``"background"``; common practice, no source).  NaN pixels (NaN or saturated
input) are left out and counted.
"""

from __future__ import annotations

import os
import re
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from probeplan.errors import InputError, input_error
from probeplan.io.atomic import write_csv_atomic

__all__ = [
    "Roi",
    "parse_roi",
    "parse_rectangle",
    "read_roi_file",
    "write_roi_file",
    "otsu_roi",
    "ROI_FILE_FORMAT",
    "rois_from_labels",
    "RoiAccumulator",
    "roi_statistics",
    "write_roi_csv",
    "ROI_COLUMNS",
]

ROI_COLUMNS = ("roi", "component", "n_pixels", "n_nan", "mean", "sd", "tbr")

_RECT = re.compile(r"^\s*([^:]+?)\s*:\s*(-?\d+)\s*,\s*(-?\d+)\s*,\s*(-?\d+)\s*,\s*(-?\d+)\s*$")


@dataclass(frozen=True)
class Roi:
    """A named region: a rectangle ``(x0, y0, x1, y1)``, an ellipse ``(cx, cy, rx, ry)``, a polygon
    ``((x, y), ...)`` or a label value of a label image (``labels_file`` when it comes from an ROI file)."""

    name: str
    rect: tuple[int, int, int, int] | None = None
    label: int | None = None
    ellipse: tuple[float, float, float, float] | None = None
    polygon: tuple[tuple[float, float], ...] | None = None
    labels_file: str | None = None
    #: A drawn region's own pixel mask (Y, X), from :func:`probeplan.unmixing.shapes.shapes_to_rois`.
    pixel_mask: np.ndarray | None = field(default=None, compare=False, repr=False)

    def mask_rows(self, r0: int, r1: int, width: int, labels=None) -> np.ndarray:
        """Boolean mask of rows ``r0:r1`` (all ``width`` columns)."""
        if self.pixel_mask is not None:
            return np.asarray(self.pixel_mask[r0:r1, :width], dtype=bool)
        if self.rect is not None:
            x0, y0, x1, y1 = self.rect
            m = np.zeros((r1 - r0, width), bool)
            a, b = max(y0, r0), min(y1, r1)
            if b > a:
                m[a - r0 : b - r0, x0:x1] = True
            return m
        if self.ellipse is not None or self.polygon is not None:
            yy, xx = np.mgrid[r0:r1, 0:width]
            xc, yc = xx + 0.5, yy + 0.5
            if self.ellipse is not None:
                cx, cy, rx, ry = self.ellipse
                return ((xc - cx) / rx) ** 2 + ((yc - cy) / ry) ** 2 <= 1.0
            from matplotlib.path import Path as _Path  # point-in-polygon from a maintained library

            inside = _Path(np.asarray(self.polygon)).contains_points(np.column_stack([xc.ravel(), yc.ravel()]))
            return inside.reshape(xc.shape)
        if labels is None:
            raise input_error(f"ROI {self.name!r}", "is a label ROI but no label image was given",
                              "give the label TIFF with the ROI file")
        return np.asarray(labels)[r0:r1] == self.label

    def mask(self, shape: tuple[int, int], labels=None) -> np.ndarray:
        """Boolean mask of the whole image (Y, X)."""
        return self.mask_rows(0, int(shape[0]), int(shape[1]), labels)


_SHAPED = re.compile(r"^\s*([^:]+?)\s*:\s*(ellipse|polygon)\s*:\s*(.+)$", re.IGNORECASE)


def _shaped(spec: str, shape) -> Roi:
    m = _SHAPED.match(spec)
    name, kind, rest = m.group(1), m.group(2).lower(), m.group(3)
    try:
        values = [float(v) for v in rest.split(",")]
    except ValueError:
        raise input_error("roi", f"{spec!r}: coordinates are not numbers",
                          f"give e.g. 'node:{kind}:" + ("40,30,8,6'" if kind == "ellipse" else "10,10,40,12,25,40'")
                          ) from None
    if not all(np.isfinite(values)):
        raise input_error("roi", f"{spec!r} has a non-finite coordinate", "give finite pixel coordinates")
    if kind == "ellipse":
        if len(values) != 4 or values[2] <= 0 or values[3] <= 0:
            raise input_error("roi", f"{spec!r} is not 'name:ellipse:cx,cy,rx,ry' with radii > 0",
                              "give the centre and the two radii in pixels, e.g. 'node:ellipse:40,30,8,6'")
        roi = Roi(name, ellipse=tuple(values))
    else:
        if len(values) < 6 or len(values) % 2:
            raise input_error("roi", f"{spec!r} is not 'name:polygon:x1,y1,x2,y2,x3,y3,...'",
                              "give at least three x,y vertices in pixels")
        roi = Roi(name, polygon=tuple(zip(values[0::2], values[1::2], strict=True)))
    if shape is not None and not roi.mask(shape).any():
        raise input_error("roi", f"{spec!r} covers no pixel of the image ({shape[1]} x {shape[0]} pixels)",
                          "keep the shape inside the image")
    return roi


def parse_roi(spec: str, *, shape: tuple[int, int] | None = None) -> Roi:
    """Parse a rectangle ``"name:x0,y0,x1,y1"``, ellipse ``"name:ellipse:cx,cy,rx,ry"`` or polygon
    ``"name:polygon:x1,y1,x2,y2,x3,y3,..."``.

    Examples
    --------
    >>> parse_roi("node:ellipse:40,30,8,6").ellipse
    (40.0, 30.0, 8.0, 6.0)
    >>> parse_roi("t:polygon:0,0,4,0,4,2,0,2").mask((3, 5)).sum()
    np.int64(8)
    """
    if _SHAPED.match(spec):
        return _shaped(spec, shape)
    return parse_rectangle(spec, shape=shape)


def parse_rectangle(spec: str, *, shape: tuple[int, int] | None = None) -> Roi:
    """Parse ``"name:x0,y0,x1,y1"``.

    Examples
    --------
    >>> parse_rectangle("tumour:10,20,30,40").rect
    (10, 20, 30, 40)
    """
    m = _RECT.match(spec)
    if not m:
        raise input_error("roi", f"{spec!r} is not 'name:x0,y0,x1,y1'", "give e.g. 'tumour:10,20,60,80'")
    name = m.group(1)
    x0, y0, x1, y1 = (int(g) for g in m.groups()[1:])
    if x0 < 0 or y0 < 0 or x1 <= x0 or y1 <= y0:
        raise input_error("roi", f"{spec!r} is empty or negative", "give 0 <= x0 < x1 and 0 <= y0 < y1")
    if shape is not None and (y1 > shape[0] or x1 > shape[1]):
        raise input_error("roi", f"{spec!r} extends past the image ({shape[1]} x {shape[0]} pixels)",
                          "keep the rectangle inside the image")
    return Roi(name, rect=(x0, y0, x1, y1))


def rois_from_labels(labels: np.ndarray) -> list[Roi]:
    """One ROI per non-zero integer label, named ``label_<n>``."""
    lab = np.asarray(labels)
    if not np.issubdtype(lab.dtype, np.integer):
        raise input_error("label image", f"dtype {lab.dtype} is not integer", "give an integer label image (0 = none)")
    return [Roi(f"label_{int(v)}", label=int(v)) for v in np.unique(lab) if v != 0]


class RoiAccumulator:
    """Accumulate per-ROI, per-component statistics over blocks of rows (Chan et al. pairwise update).

    Parameters
    ----------
    rois : list of Roi
    component_names : sequence of str
    labels : ndarray (Y, X), optional
        The label image, needed by label ROIs.
    """

    def __init__(self, rois: Sequence[Roi], component_names: Sequence[str], labels: np.ndarray | None = None):
        self.rois = list(rois)
        self.names = list(component_names)
        self.labels = None if labels is None else np.asarray(labels)
        K = len(self.names)
        self._n = np.zeros((len(self.rois), K))
        self._mean = np.zeros((len(self.rois), K))
        self._m2 = np.zeros((len(self.rois), K))
        self._nan = np.zeros(len(self.rois), dtype=np.int64)

    def _mask(self, roi: Roi, r0: int, r1: int, width: int) -> np.ndarray:
        return roi.mask_rows(r0, r1, width, self.labels)

    def add(self, abundances: np.ndarray, r0: int) -> None:
        """Add rows ``r0 : r0 + rows`` of abundances shaped (K, ..., rows, X)."""
        a = np.asarray(abundances, dtype=np.float64)
        K = a.shape[0]
        rows, width = a.shape[-2:]
        a = a.reshape(K, -1, rows, width)
        for i, roi in enumerate(self.rois):
            m = self._mask(roi, r0, r0 + rows, width)
            if not m.any():
                continue
            v = a[:, :, m].reshape(K, -1)
            ok = np.isfinite(v).all(axis=0)
            self._nan[i] += int((~ok).sum())
            v = v[:, ok]
            nb = v.shape[1]
            if nb == 0:
                continue
            mb = v.mean(axis=1)
            m2b = ((v - mb[:, None]) ** 2).sum(axis=1)
            na = self._n[i]
            n = na + nb
            delta = mb - self._mean[i]
            self._mean[i] = self._mean[i] + delta * nb / n
            self._m2[i] = self._m2[i] + m2b + delta**2 * na * nb / n
            self._n[i] = n

    def rows(self, background: str | None = "background") -> list[dict]:
        """One row per ROI and component: n_pixels, n_nan, mean, sd (n−1), tbr."""
        names = [r.name for r in self.rois]
        bg = names.index(background) if background in names else None
        out = []
        for i, roi in enumerate(self.rois):
            for k, comp in enumerate(self.names):
                n = self._n[i, k]
                mean = self._mean[i, k] if n else float("nan")
                sd = float(np.sqrt(self._m2[i, k] / (n - 1))) if n > 1 else float("nan")
                tbr = float("nan")
                if bg is not None and self._n[bg, k] and self._mean[bg, k] > 0:
                    tbr = mean / self._mean[bg, k]
                out.append({"roi": roi.name, "component": comp, "n_pixels": int(n), "n_nan": int(self._nan[i]),
                            "mean": float(mean), "sd": sd, "tbr": float(tbr)})
        return out


def roi_statistics(abundances, rois: Sequence[Roi], component_names: Sequence[str], *, labels=None,
                   background: str | None = "background") -> list[dict]:
    """Mean ± SD per ROI and component and the target-to-background ratio.

    Parameters
    ----------
    abundances : ndarray, shape (K, ..., Y, X)
    rois : list of Roi
    component_names : sequence of str
    labels : ndarray (Y, X), optional
    background : str or None
        Name of the background ROI.

    Returns
    -------
    list of dict
        Columns :data:`ROI_COLUMNS`.

    Examples
    --------
    >>> import numpy as np
    >>> a = np.ones((1, 4, 4)); a[0, :2, :2] = 5.0
    >>> rows = roi_statistics(a, [parse_rectangle("t:0,0,2,2"), parse_rectangle("background:2,2,4,4")], ["dotA"])
    >>> rows[0]["mean"], rows[0]["tbr"]
    (5.0, 5.0)
    """
    acc = RoiAccumulator(rois, component_names, labels)
    acc.add(abundances, 0)
    return acc.rows(background)


def write_roi_csv(path: str | os.PathLike, rows: Sequence[dict]):
    """Write ROI statistics rows as CSV (atomic)."""
    return write_csv_atomic(path, rows, ROI_COLUMNS)


#: The ``format`` value of our ROI files.
ROI_FILE_FORMAT = "probeplan-rois"


def _roi_entry(roi: Roi) -> dict:
    if roi.rect is not None:
        x0, y0, x1, y1 = roi.rect
        return {"name": roi.name, "shape": "rectangle", "x0": x0, "y0": y0, "x1": x1, "y1": y1}
    if roi.ellipse is not None:
        cx, cy, rx, ry = roi.ellipse
        return {"name": roi.name, "shape": "ellipse", "cx": cx, "cy": cy, "rx": rx, "ry": ry}
    if roi.polygon is not None:
        return {"name": roi.name, "shape": "polygon", "points": [list(p) for p in roi.polygon]}
    return {"name": roi.name, "shape": "label", "file": roi.labels_file, "label": roi.label}


def write_roi_file(path: str | os.PathLike, rois: Sequence[Roi], *, note: str = "") -> os.PathLike:
    """Write ROIs to our JSON ROI file (atomic), readable by :func:`read_roi_file`.

    Layout::

        {"format": "probeplan-rois", "version": 1, "coordinates": "...", "note": "...",
         "rois": [{"name": "tumour", "shape": "rectangle", "x0": 32, "y0": 37, "x1": 45, "y1": 50},
                  {"name": "node", "shape": "ellipse", "cx": 95, "cy": 38, "rx": 5, "ry": 5},
                  {"name": "muscle", "shape": "polygon", "points": [[70, 83], [88, 83], [79, 100]]},
                  {"name": "liver", "shape": "label", "file": "labels.tif", "label": 3}]}

    Pixel coordinates, origin at the top-left image corner; ``file`` of a label ROI is
    relative to the ROI file's folder.
    """
    from probeplan.io.atomic import write_json_atomic

    return write_json_atomic(path, {
        "format": ROI_FILE_FORMAT, "version": 1,
        "coordinates": "pixels; x column, y row; origin at the top-left image corner; rectangles exclude x1, y1; "
                       "a pixel is inside an ellipse or polygon when its centre (x + 0.5, y + 0.5) is",
        "note": note, "rois": [_roi_entry(r) for r in rois]})


def read_roi_file(path: str | os.PathLike) -> tuple[list[Roi], np.ndarray | None]:
    """Read our JSON ROI file; returns the ROIs and the label image they use (or None).

    Raises
    ------
    InputError
        Not JSON, not an ROI file, an unknown shape, missing or bad coordinates, label ROIs
        naming more than one label image, a label image that cannot be read.
    """
    import json
    from pathlib import Path

    from probeplan.io.text import read_text_input

    path = Path(path)
    where = str(path)
    try:
        data = json.loads(read_text_input(path, what="ROI file"))
    except json.JSONDecodeError as exc:
        raise input_error(where, f"is not JSON ({exc.msg}, line {exc.lineno})", "give an ROI file written by probeplan") from None
    if not isinstance(data, dict) or data.get("format") != ROI_FILE_FORMAT or not isinstance(data.get("rois"), list):
        raise input_error(where, f"is not a {ROI_FILE_FORMAT!r} file with a list 'rois'",
                          "give an ROI file written by probeplan (e.g. DIR/rois.json of a study)")
    rois: list[Roi] = []
    label_files = set()
    for i, e in enumerate(data["rois"]):
        loc = f"{where}: rois[{i}]"
        if not isinstance(e, dict) or not isinstance(e.get("name"), str) or not e["name"]:
            raise input_error(loc, "has no name", "give each ROI a 'name'")
        kind = e.get("shape")
        try:
            if kind == "rectangle":
                spec = f"{e['name']}:{int(e['x0'])},{int(e['y0'])},{int(e['x1'])},{int(e['y1'])}"
                rois.append(parse_rectangle(spec))
            elif kind == "ellipse":
                rois.append(_shaped(f"{e['name']}:ellipse:{e['cx']},{e['cy']},{e['rx']},{e['ry']}", None))
            elif kind == "polygon":
                pts = ",".join(f"{float(x)},{float(y)}" for x, y in e["points"])
                rois.append(_shaped(f"{e['name']}:polygon:{pts}", None))
            elif kind == "label":
                label_files.add(str(e["file"]))
                rois.append(Roi(e["name"], label=int(e["label"]), labels_file=str(e["file"])))
            else:
                raise input_error(loc, f"shape {kind!r} is not known", "use rectangle, ellipse, polygon or label")
        except InputError:
            raise
        except (KeyError, TypeError, ValueError) as exc:
            raise input_error(loc, f"misses or mistypes a coordinate ({exc})", "see the ROI file layout") from None
    labels = None
    if len(label_files) > 1:
        raise input_error(where, f"label ROIs use {len(label_files)} label images", "use one label image per ROI file")
    if label_files:
        import tifffile

        lf = Path(label_files.pop())
        lf = lf if lf.is_absolute() else path.parent / lf
        try:
            labels = tifffile.imread(lf)
        except Exception as exc:  # tifffile raises many kinds on damaged or missing files
            raise input_error(str(lf), f"cannot be read as a label TIFF ({exc})", "give an integer label TIFF") from None
        if labels.ndim != 2 or not np.issubdtype(labels.dtype, np.integer):
            raise input_error(str(lf), f"shape {labels.shape}, dtype {labels.dtype}", "give a 2-D integer label TIFF")
    return rois, labels


def otsu_roi(abundance_map, name: str) -> tuple[Roi, np.ndarray]:
    """An automatic target ROI: the pixels of one component's map above Otsu's threshold.

    Otsu's rule (Otsu 1979, IEEE Trans. Syst. Man Cybern. 9, 62–66, doi:10.1109/TSMC.1979.4310076)
    picks the threshold that maximises the between-class variance of the map's histogram
    (``skimage.filters.threshold_otsu``).  NaN pixels are left out.  Returns the ROI (a label
    ROI with label 1) and its label image (uint8, 1 inside).

    Selecting pixels by their own values biases that ROI's mean upwards (the noise that
    lifted a pixel over the threshold stays in); use it to find the target, and prefer an
    ROI drawn or derived independently (another time point, another component) for numbers.
    """
    from skimage.filters import threshold_otsu

    a = np.asarray(abundance_map, dtype=np.float64)
    ok = np.isfinite(a)
    if ok.sum() < 2 or np.ptp(a[ok]) == 0:
        raise input_error(f"automatic ROI {name!r}", "the component's map is flat or empty",
                          "draw the ROI instead (--roi), or choose a component with signal")
    t = threshold_otsu(a[ok])
    labels = (ok & (a > t)).astype(np.uint8)
    return Roi(name, label=1, labels_file=f"{name}.tif"), labels
