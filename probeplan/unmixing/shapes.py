"""Drawn regions of interest: named rectangles, ellipses and polygons, their pixel masks, and the ROI file.

Coordinates are in pixels of the abundance map: ``x`` is the column, ``y`` the row, and
pixel ``(x, y)`` is the square centred on integer coordinates (it spans ``x ± 0.5``), as
matplotlib and plotly draw an image.  A pixel belongs to a shape when its centre lies
inside (on the edge counts as inside).  A rectangle and an ellipse are given by the box
that holds them (two corners); a polygon (freehand or clicked) by its vertices, closed
automatically.

The ROI file is JSON (an example)::

    {"kind": "probeplan ROIs", "version": 1, "image_size": [128, 96],
     "background": "background",
     "rois": [{"name": "tumour", "shape": "ellipse", "x": [20, 44], "y": [18, 40]},
              {"name": "background", "shape": "rectangle", "x": [100, 127], "y": [0, 15]},
              {"name": "liver", "shape": "polygon", "x": [60, 80, 75], "y": [50, 52, 70]}]}

``image_size`` (width, height in pixels) is optional; when given, a file drawn on another
image size is refused instead of silently applied.  The point-in-polygon test is
matplotlib's :class:`matplotlib.path.Path` (no hand-written geometry).
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from probeplan.errors import InputError, input_error
from probeplan.io.atomic import write_text_atomic
from probeplan.unmixing.roi import Roi

__all__ = ["SHAPES", "RoiShape", "parse_roi_text", "read_roi_file", "roi_file_text", "write_roi_file",
           "shapes_to_rois", "rectangle_from_spec", "rectangle_spec", "shape_from_selection", "suggest_target_roi"]

#: The shapes a region can have.
SHAPES = ("rectangle", "ellipse", "polygon")
_FILE_KIND = "probeplan ROIs"
_VERSION = 1


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
        """Boolean mask (Y, X): pixels whose centre lies inside the region.

        Examples
        --------
        >>> RoiShape("r", "rectangle", (1, 2), (0, 1)).mask((3, 4)).astype(int)
        array([[0, 1, 1, 0],
               [0, 1, 1, 0],
               [0, 0, 0, 0]])
        >>> int(RoiShape("e", "ellipse", (0, 10), (0, 10)).mask((11, 11)).sum())  # a disc of radius 5: 81 centres
        81
        """
        ny, nx = int(shape_yx[0]), int(shape_yx[1])
        yy, xx = np.mgrid[0:ny, 0:nx]
        x0, y0, x1, y1 = self.box
        if self.shape == "rectangle":
            return (xx >= x0) & (xx <= x1) & (yy >= y0) & (yy <= y1)
        if self.shape == "ellipse":
            cx, cy, rx, ry = (x0 + x1) / 2, (y0 + y1) / 2, (x1 - x0) / 2, (y1 - y0) / 2
            if rx <= 0 or ry <= 0:
                return np.zeros((ny, nx), bool)
            return ((xx - cx) / rx) ** 2 + ((yy - cy) / ry) ** 2 <= 1.0 + 1e-12
        from matplotlib.path import Path as MplPath

        path = MplPath(np.column_stack([self.x, self.y]))
        pts = np.column_stack([xx.ravel(), yy.ravel()]).astype(float)
        # a small positive radius counts points on the edge as inside (matplotlib's documented convention)
        return path.contains_points(pts, radius=1e-9).reshape(ny, nx) | path.contains_points(pts, radius=-1e-9).reshape(
            ny, nx)

    def as_dict(self) -> dict:
        """The JSON form of one region."""
        return {"name": self.name, "shape": self.shape, "x": [_short(v) for v in self.x],
                "y": [_short(v) for v in self.y]}


def _short(v: float) -> float | int:
    r = round(float(v), 2)
    return int(r) if r.is_integer() else r


def rectangle_from_spec(roi: Roi) -> RoiShape:
    """The drawn form of a text rectangle ``name:x0,y0,x1,y1`` (x1, y1 excluded): corners at the pixel centres."""
    if roi.rect is None:
        raise input_error(f"ROI {roi.name!r}", "is not a rectangle", "give 'name:x0,y0,x1,y1'")
    x0, y0, x1, y1 = roi.rect
    return RoiShape(roi.name, "rectangle", (x0, x1 - 1), (y0, y1 - 1))


def rectangle_spec(shape: RoiShape) -> str:
    """A drawn rectangle as the text form ``name:x0,y0,x1,y1`` (pixels whose centre is inside; x1, y1 excluded).

    Only rectangles have a text form; other shapes are refused with the fix.

    Examples
    --------
    >>> rectangle_spec(RoiShape("t", "rectangle", (2.4, 9.6), (3, 7)))
    't:3,3,10,8'
    """
    if shape.shape != "rectangle":
        raise input_error(f"ROI {shape.name!r}", f"a {shape.shape} has no 'name:x0,y0,x1,y1' form",
                          "draw it as a rectangle for this use")
    x0, y0, x1, y1 = shape.box
    return f"{shape.name}:{math.ceil(x0)},{math.ceil(y0)},{math.floor(x1) + 1},{math.floor(y1) + 1}"


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
        rois.append(Roi(s.name, pixel_mask=m))
    return rois


def roi_file_text(shapes: Sequence[RoiShape], *, image_size: tuple[int, int] | None = None,
                  background: str | None = None) -> str:
    """The ROI file (JSON) for these regions; ``image_size`` is (width, height) in pixels."""
    doc: dict = {"kind": _FILE_KIND, "version": _VERSION}
    if image_size is not None:
        doc["image_size"] = [int(image_size[0]), int(image_size[1])]
    if background:
        doc["background"] = background
    # one region per line: short enough to read and to compare in version control
    head = json.dumps(doc, ensure_ascii=False)[:-1]
    body = ",\n  ".join(json.dumps(s.as_dict(), ensure_ascii=False) for s in shapes)
    return f'{head}, "rois": [\n  {body}\n]}}\n' if shapes else f'{head}, "rois": []}}\n'


def write_roi_file(path: str | os.PathLike, shapes: Sequence[RoiShape], **kwargs) -> Path:
    """Write the ROI file (atomic); keywords as :func:`roi_file_text`."""
    return write_text_atomic(path, roi_file_text(shapes, **kwargs))


def parse_roi_text(text: str, *, source: str = "ROI file",
                   image_size: tuple[int, int] | None = None) -> tuple[list[RoiShape], str | None]:
    """Regions and the background name from the ROI file's text.

    ``image_size`` (width, height) is checked against the file's, when both are known.

    Examples
    --------
    >>> shapes, bg = parse_roi_text(roi_file_text([RoiShape("t", "ellipse", (2, 8), (2, 6))], background="t"))
    >>> shapes[0].shape, shapes[0].x, bg
    ('ellipse', (2.0, 8.0), 't')
    """
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        raise input_error(source, f"not JSON (line {exc.lineno}: {exc.msg})", "give a probeplan ROI file") from None
    if not isinstance(doc, dict) or doc.get("kind") != _FILE_KIND:
        raise input_error(source, "is not a probeplan ROI file (no \"kind\": \"probeplan ROIs\")",
                          "save the regions from probeplan, or write the file as documented")
    if doc.get("version") != _VERSION:
        raise input_error(source, f"version {doc.get('version')!r} is not known", f"give a version {_VERSION} file")
    size = doc.get("image_size")
    if size is not None and image_size is not None and [int(v) for v in size] != [int(v) for v in image_size]:
        raise input_error(source, f"was drawn on a {size[0]} x {size[1]} image, this one is "
                          f"{image_size[0]} x {image_size[1]}", "draw the regions on this image")
    items = doc.get("rois")
    if not isinstance(items, list):
        raise input_error(source, "has no list \"rois\"", "give the regions as a list")
    shapes = []
    for i, item in enumerate(items):
        where = f"{source}: rois[{i}]"
        if not isinstance(item, dict):
            raise input_error(where, "is not an object", "give name, shape, x and y")
        try:
            xs = tuple(float(v) for v in item["x"])
            ys = tuple(float(v) for v in item["y"])
            shapes.append(RoiShape(str(item["name"]), str(item["shape"]), xs, ys))
        except KeyError as exc:
            raise input_error(where, f"has no {exc.args[0]!r}", "give name, shape, x and y") from None
        except InputError:
            raise
        except (TypeError, ValueError):
            raise input_error(where, "coordinates are not numbers", "give x and y as lists of numbers") from None
    background = doc.get("background")
    return shapes, (str(background) if background is not None else None)


def read_roi_file(path: str | os.PathLike, *, image_size: tuple[int, int] | None = None):
    """Regions and background name from a ROI file (see :func:`parse_roi_text`)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise input_error(str(p), f"cannot be read ({exc.__class__.__name__})", "give a UTF-8 ROI file") from None
    return parse_roi_text(text, source=str(p), image_size=image_size)


