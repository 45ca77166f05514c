"""The ROI file: named regions of interest saved as JSON, written and read here only.

One format for the page (regions drawn on a map, saved and loaded back), ``probeplan unmix
--roi FILE.json``, ``probeplan study --roi FILE.json`` / ``--rois FILE`` and the study's own
``DIR/rois.json``.  An example::

    {"format": "probeplan-rois", "version": 2,
     "coordinates": "pixels; origin at the top-left corner of the image; ...",
     "image_size": [128, 96], "background": "background", "note": "",
     "rois": [
      {"name": "tumour", "shape": "rectangle", "x": [32, 45], "y": [37, 50]},
      {"name": "node", "shape": "ellipse", "x": [90, 100], "y": [33, 43]},
      {"name": "muscle", "shape": "polygon", "x": [70, 88, 79], "y": [83, 83, 100]},
      {"name": "liver", "shape": "label", "file": "labels.tif", "label": 3}
    ]}

Fields
    ``format`` (``"probeplan-rois"``) and ``version`` (2) are required.  ``image_size``
    (width, height in pixels) is optional; when given, the file is refused on an image of
    another size instead of being applied to the wrong pixels.  ``background`` (optional)
    names the region that target-to-background ratios divide by; it must be one of the
    regions.  ``coordinates`` and ``note`` are free text for the reader.
Coordinates
    Pixels of the image, ``x`` along the columns and ``y`` down the rows, origin at the
    top-left corner of the image: pixel ``(i, j)`` covers ``i <= x < i + 1`` and
    ``j <= y < j + 1``.  A pixel belongs to a region when its centre ``(i + 0.5, j + 0.5)``
    lies inside or on the edge (:func:`probeplan.unmixing.roi.region_mask`).
Shapes
    ``rectangle``: ``x`` and ``y`` hold two corners (``x: [32, 45]`` is columns 32 to 44, the
    same pixels as ``--roi tumour:32,37,45,50``); ``ellipse``: the ellipse inside the box of
    those two corners; ``polygon``: three or more vertices, closed automatically;
    ``label``: the pixels equal to ``label`` (a positive integer) in the label TIFF
    ``file`` (relative to the ROI file's folder; one label image per ROI file).

Older files, read unambiguously (each has a key or version the current form has not):
``{"kind": "probeplan ROIs", "version": 1, ...}`` (the page's first form: the same ``x``/``y``
lists with pixel ``(i, j)`` centred on ``(i, j)``; shifted by half a pixel on reading) and
``{"format": "probeplan-rois", "version": 1, ...}`` (the study's first form: ``x0, y0, x1, y1``,
``cx, cy, rx, ry`` or ``points``, already in the current coordinates).  Files are always
written in the current form.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from probeplan.errors import input_error
from probeplan.io.atomic import write_text_atomic
from probeplan.unmixing.roi import Roi
from probeplan.unmixing.shapes import SHAPES, RoiShape, roi_from_shape, shape_from_roi

__all__ = ["ROI_FILE_FORMAT", "ROI_FILE_VERSION", "COORDINATES", "RoiFile", "roi_file_text", "write_roi_file",
           "parse_roi_text", "read_roi_file", "regions_for_image",
           "background_name"]

#: The ``format`` value of an ROI file and its current ``version``.
ROI_FILE_FORMAT = "probeplan-rois"
ROI_FILE_VERSION = 2
#: The coordinate convention, written into every file for its reader.
COORDINATES = ("pixels; x along the columns, y down the rows; origin at the top-left corner of the image, pixel "
               "(i, j) covering i <= x < i+1, j <= y < j+1; a pixel is in a region when its centre (i+0.5, j+0.5) "
               "is inside or on the edge; rectangle and ellipse: two corners of the holding box; polygon: vertices")
_OLD_PAGE_KIND = "probeplan ROIs"
_FIX = "see the ROI file's fields in docs/roi_file.md"


@dataclass
class RoiFile:
    """What an ROI file holds.

    Attributes
    ----------
    regions : list of RoiShape or Roi
        In the file's order: drawn regions as :class:`~probeplan.unmixing.shapes.RoiShape`,
        label regions as :class:`~probeplan.unmixing.roi.Roi` (``label``, ``labels_file``).
    labels : ndarray (Y, X) or None
        The label image of the label regions (read when the file's folder is known).
    background, image_size, note : as in the file (None or "" when absent)
    source : str
        The file's name, for messages.
    """

    regions: list = field(default_factory=list)
    labels: np.ndarray | None = None
    background: str | None = None
    image_size: tuple[int, int] | None = None
    note: str = ""
    source: str = "ROI file"

    @property
    def shapes(self) -> list[RoiShape]:
        """The drawn regions (rectangles, ellipses, polygons)."""
        return [r for r in self.regions if isinstance(r, RoiShape)]

    @property
    def label_regions(self) -> list[Roi]:
        """The label regions."""
        return [r for r in self.regions if isinstance(r, Roi)]

    @property
    def rois(self) -> list[Roi]:
        """Every region as a :class:`~probeplan.unmixing.roi.Roi` for the statistics (drawn ones keep their geometry)."""
        return [roi_from_shape(r) if isinstance(r, RoiShape) else r for r in self.regions]


def _number(v: float) -> float | int:
    """Whole numbers without ".0"; others as Python writes them (the shortest text that reads back exactly)."""
    r = float(v)
    return int(r) if r.is_integer() else r


def _entry(region) -> dict:
    if isinstance(region, Roi):
        if region.label is not None:
            if not region.labels_file:
                raise input_error(f"ROI {region.name!r}", "is a label region without its label image's file",
                                  "save the label image and give its path")
            return {"name": region.name, "shape": "label", "file": str(region.labels_file), "label": int(region.label)}
        region = shape_from_roi(region)
    if not isinstance(region, RoiShape):
        raise TypeError(f"regions: expected RoiShape or Roi, got {type(region).__name__}")
    return {"name": region.name, "shape": region.shape, "x": [_number(v) for v in region.x],
            "y": [_number(v) for v in region.y]}


def roi_file_text(regions: Sequence, *, image_size: tuple[int, int] | None = None, background: str | None = None,
                  note: str = "") -> str:
    """The ROI file's text (JSON, one region per line) for these regions.

    Parameters
    ----------
    regions : sequence of RoiShape or Roi
        Drawn shapes, rectangle/ellipse/polygon ROIs (``--roi`` text forms) or label ROIs
        (with ``labels_file``).
    image_size : (width, height), optional
    background : str, optional
        The background region's name (one of the regions).
    note : str

    Examples
    --------
    >>> text = roi_file_text([RoiShape("t", "ellipse", (2, 8), (2, 6))], background="t")
    >>> print(text.splitlines()[1])
      {"name": "t", "shape": "ellipse", "x": [2, 8], "y": [2, 6]}
    """
    entries = [_entry(r) for r in regions]
    names = [e["name"] for e in entries]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise input_error("regions", f"the name {dup[0]!r} is used twice", "give each region its own name")
    if background is not None and background not in names:
        raise input_error("background", f"{background!r} is not one of the regions {names}",
                          "choose the background among the regions, or give none")
    doc: dict = {"format": ROI_FILE_FORMAT, "version": ROI_FILE_VERSION, "coordinates": COORDINATES}
    if image_size is not None:
        doc["image_size"] = [int(image_size[0]), int(image_size[1])]
    if background is not None:
        doc["background"] = str(background)
    if note:
        doc["note"] = str(note)
    # one region per line: short enough to read and to compare in version control
    head = json.dumps(doc, ensure_ascii=False)[:-1]
    body = ",\n  ".join(json.dumps(e, ensure_ascii=False) for e in entries)
    return f'{head}, "rois": [\n  {body}\n]}}\n' if entries else f'{head}, "rois": []}}\n'


def write_roi_file(path: str | os.PathLike, regions: Sequence, **kwargs) -> Path:
    """Write the ROI file (atomic); keywords as :func:`roi_file_text`."""
    return write_text_atomic(path, roi_file_text(regions, **kwargs))


def _coords(item: dict, key: str, where: str) -> tuple[float, ...]:
    if key not in item:
        raise input_error(f"{where}.{key}", "is missing", f"give {key} as a list of pixel coordinates; {_FIX}")
    v = item[key]
    if not isinstance(v, list) or not all(isinstance(c, (int, float)) and not isinstance(c, bool) for c in v):
        raise input_error(f"{where}.{key}", f"{json.dumps(v)[:40]} is not a list of numbers",
                          f"give {key} as a list of pixel coordinates, e.g. [32, 45]")
    if not all(math.isfinite(c) for c in v):
        raise input_error(f"{where}.{key}", "holds a coordinate that is not finite", "give finite pixel coordinates")
    return tuple(float(c) for c in v)


def _number_field(item: dict, key: str, where: str) -> float:
    v = item.get(key)
    if not isinstance(v, (int, float)) or isinstance(v, bool) or not math.isfinite(v):
        raise input_error(f"{where}.{key}", f"{json.dumps(v)[:40]} is not a finite number", f"give {key} in pixels")
    return float(v)


def _old_study_entry(item: dict, kind: str, where: str) -> tuple[tuple[float, ...], tuple[float, ...]]:
    """x, y lists of the study's first form (x0..y1 / cx..ry / points), same coordinates."""
    if kind == "rectangle":
        x0, y0, x1, y1 = (_number_field(item, k, where) for k in ("x0", "y0", "x1", "y1"))
        return (x0, x1), (y0, y1)
    if kind == "ellipse":
        cx, cy, rx, ry = (_number_field(item, k, where) for k in ("cx", "cy", "rx", "ry"))
        return (cx - rx, cx + rx), (cy - ry, cy + ry)
    pts = item.get("points")
    if not isinstance(pts, list) or not all(isinstance(p, list) and len(p) == 2 for p in pts):
        raise input_error(f"{where}.points", "is not a list of [x, y] pairs", "give the vertices as [[x, y], ...]")
    return (_coords({"x": [p[0] for p in pts]}, "x", where + ".points"),
            _coords({"y": [p[1] for p in pts]}, "y", where + ".points"))


def parse_roi_text(text: str, *, source: str = "ROI file", image_size: tuple[int, int] | None = None,
                   folder: str | os.PathLike | None = None) -> RoiFile:
    """The regions of an ROI file's text.

    Parameters
    ----------
    text : str
    source : str
        The file's name, for messages.
    image_size : (width, height), optional
        The image the regions are for: checked against the file's ``image_size`` and the
        label image.
    folder : path, optional
        The ROI file's folder: label images are read from it (without it label regions are
        listed but their image is not read).

    Raises
    ------
    InputError
        One line naming the file, the field and the fix: not JSON, not an ROI file, an
        unknown version or shape, a missing or non-numeric coordinate, too few points, a
        name used twice or missing, a background that is not a region, another image size,
        an unreadable label image.

    Examples
    --------
    >>> f = parse_roi_text(roi_file_text([RoiShape("t", "ellipse", (2, 8), (2, 6))], background="t"))
    >>> f.shapes[0].shape, f.shapes[0].x, f.background
    ('ellipse', (2.0, 8.0), 't')
    """
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        raise input_error(source, f"is not JSON (line {exc.lineno}: {exc.msg})",
                          "give an ROI file saved by probeplan or written as documented") from None
    if not isinstance(doc, dict):
        raise input_error(source, "is not an ROI file (a JSON object is expected)", _FIX)
    old_page = doc.get("kind") == _OLD_PAGE_KIND
    if not old_page and doc.get("format") != ROI_FILE_FORMAT:
        raise input_error(f"{source}: format", f"is {doc.get('format')!r}, not {ROI_FILE_FORMAT!r}",
                          f'start the file with "format": "{ROI_FILE_FORMAT}", "version": {ROI_FILE_VERSION}; {_FIX}')
    version = doc.get("version")
    known = (1,) if old_page else (1, ROI_FILE_VERSION)
    if version not in known or isinstance(version, bool):
        raise input_error(f"{source}: version", f"{version!r} is not known",
                          f"give \"version\": {ROI_FILE_VERSION} (the current form); {_FIX}")
    old_study = not old_page and version == 1
    shift = 0.5 if old_page else 0.0  # the page's first form centred pixel (i, j) on (i, j)
    size = doc.get("image_size")
    if size is not None:
        if (not isinstance(size, list) or len(size) != 2
                or not all(isinstance(v, int) and not isinstance(v, bool) and v > 0 for v in size)):
            raise input_error(f"{source}: image_size", f"{json.dumps(size)[:40]} is not [width, height]",
                              "give two positive whole numbers of pixels, or leave image_size out")
        size = (int(size[0]), int(size[1]))
        if image_size is not None and tuple(int(v) for v in image_size) != size:
            raise input_error(f"{source}: image_size", f"the regions were drawn on a {size[0]} x {size[1]} image, "
                              f"this one is {int(image_size[0])} x {int(image_size[1])}",
                              "draw the regions on this image")
    items = doc.get("rois")
    if not isinstance(items, list):
        raise input_error(f"{source}: rois", "is missing or not a list", f"give the regions as a list; {_FIX}")
    regions: list = []
    label_files: set[str] = set()
    for i, item in enumerate(items):
        where = f"{source}: rois[{i}]"
        if not isinstance(item, dict):
            raise input_error(where, "is not an object", "give each region as {\"name\": ..., \"shape\": ..., ...}")
        name = item.get("name")
        if not isinstance(name, str) or not name.strip():
            raise input_error(f"{where}.name", "is missing or empty", "give each region a name")
        kind = item.get("shape")
        if kind == "label":
            lab = item.get("label")
            if not isinstance(lab, int) or isinstance(lab, bool) or lab <= 0:
                raise input_error(f"{where}.label", f"{lab!r} is not a positive whole number",
                                  "give the region's value in the label image")
            if not isinstance(item.get("file"), str) or not item["file"].strip():
                raise input_error(f"{where}.file", "is missing", "give the label TIFF's path (relative to this file)")
            label_files.add(item["file"])
            regions.append(Roi(name, label=lab, labels_file=item["file"]))
            continue
        if kind not in SHAPES:
            raise input_error(f"{where}.shape", f"{kind!r} is not known", f"use one of {', '.join(SHAPES)} or label")
        if old_study:
            xs, ys = _old_study_entry(item, kind, where)
        else:
            xs, ys = _coords(item, "x", where), _coords(item, "y", where)
        if len(xs) != len(ys):
            raise input_error(f"{where}.y", f"has {len(ys)} values but x has {len(xs)}", "give one y per x")
        if (kind == "polygon" and len(xs) < 3) or (kind != "polygon" and len(xs) != 2):
            need = "3 or more vertices" if kind == "polygon" else "2 corners"
            raise input_error(f"{where}.x", f"a {kind} needs {need}, got {len(xs)}",
                              f"give {need} in x and in y")
        regions.append(RoiShape(name, kind, tuple(v + shift for v in xs), tuple(v + shift for v in ys)))
    names = [r.name for r in regions]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise input_error(f"{source}: rois", f"the name {dup[0]!r} is used twice", "give each region its own name")
    background = doc.get("background")
    if background is not None and (not isinstance(background, str) or background not in names):
        raise input_error(f"{source}: background", f"{background!r} is not one of the regions {names}",
                          "name one of the regions, or leave background out")
    labels = None
    if len(label_files) > 1:
        raise input_error(f"{source}: rois", f"label regions use {len(label_files)} label images",
                          "use one label image per ROI file")
    if label_files and folder is not None:
        labels = _read_labels(Path(folder), label_files.pop(), source, size or image_size)
    note = doc.get("note")
    return RoiFile(regions, labels, background, size, note if isinstance(note, str) else "", source)


def _read_labels(folder: Path, name: str, source: str, size) -> np.ndarray:
    import tifffile

    lf = Path(name)
    lf = lf if lf.is_absolute() else folder / lf
    try:
        labels = tifffile.imread(lf)
    except Exception as exc:  # tifffile raises many kinds on damaged or missing files
        raise input_error(f"{source}: file {lf}", f"cannot be read as a label TIFF ({exc.__class__.__name__})",
                          "give an integer label TIFF beside the ROI file") from None
    if labels.ndim != 2 or not np.issubdtype(labels.dtype, np.integer):
        raise input_error(f"{source}: file {lf}", f"shape {labels.shape}, dtype {labels.dtype}",
                          "give a 2-D integer label TIFF")
    if size is not None and labels.shape != (int(size[1]), int(size[0])):
        raise input_error(f"{source}: file {lf}", f"is {labels.shape[1]} x {labels.shape[0]} pixels, the image "
                          f"{int(size[0])} x {int(size[1])}", "give the label image made for this image")
    return labels


def read_roi_file(path: str | os.PathLike, *, image_size: tuple[int, int] | None = None) -> RoiFile:
    """Read an ROI file (see :func:`parse_roi_text`); label images are read from its folder."""
    from probeplan.io.text import read_text_input

    p = Path(path)
    return parse_roi_text(read_text_input(p, what="ROI file"), source=str(p), image_size=image_size, folder=p.parent)


def regions_for_image(specs: Sequence, shape_yx: tuple[int, int]) -> tuple[list[Roi], list[RoiShape], np.ndarray | None]:
    """ROIs for one image from what a user gives: text forms, ROI files, drawn shapes or ROI objects.

    Parameters
    ----------
    specs : sequence
        ``"name:x0,y0,x1,y1"``, ``"name:ellipse:cx,cy,rx,ry"``, ``"name:polygon:..."``
        (:func:`probeplan.unmixing.roi.parse_roi`), the path of an ROI file (``.json``),
        :class:`~probeplan.unmixing.shapes.RoiShape` or :class:`~probeplan.unmixing.roi.Roi`.
    shape_yx : (Y, X)
        The image's size: every region must hold a pixel of it; an ROI file drawn on another
        size is refused.

    Returns
    -------
    rois : list of Roi
        For the statistics (drawn ones with their pixel mask).
    drawn : list of RoiShape
        The outlines to draw on maps (label regions have none).
    labels : ndarray (Y, X) or None
        The label image of an ROI file's label regions.
    """
    from probeplan.unmixing.roi import parse_roi
    from probeplan.unmixing.shapes import shapes_to_rois

    ny, nx = int(shape_yx[0]), int(shape_yx[1])
    rois: list[Roi] = []
    drawn: list[RoiShape] = []
    labels = None
    n_files = 0
    for spec in specs or ():
        if isinstance(spec, os.PathLike) or (isinstance(spec, str) and spec.strip().lower().endswith(".json")):
            n_files += 1
            if n_files > 1:
                raise input_error("roi", "two ROI files given", "give one ROI file (it holds every region)")
            rf = read_roi_file(spec, image_size=(nx, ny))
            labels = rf.labels
            for r in rf.regions:
                if isinstance(r, RoiShape):
                    drawn.append(r)
                    rois += shapes_to_rois([r], (ny, nx))
                else:
                    rois.append(r)
            continue
        if isinstance(spec, RoiShape):
            drawn.append(spec)
            rois += shapes_to_rois([spec], (ny, nx))
            continue
        roi = spec if isinstance(spec, Roi) else parse_roi(str(spec), shape=(ny, nx))
        rois.append(roi)
        if roi.rect is not None or roi.ellipse is not None or roi.polygon is not None:
            drawn.append(shape_from_roi(roi))
    return rois, drawn, labels


def background_name(specs: Sequence = (), given: str | None = None) -> str:
    """The background region's name: ``given`` when set, else an ROI file's ``background``, else ``"background"``."""
    if given:
        return str(given)
    for spec in specs or ():
        if isinstance(spec, os.PathLike) or (isinstance(spec, str) and spec.strip().lower().endswith(".json")):
            bg = read_roi_file(spec).background
            if bg:
                return bg
    return "background"
