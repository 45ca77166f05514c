"""Drawn regions of interest: named rectangles, ellipses and polygons and their pixel masks.

Coordinates are in pixels of the abundance map with the origin at the top-left corner of
the image: ``x`` runs along the columns, ``y`` down the rows, and pixel ``(i, j)`` covers
``i <= x < i + 1``, ``j <= y < j + 1`` (its centre is ``(i + 0.5, j + 0.5)``).  A pixel
belongs to a shape when its centre lies inside (on the edge counts as inside):
:func:`probeplan.unmixing.roi.region_mask` is that one rule.  A rectangle and an ellipse are
given by the box that holds them (two corners), so the text rectangle ``name:x0,y0,x1,y1``
is the drawn rectangle with corners ``(x0, y0)`` and ``(x1, y1)``; a polygon (freehand or
clicked) by its vertices, closed automatically.

Charts and matplotlib draw pixel ``(i, j)`` centred on ``(i, j)``: a chart's coordinates are
shifted by half a pixel on the way in (:func:`shape_from_selection`) and on the way out
(:func:`probeplan.unmixing.overlay`).  Regions are saved and read with the ROI file
(:mod:`probeplan.unmixing.roifile`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from probeplan.errors import input_error
from probeplan.unmixing.roi import Roi, region_mask

__all__ = ["SHAPES", "RoiShape", "roi_from_shape", "shape_from_roi", "shapes_to_rois", "rectangle_from_spec",
           "rectangle_spec", "shape_from_selection", "suggest_target_roi"]

#: The shapes a region can have.
SHAPES = ("rectangle", "ellipse", "polygon")


@dataclass(frozen=True)
class RoiShape:
    """A named, drawn region.

    Parameters
    ----------
    name : str
    shape : {"rectangle", "ellipse", "polygon"}
    x, y : tuple of float
        Pixel coordinates: the two corners of the holding box (rectangle, ellipse) or the
        vertices (polygon, at least three).
    """

    name: str
    shape: str
    x: tuple[float, ...]
    y: tuple[float, ...]

    def __post_init__(self) -> None:
        where = f"ROI {self.name!r}"
        if not str(self.name).strip():
            raise input_error("ROI", "a region has no name", "give every region a name")
        if self.shape not in SHAPES:
            raise input_error(where, f"shape {self.shape!r} is not known", f"use one of {', '.join(SHAPES)}")
        if len(self.x) != len(self.y):
            raise input_error(where, f"{len(self.x)} x but {len(self.y)} y coordinates", "give one x per y")
        if not all(math.isfinite(v) for v in (*self.x, *self.y)):
            raise input_error(where, "a coordinate is not a finite number", "give pixel coordinates as numbers")
        need = 3 if self.shape == "polygon" else 2
        if len(self.x) < need or (self.shape != "polygon" and len(self.x) != 2):
            raise input_error(where, f"a {self.shape} needs {'at least 3 vertices' if need == 3 else '2 corners'}, "
                              f"got {len(self.x)} points", "draw the region again")

    @property
    def box(self) -> tuple[float, float, float, float]:
        """``(x_min, y_min, x_max, y_max)`` of the shape."""
        return min(self.x), min(self.y), max(self.x), max(self.y)

    def mask(self, shape_yx: tuple[int, int]) -> np.ndarray:
        """Boolean mask (Y, X): pixels whose centre lies inside the region (edge included).

        Examples
        --------
        >>> RoiShape("r", "rectangle", (1, 3), (0, 2)).mask((3, 4)).astype(int)
        array([[0, 1, 1, 0],
               [0, 1, 1, 0],
               [0, 0, 0, 0]])
        >>> int(RoiShape("e", "ellipse", (0.5, 10.5), (0.5, 10.5)).mask((11, 11)).sum())  # radius 5 round a centre
        81
        """
        ny, nx = int(shape_yx[0]), int(shape_yx[1])
        return region_mask(self.shape, self.x, self.y, 0, ny, nx)

    def as_dict(self) -> dict:
        """The JSON form of one region."""
        return {"name": self.name, "shape": self.shape, "x": [_short(v) for v in self.x],
                "y": [_short(v) for v in self.y]}


def _short(v: float) -> float | int:
    r = round(float(v), 2)
    return int(r) if r.is_integer() else r


def rectangle_from_spec(roi: Roi) -> RoiShape:
    """The drawn form of a text rectangle ``name:x0,y0,x1,y1``: the same corners, the same pixels."""
    if roi.rect is None:
        raise input_error(f"ROI {roi.name!r}", "is not a rectangle", "give 'name:x0,y0,x1,y1'")
    x0, y0, x1, y1 = roi.rect
    return RoiShape(roi.name, "rectangle", (x0, x1), (y0, y1))


def rectangle_spec(shape: RoiShape) -> str:
    """A drawn rectangle as the text form ``name:x0,y0,x1,y1`` (the pixels whose centre is inside).

    Only rectangles have a text form; other shapes are refused with the fix.

    Examples
    --------
    >>> rectangle_spec(RoiShape("t", "rectangle", (2.4, 9.6), (3, 7)))
    't:2,3,10,7'
    """
    if shape.shape != "rectangle":
        raise input_error(f"ROI {shape.name!r}", f"a {shape.shape} has no 'name:x0,y0,x1,y1' form",
                          "draw it as a rectangle for this use")
    x0, y0, x1, y1 = shape.box
    # first and last pixel whose centre (i + 0.5) lies in [x0, x1]
    return (f"{shape.name}:{math.ceil(x0 - 0.5)},{math.ceil(y0 - 0.5)},"
            f"{math.floor(x1 - 0.5) + 1},{math.floor(y1 - 0.5) + 1}")


def roi_from_shape(shape: RoiShape) -> Roi:
    """The :class:`~probeplan.unmixing.roi.Roi` (geometry kept) of a drawn shape: the same pixels.

    A rectangle with whole-pixel corners becomes a text rectangle, one with other corners a
    four-vertex polygon; an ellipse keeps its centre and radii.

    Examples
    --------
    >>> roi_from_shape(RoiShape("t", "rectangle", (2, 9), (3, 7))).rect
    (2, 3, 9, 7)
    >>> roi_from_shape(RoiShape("e", "ellipse", (2, 8), (4, 6))).ellipse
    (5.0, 5.0, 3.0, 1.0)
    """
    x0, y0, x1, y1 = (float(v) for v in shape.box)
    if shape.shape == "rectangle":
        if all(v.is_integer() for v in (x0, y0, x1, y1)) and x1 > x0 and y1 > y0:
            return Roi(shape.name, rect=(int(x0), int(y0), int(x1), int(y1)))
        return Roi(shape.name, polygon=((x0, y0), (x1, y0), (x1, y1), (x0, y1)))
    if shape.shape == "ellipse":
        return Roi(shape.name, ellipse=((x0 + x1) / 2, (y0 + y1) / 2, (x1 - x0) / 2, (y1 - y0) / 2))
    return Roi(shape.name, polygon=tuple(zip((float(v) for v in shape.x), (float(v) for v in shape.y), strict=True)))


def shape_from_roi(roi: Roi) -> RoiShape:
    """The drawn shape of a rectangle, ellipse or polygon :class:`~probeplan.unmixing.roi.Roi`.

    Label ROIs (and masks without geometry) have no shape and are refused with the fix.

    Examples
    --------
    >>> from probeplan.unmixing.roi import parse_roi
    >>> shape_from_roi(parse_roi("node:ellipse:40,30,8,6"))
    RoiShape(name='node', shape='ellipse', x=(32.0, 48.0), y=(24.0, 36.0))
    """
    if roi.rect is not None:
        return rectangle_from_spec(roi)
    if roi.ellipse is not None:
        cx, cy, rx, ry = (float(v) for v in roi.ellipse)
        return RoiShape(roi.name, "ellipse", (cx - rx, cx + rx), (cy - ry, cy + ry))
    if roi.polygon is not None:
        return RoiShape(roi.name, "polygon", tuple(float(p[0]) for p in roi.polygon),
                        tuple(float(p[1]) for p in roi.polygon))
    raise input_error(f"ROI {roi.name!r}", "is a label or a mask, not a drawn shape",
                      "give it as a rectangle, ellipse or polygon")


def shapes_to_rois(shapes: Sequence[RoiShape], shape_yx: tuple[int, int]) -> list[Roi]:
    """:class:`~probeplan.unmixing.roi.Roi` objects (with masks) for the statistics; empty regions are refused."""
    names = [s.name for s in shapes]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise input_error("ROIs", f"the name {dup[0]!r} is used twice", "give each region its own name")
    rois = []
    for s in shapes:
        m = s.mask(shape_yx)
        if not m.any():
            raise input_error(f"ROI {s.name!r}", f"holds no pixel of the {shape_yx[1]} x {shape_yx[0]} image",
                              "draw it over the image")
        rois.append(replace(roi_from_shape(s), pixel_mask=m))
    return rois


def shape_from_selection(selection: dict, name: str, *, shape: str = "rectangle", scale: float = 1.0,
                         image_size: tuple[int, int] | None = None, offset: float = 0.5) -> RoiShape:
    """A region from an interactive chart's selection (a box or a lasso), in image pixels.

    ``selection`` holds ``"box"`` and ``"lasso"`` lists whose entries carry ``"x"`` and
    ``"y"`` lists (two box corners, or the lasso's vertices), as Streamlit's plotly chart
    selection gives them; the last drawn entry is used.  A box becomes a rectangle or an
    ellipse (``shape``); a lasso becomes a polygon.  ``offset`` is added to the chart's
    coordinates to reach ours, whose origin is the image's top-left corner: 0.5 (the
    default) for a chart that centres pixel ``(i, j)`` on ``(i, j)`` (plotly's and
    matplotlib's default for images), 0 for a chart drawn with the corner origin.
    ``scale`` is the number of image pixels per chart pixel (a chart of a downsampled map).
    With ``image_size`` (width, height) the points are clipped to the image (a drag that
    runs past its edge stops at the edge).

    Examples
    --------
    >>> shape_from_selection({"box": [{"x": [2.2, 9.8], "y": [7, 3]}], "lasso": []}, "t", shape="ellipse")
    RoiShape(name='t', shape='ellipse', x=(2.7, 10.3), y=(3.5, 7.5))
    """
    def clip(values, n_px):
        # to 1/100 pixel: finer than any hand can draw, and short in the ROI file
        vals = [round((float(v) + offset) * scale, 2) for v in values]
        if n_px is None:
            return tuple(vals)
        return tuple(min(max(v, 0.0), float(n_px)) for v in vals)

    nx, ny = image_size if image_size is not None else (None, None)
    lasso = [s for s in (selection or {}).get("lasso") or [] if s.get("x")]
    box = [s for s in (selection or {}).get("box") or [] if s.get("x")]
    if lasso:
        last = lasso[-1]
        return RoiShape(name, "polygon", clip(last["x"], nx), clip(last["y"], ny))
    if box:
        last = box[-1]
        xs = sorted(clip(last["x"], nx))
        ys = sorted(clip(last["y"], ny))
        if shape not in ("rectangle", "ellipse"):
            raise input_error("selection", f"a box cannot make a {shape}", "draw a polygon with the lasso")
        return RoiShape(name, shape, (xs[0], xs[-1]), (ys[0], ys[-1]))
    raise input_error("selection", "nothing is selected on the map", "drag a box or a lasso over the map first")


def suggest_target_roi(abundance_map, *, name: str = "target", level: float = 0.5,
                       smooth_px: float = 1.0) -> RoiShape | None:
    """The automatic target region, to be confirmed by the user: the bright spot at ``level`` of its peak.

    The map is smoothed (Gaussian, ``smooth_px`` pixels; scipy.ndimage), thresholded at
    ``level`` × its maximum above the median (half maximum by default, the common
    full-width-at-half-maximum convention), the connected region holding the maximum is
    kept (scipy.ndimage.label) and its convex hull (scipy.spatial.ConvexHull) becomes
    a polygon.  None when the map has no spot (flat, empty or non-finite).

    Examples
    --------
    >>> import numpy as np
    >>> yy, xx = np.mgrid[0:40, 0:40]
    >>> roi = suggest_target_roi(np.exp(-((xx - 12) ** 2 + (yy - 20) ** 2) / 18.0))
    >>> x0, y0, x1, y1 = roi.box; bool(8 <= x0 < 12 < x1 <= 16 and 16 <= y0 < 20 < y1 <= 24)
    True
    """
    from scipy import ndimage
    from scipy.spatial import ConvexHull, QhullError

    a = np.asarray(abundance_map, dtype=np.float64)
    while a.ndim > 2:
        a = a[0]
    finite = np.isfinite(a)
    if not finite.any():
        return None
    a = np.where(finite, a, np.nanmedian(a[finite]))
    sm = ndimage.gaussian_filter(a, smooth_px) if smooth_px > 0 else a
    base, top = float(np.median(sm)), float(sm.max())
    if not top > base:
        return None
    mask = sm >= base + level * (top - base)
    labels, _ = ndimage.label(mask)
    peak = np.unravel_index(int(np.argmax(sm)), sm.shape)
    region = labels == labels[peak]
    yy, xx = np.nonzero(region)
    if yy.size < 3:
        return None
    pts = np.column_stack([xx, yy]).astype(float) + 0.5  # the pixels' centres
    try:
        hull = ConvexHull(pts)
    except QhullError:  # the pixels lie on one line
        return RoiShape(name, "rectangle", (float(xx.min()), float(xx.max()) + 1), (float(yy.min()), float(yy.max()) + 1))
    v = pts[hull.vertices]
    return RoiShape(name, "polygon", tuple(float(c) for c in v[:, 0]), tuple(float(c) for c in v[:, 1]))