def shape_from_selection(selection: dict, name: str, *, shape: str = "rectangle", scale: float = 1.0,
                         image_size: tuple[int, int] | None = None) -> RoiShape:
    """A region from an interactive chart's selection (a box or a lasso), in image pixels.

    ``selection`` holds ``"box"`` and ``"lasso"`` lists whose entries carry ``"x"`` and
    ``"y"`` lists (two box corners, or the lasso's vertices), as Streamlit's plotly chart
    selection gives them; the last drawn entry is used.  A box becomes a rectangle or an
    ellipse (``shape``); a lasso becomes a polygon.  ``scale`` multiplies the chart's
    coordinates (a chart of a downsampled map).  With ``image_size`` (width, height) the
    points are clipped to the image (a drag that runs past its edge stops at the edge).

    Examples
    --------
    >>> shape_from_selection({"box": [{"x": [2.2, 9.8], "y": [7, 3]}], "lasso": []}, "t", shape="ellipse")
    RoiShape(name='t', shape='ellipse', x=(2.2, 9.8), y=(3.0, 7.0))
    """
    def clip(values, n_px):
        vals = [float(v) * scale for v in values]
        if n_px is None:
            return tuple(vals)
        return tuple(min(max(v, -0.5), n_px - 0.5) for v in vals)

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
    pts = np.column_stack([xx, yy]).astype(float)
    try:
        hull = ConvexHull(pts)
    except QhullError:  # the pixels lie on one line
        return RoiShape(name, "rectangle", (float(xx.min()), float(xx.max())), (float(yy.min()), float(yy.max())))
    v = pts[hull.vertices]
    return RoiShape(name, "polygon", tuple(v[:, 0]), tuple(v[:, 1]))
