"""Region-of-interest statistics of abundance maps: mean ± SD per probe and target-to-background ratio.

ROIs are rectangles ``"name:x0,y0,x1,y1"`` (pixel indices; ``x0, y0`` included, ``x1, y1``
excluded; x is the column, y the row), ellipses ``"name:ellipse:cx,cy,rx,ry"``, polygons
``"name:polygon:x1,y1,x2,y2,x3,y3[,...]"`` or the non-zero labels of a label image
(``label_<n>``, or a name per label from an ROI file).  Ellipses and polygons are in pixel
coordinates with the origin at the image's top-left corner: pixel ``(x, y)`` belongs to the
ROI when its centre ``(x + 0.5, y + 0.5)`` lies inside or on the edge (so a polygon tracing a
rectangle's corners selects exactly that rectangle); :func:`region_mask` is that one rule.
ROIs are saved to and read from the ROI file (:mod:`probeplan.unmixing.roifile`).  For stacks with
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

from probeplan.errors import input_error
from probeplan.io.atomic import write_csv_atomic

__all__ = [
    "Roi",
    "parse_roi",
    "parse_rectangle",
    "region_mask",
    "otsu_roi",
    "otsu_threshold_by_blocks",
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
        if self.ellipse is not None:
            cx, cy, rx, ry = self.ellipse
            return region_mask("ellipse", (cx - rx, cx + rx), (cy - ry, cy + ry), r0, r1, width)
        if self.polygon is not None:
            xs, ys = zip(*self.polygon, strict=True)
            return region_mask("polygon", xs, ys, r0, r1, width)
        if labels is None:
            raise input_error(f"ROI {self.name!r}", "is a label ROI but no label image was given",
                              "give the label TIFF with the ROI file")
        return np.asarray(labels)[r0:r1] == self.label

    def mask(self, shape: tuple[int, int], labels=None) -> np.ndarray:
        """Boolean mask of the whole image (Y, X)."""
        return self.mask_rows(0, int(shape[0]), int(shape[1]), labels)


def region_mask(shape: str, x, y, r0: int, r1: int, width: int) -> np.ndarray:
    """The one pixel rule for drawn regions: boolean mask of rows ``r0:r1`` (all ``width`` columns).

    Coordinates are pixels with the origin at the top-left corner of the image: pixel
    ``(i, j)`` (column i, row j) covers ``i <= x < i + 1``, ``j <= y < j + 1``, and it belongs
    to the region when its centre ``(i + 0.5, j + 0.5)`` lies inside or on the edge.

    Parameters
    ----------
    shape : {"rectangle", "ellipse", "polygon"}
    x, y : sequence of float
        Two corners of the holding box (rectangle, ellipse: the ellipse inscribed in it) or
        the polygon's vertices (closed automatically).

    Examples
    --------
    >>> region_mask("rectangle", (1, 3), (0, 2), 0, 3, 4).astype(int)
    array([[0, 1, 1, 0],
           [0, 1, 1, 0],
           [0, 0, 0, 0]])
    """
    yy, xx = np.mgrid[r0:r1, 0:width]
    xc, yc = xx + 0.5, yy + 0.5
    x0, x1, y0, y1 = min(x), max(x), min(y), max(y)
    if shape == "rectangle":
        return (xc >= x0) & (xc <= x1) & (yc >= y0) & (yc <= y1)
    if shape == "ellipse":
        cx, cy, rx, ry = (x0 + x1) / 2, (y0 + y1) / 2, (x1 - x0) / 2, (y1 - y0) / 2
        if rx <= 0 or ry <= 0:
            return np.zeros(xc.shape, bool)
        return ((xc - cx) / rx) ** 2 + ((yc - cy) / ry) ** 2 <= 1.0 + 1e-12
    if shape == "polygon":
        return _polygon_mask(np.asarray(x, float), np.asarray(y, float), xc, yc)
    raise input_error("ROI", f"shape {shape!r} is not known", "use rectangle, ellipse or polygon")


def _polygon_mask(vx: np.ndarray, vy: np.ndarray, xc: np.ndarray, yc: np.ndarray, eps: float = 1e-9) -> np.ndarray:
    """Centres inside the polygon (matplotlib's point-in-polygon) or on one of its edges (within ``eps`` pixels).

    matplotlib leaves a point exactly on the edge undefined, so the edges are tested here: the distance
    from each centre to each edge segment (only centres inside the polygon's box are looked at).
    """
    from matplotlib.path import Path as _Path  # point-in-polygon from a maintained library

    out = np.zeros(xc.shape, bool)
    near = (xc >= vx.min() - eps) & (xc <= vx.max() + eps) & (yc >= vy.min() - eps) & (yc <= vy.max() + eps)
    if not near.any():
        return out
    px, py = xc[near].astype(float), yc[near].astype(float)
    inside = _Path(np.column_stack([vx, vy])).contains_points(np.column_stack([px, py]))
    for ax, ay, bx, by in zip(vx, vy, np.roll(vx, -1), np.roll(vy, -1), strict=True):
        dx, dy = bx - ax, by - ay
        length2 = dx * dx + dy * dy
        t = np.clip(((px - ax) * dx + (py - ay) * dy) / length2, 0.0, 1.0) if length2 > 0 else 0.0
        inside |= (px - ax - t * dx) ** 2 + (py - ay - t * dy) ** 2 <= eps * eps
    out[near] = inside
    return out


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
    if shape is not None and not _covers_a_pixel(roi, shape):
        raise input_error("roi", f"{spec!r} covers no pixel of the image ({shape[1]} x {shape[0]} pixels)",
                          "keep the shape inside the image")
    return roi


def _covers_a_pixel(roi: Roi, shape) -> bool:
    """Whether ``roi`` holds a pixel of an image of ``shape`` (Y, X), looked at by blocks of rows.

    By blocks so that checking a shape on a large image costs a block's memory, not the image's
    (the pixel rule builds coordinate grids several times the size of the mask).
    """
    ny, nx = int(shape[0]), int(shape[1])
    step = max(1, (1 << 16) // max(nx, 1))
    return any(roi.mask_rows(r0, min(ny, r0 + step), nx).any() for r0 in range(0, ny, step))


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

    def merge(self, other: RoiAccumulator) -> None:
        """Add the statistics another accumulator gathered over other rows (same ROIs and components)."""
        nb = other._n
        n = self._n + nb
        with np.errstate(invalid="ignore", divide="ignore"):
            delta = other._mean - self._mean
            mean = np.where(n > 0, self._mean + delta * np.divide(nb, n, where=n > 0, out=np.zeros_like(n)), 0.0)
            m2 = self._m2 + other._m2 + np.where(n > 0, delta**2 * self._n * np.divide(nb, n, where=n > 0,
                                                                                       out=np.zeros_like(n)), 0.0)
        self._n, self._mean, self._m2 = n, mean, m2
        self._nan = self._nan + other._nan

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
                   background: str | None = "background"):
    """Mean ± SD per ROI and component and the target-to-background ratio, as a DataFrame.

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
    pandas.DataFrame
        One row per ROI and component, columns :data:`ROI_COLUMNS` (``mean`` and ``sd`` in the
        abundances' unit; ``tbr`` the ROI's mean over the background's, NaN without a background).
        ``.to_dict("records")`` gives the rows as dicts.

    Examples
    --------
    >>> import numpy as np
    >>> a = np.ones((1, 4, 4)); a[0, :2, :2] = 5.0
    >>> table = roi_statistics(a, [parse_rectangle("t:0,0,2,2"), parse_rectangle("background:2,2,4,4")], ["dotA"])
    >>> table.loc[0, "mean"], table.loc[0, "tbr"]
    (np.float64(5.0), np.float64(5.0))
    """
    import pandas as pd

    acc = RoiAccumulator(rois, component_names, labels)
    acc.add(abundances, 0)
    return pd.DataFrame.from_records(acc.rows(background), columns=ROI_COLUMNS)


def write_roi_csv(path: str | os.PathLike, rows: Sequence[dict]):
    """Write ROI statistics rows as CSV (atomic)."""
    return write_csv_atomic(path, rows, ROI_COLUMNS)


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


def otsu_threshold_by_blocks(blocks, value_range: tuple[float, float], nbins: int = 256) -> float:
    """Otsu's threshold of a map given block by block, as :func:`otsu_roi` finds it on the whole map.

    ``blocks`` is an iterable of parts of the map (NaN pixels are left out) and ``value_range``
    the smallest and largest finite value of the whole map.  The histogram is gathered block by
    block (numpy's histogram with that range: each value falls in the bin it falls in on the
    whole map, so the counts are the whole map's) and handed to
    ``skimage.filters.threshold_otsu`` with its bin centres, which then gives the threshold it
    gives for the whole map.  Memory: one block, not the map.
    """
    from skimage.filters import threshold_otsu

    lo, hi = float(value_range[0]), float(value_range[1])
    counts = np.zeros(nbins, np.int64)
    edges = None
    for block in blocks:
        v = np.asarray(block, dtype=np.float64)
        h, edges = np.histogram(v[np.isfinite(v)], bins=nbins, range=(lo, hi))
        counts += h
    if edges is None:
        edges = np.histogram(np.empty(0), bins=nbins, range=(lo, hi))[1]
    return float(threshold_otsu(hist=(counts, (edges[:-1] + edges[1:]) / 2.0)))
