"""Region-of-interest statistics of abundance maps: mean ± SD per probe and target-to-background ratio.

ROIs are rectangles ``"name:x0,y0,x1,y1"`` (pixel indices; ``x0, y0`` included, ``x1, y1``
excluded; x is the column, y the row) or the non-zero labels of a label image
(``label_<n>``).  For stacks with leading axes (Z or T), an ROI pools the pixels of all
planes.  The target-to-background ratio (TBR) of ROI ``r`` for probe ``k`` is
``mean_r,k / mean_background,k`` where the background is the ROI named by ``background``
(default ``"background"``; common practice, no source).  NaN pixels (NaN or saturated
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
    "parse_rectangle",
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
    """A named region: a rectangle ``(x0, y0, x1, y1)``, a label value of a label image, or a pixel mask (Y, X).

    A mask comes from a drawn shape (:mod:`probeplan.unmixing.shapes`): rectangle, ellipse or polygon.
    """

    name: str
    rect: tuple[int, int, int, int] | None = None
    label: int | None = None
    mask: np.ndarray | None = field(default=None, compare=False, repr=False)


def parse_rectangle(spec: str, *, shape: tuple[int, int] | None = None) -> Roi:
    """Parse ``"name:x0,y0,x1,y1"``.

    Examples
    --------
    >>> parse_rectangle("tumour:10,20,30,40")
    Roi(name='tumour', rect=(10, 20, 30, 40), label=None)
    """
    m = _RECT.match(spec)
    if not m:
        raise input_error("--roi", f"{spec!r} is not 'name:x0,y0,x1,y1'", "give e.g. 'tumour:10,20,60,80'")
    name = m.group(1)
    x0, y0, x1, y1 = (int(g) for g in m.groups()[1:])
    if x0 < 0 or y0 < 0 or x1 <= x0 or y1 <= y0:
        raise input_error("--roi", f"{spec!r} is empty or negative", "give 0 <= x0 < x1 and 0 <= y0 < y1")
    if shape is not None and (y1 > shape[0] or x1 > shape[1]):
        raise input_error("--roi", f"{spec!r} extends past the image ({shape[1]} x {shape[0]} pixels)",
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
        if roi.rect is not None:
            x0, y0, x1, y1 = roi.rect
            m = np.zeros((r1 - r0, width), bool)
            a, b = max(y0, r0), min(y1, r1)
            if b > a:
                m[a - r0 : b - r0, x0:x1] = True
            return m
        if roi.mask is not None:
            return np.asarray(roi.mask[r0:r1, :width], dtype=bool)
        return self.labels[r0:r1] == roi.label

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
