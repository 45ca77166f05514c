"""Figures of abundance maps (matplotlib, Agg backend): small multiples and a colour-blind-safe composite.

* :func:`maps_figure`: one panel per component, each with its own colour bar in its
  unit (µM when calibrated, counts otherwise), a scale bar when the pixel size is known,
  and the regions of interest outlined and named.
* :func:`composite_rgb` / :func:`composite_figure`: every component in its own colour
  on black.  The colours are the Okabe–Ito set (Okabe & Ito, *Color Universal Design*,
  2008; the same set in Wong, Nat. Methods 8, 441, 2011), chosen to stay distinct for
  readers with the common colour-vision deficiencies.  Colours combine by their
  per-channel maximum ("lighten"), not by addition, so overlapping components keep a
  hue instead of washing out to white; each component's brightness is its abundance
  over its own upper limit (the contrast control: by default the 99.5th percentile).

The command line's ``<stem>_overlay.png``, the report and the page all draw with
these functions.
"""

from __future__ import annotations

import io
import math
import os
from collections.abc import Sequence

import numpy as np

from probeplan.errors import input_error
from probeplan.io.atomic import write_bytes_atomic

__all__ = ["OKABE_ITO", "PALETTE", "overlay_rgb", "composite_rgb", "downsample_mean", "write_overlay_png",
           "overlay_factor", "maps_figure", "composite_figure", "scale_bar_length_um", "upper_limits"]

#: The Okabe–Ito colours as published (8-bit RGB; Okabe & Ito 2008; Wong 2011, Fig. 2).
OKABE_ITO = {
    "black": (0, 0, 0),
    "orange": (230, 159, 0),
    "sky blue": (86, 180, 233),
    "bluish green": (0, 158, 115),
    "yellow": (240, 228, 66),
    "blue": (0, 114, 178),
    "vermilion": (213, 94, 0),
    "reddish purple": (204, 121, 167),
}
#: Composite colours on black, in the order components take them (the light Okabe–Ito colours first;
#: blue last, being dark on black).  RGB 0–1.  Beyond seven components colours repeat.
PALETTE = tuple(tuple(c / 255 for c in OKABE_ITO[n]) for n in (
    "orange", "sky blue", "bluish green", "reddish purple", "yellow", "vermilion", "blue"))
#: Upper limit of each component's brightness by default (percentile of its finite values).
DEFAULT_PERCENTILE = 99.5


def overlay_factor(shape_yx: tuple[int, int], max_side: int = 1024) -> int:
    """Integer downsampling factor so that the overlay is at most ``max_side`` pixels a side."""
    return max(1, math.ceil(max(shape_yx) / max_side))


def downsample_mean(a: np.ndarray, factor: int) -> np.ndarray:
    """Block mean over ``factor × factor`` pixels of the last two axes, NaN ignored (edges padded)."""
    a = np.asarray(a, dtype=np.float64)
    if factor == 1:
        return a
    *lead, ny, nx = a.shape
    py, px = (-ny) % factor, (-nx) % factor
    pad = [(0, 0)] * len(lead) + [(0, py), (0, px)]
    a = np.pad(a, pad, constant_values=np.nan)
    a = a.reshape(*lead, (ny + py) // factor, factor, (nx + px) // factor, factor)
    with np.errstate(invalid="ignore"):
        s = np.nansum(a, axis=(-3, -1))
        n = np.isfinite(a).sum(axis=(-3, -1))
        return np.where(n > 0, s / np.maximum(n, 1), np.nan)


def _planes(abundances) -> np.ndarray:
    """(K, Y, X) float64: the first plane of Z/T stacks."""
    a = np.asarray(abundances, dtype=np.float64)
    while a.ndim > 3:
        a = a[:, 0]
    if a.ndim != 3:
        raise input_error("abundances", f"shape {a.shape}, expected (K, Y, X)", "give one 2-D map per component")
    return a


def upper_limits(abundances, percentile: float = DEFAULT_PERCENTILE) -> list[float]:
    """Each component's default upper display limit: the ``percentile`` of its finite values (0 if none)."""
    out = []
    for m in _planes(abundances):
        finite = m[np.isfinite(m)]
        out.append(float(np.percentile(finite, percentile)) if finite.size else 0.0)
    return out


def composite_rgb(abundances, *, limits: Sequence[float | None] | None = None,
                  colours: Sequence[Sequence[float]] | None = None,
                  percentile: float = DEFAULT_PERCENTILE) -> np.ndarray:
    """RGB image (Y, X, 3) in [0, 1]: each component in its colour, combined by per-channel maximum.

    Parameters
    ----------
    abundances : ndarray (K, Y, X)
    limits : sequence of float or None, optional
        Each component's upper limit (full brightness); None or a missing entry takes
        its ``percentile``.  A limit ≤ 0 hides the component.
    colours : sequence of RGB, optional
        Default :data:`PALETTE`.

    Examples
    --------
    >>> import numpy as np
    >>> a = np.zeros((2, 1, 2)); a[0, 0, 0] = a[1, 0, 0] = a[1, 0, 1] = 1.0
    >>> rgb = composite_rgb(a, limits=[1.0, 1.0])
    >>> bool(np.allclose(rgb[0, 1], PALETTE[1])), bool(np.allclose(rgb[0, 0], np.maximum(PALETTE[0], PALETTE[1])))
    (True, True)
    """
    a = _planes(abundances)
    K = a.shape[0]
    cols = np.asarray(colours if colours is not None else [PALETTE[k % len(PALETTE)] for k in range(K)], float)
    auto = upper_limits(a, percentile)
    rgb = np.zeros((*a.shape[1:], 3))
    for k in range(K):
        top = auto[k] if limits is None or k >= len(limits) or limits[k] is None else float(limits[k])
        if not top > 0:
            continue
        w = np.clip(np.nan_to_num(a[k] / top, nan=0.0), 0.0, 1.0)
        np.maximum(rgb, w[..., None] * cols[k], out=rgb)
    return rgb


def overlay_rgb(abundances, *, colours: Sequence[Sequence[float]] | None = None,
                percentile: float = DEFAULT_PERCENTILE) -> np.ndarray:
    """:func:`composite_rgb` with every component at its default limit (kept for callers of the first version)."""
    return composite_rgb(abundances, colours=colours, percentile=percentile)


def scale_bar_length_um(width_um: float) -> float:
    """A round scale-bar length (1, 2 or 5 × 10ⁿ µm) near a fifth of the image width.

    Examples
    --------
    >>> scale_bar_length_um(12_800.0), scale_bar_length_um(640.0), scale_bar_length_um(3.3)
    (2000.0, 100.0, 0.5)
    """
    target = width_um / 5.0
    if not target > 0 or not math.isfinite(target):
        raise input_error("scale bar", f"image width {width_um!r} µm", "give a positive pixel size")
    exp = math.floor(math.log10(target))
    best = 1.0
    for m in (1.0, 2.0, 5.0):
        if m * 10**exp <= target:
            best = m
    return best * 10**exp


def _length_text(um: float) -> str:
    return f"{um / 1000:g} mm" if um >= 1000 else f"{um:g} µm"


def _add_scale_bar(ax, nx: int, pixel_size_um: float, *, colour: str) -> None:
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

    length_um = scale_bar_length_um(nx * pixel_size_um)
    bar = AnchoredSizeBar(ax.transData, length_um / pixel_size_um, _length_text(length_um), "lower right",
                          pad=0.3, color=colour, frameon=True, size_vertical=max(nx / 150, 0.5),
                          fontproperties={"size": 8})
    bar.patch.set(facecolor="black", edgecolor="none", alpha=0.45)  # readable on bright and dark maps
    ax.add_artist(bar)


def _draw_rois(ax, shapes, *, colour: str, scale: float = 1.0) -> None:
    """Outline drawn regions (:class:`probeplan.unmixing.shapes.RoiShape`) and write their names."""
    from matplotlib import patheffects
    from matplotlib.patches import Ellipse, Polygon, Rectangle

    halo = [patheffects.withStroke(linewidth=2.6, foreground="black")]  # an outline seen on bright and dark maps
    # shapes are in pixels from the image's top-left corner; imshow centres pixel i on i: move by half a pixel
    for s in shapes or ():
        x0, y0, x1, y1 = (v / scale - 0.5 for v in s.box)
        if s.shape == "rectangle":
            patch = Rectangle((x0, y0), x1 - x0, y1 - y0)
        elif s.shape == "ellipse":
            patch = Ellipse(((x0 + x1) / 2, (y0 + y1) / 2), x1 - x0, y1 - y0)
        else:
            patch = Polygon(np.column_stack([s.x, s.y]) / scale - 0.5, closed=True)
        patch.set(fill=False, edgecolor=colour, linewidth=1.2, linestyle="--", path_effects=halo)
        ax.add_patch(patch)
        ax.text(x0, y0 - 1.0, s.name, color=colour, fontsize=7, va="bottom", ha="left",
                bbox={"boxstyle": "round,pad=0.1", "fc": "black", "ec": "none", "alpha": 0.45})


def maps_figure(maps, titles: Sequence[str], unit: str | Sequence[str], *, cmap: str = "magma",
                pixel_size_um: float | Sequence[float] | None = None, rois=None,
                limits: Sequence[float | None] | None = None, scale: float = 1.0, columns: int = 4, fig=None):
    """Small multiples: one panel per map with its own colour bar in ``unit``.

    Parameters
    ----------
    maps : ndarray (K, Y, X) (first plane of Z/T stacks)
    titles : sequence of str
    unit : str or sequence of str
        Colour-bar label(s), e.g. ``"µM"`` or ``"counts"``.
    pixel_size_um : float or (y, x), optional
        Adds a scale bar (the x size is used); without it the axes are in pixels.
    rois : sequence of RoiShape, optional
        Outlined and named on every panel.
    limits : sequence of float or None, optional
        Upper colour limit per map; default its 99.5th percentile.  The lower limit is
        min(0, minimum), so a few bright pixels do not wash out the rest.
    scale : float
        Pixels of the original image per pixel of ``maps`` (for downsampled maps).
    fig : Figure or SubFigure, optional
        Draw into it instead of a new figure.
    """
    from matplotlib.figure import Figure

    a = _planes(maps)
    n = len(titles)
    if a.shape[0] != n:
        raise input_error("maps", f"{a.shape[0]} maps but {n} titles", "give one title per map")
    units = [unit] * n if isinstance(unit, str) else list(unit)
    cols = max(1, min(n, columns))
    rows = (n + cols - 1) // cols
    ny, nx = a.shape[1:]
    panel_h = 3.0 * min(1.6, max(0.5, ny / nx))
    if fig is None:
        fig = Figure(figsize=(3.5 * cols, panel_h * rows + 0.3), layout="constrained")
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False)).ravel()
    auto = upper_limits(a)
    px = None
    if pixel_size_um is not None:
        px = float(pixel_size_um[-1] if isinstance(pixel_size_um, (tuple, list, np.ndarray)) else pixel_size_um)
        px = px * scale if px > 0 and math.isfinite(px) else None
    for i, ax in enumerate(axes):
        if i >= n:
            ax.set_axis_off()
            continue
        m = a[i]
        finite = m[np.isfinite(m)]
        top = auto[i] if limits is None or i >= len(limits) or limits[i] is None else float(limits[i])
        low = min(0.0, float(finite.min())) if finite.size else 0.0
        im = ax.imshow(m, cmap=cmap, vmin=low, vmax=top if top > low else None, interpolation="nearest")
        ax.set_title(titles[i], fontsize=9)
        if px is None:
            ax.set_xlabel("x (pixel)", fontsize=8)
            ax.set_ylabel("y (pixel)", fontsize=8)
            ax.tick_params(labelsize=7)
        else:
            ax.set_xticks([])
            ax.set_yticks([])
            _add_scale_bar(ax, nx, px, colour="white")
        _draw_rois(ax, rois, colour="#56B4E9" if cmap != "magma" else "white", scale=scale)
        cb = fig.colorbar(im, ax=ax, shrink=0.85)
        cb.set_label(units[i], fontsize=8)
        cb.ax.tick_params(labelsize=7)
    return fig


def composite_figure(abundances, names: Sequence[str], *, limits: Sequence[float | None] | None = None,
                     pixel_size_um: float | Sequence[float] | None = None, rois=None, title: str | None = None,
                     scale: float = 1.0, fig=None):
    """The composite (:func:`composite_rgb`) with a legend of colours under it, a scale bar and the ROIs."""
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch

    a = _planes(abundances)
    rgb = composite_rgb(a, limits=limits)
    ny, nx = rgb.shape[:2]
    if fig is None:
        fig = Figure(figsize=(6.0, 6.0 * min(1.4, max(0.5, ny / nx)) + 0.9), layout="constrained")
    ax = fig.add_subplot()
    ax.imshow(rgb, interpolation="nearest")
    ax.set_xticks([])
    ax.set_yticks([])
    px = None
    if pixel_size_um is not None:
        px = float(pixel_size_um[-1] if isinstance(pixel_size_um, (tuple, list, np.ndarray)) else pixel_size_um)
        px = px * scale if px > 0 and math.isfinite(px) else None
    if px is not None:
        _add_scale_bar(ax, nx, px, colour="white")
    _draw_rois(ax, rois, colour="white", scale=scale)
    handles = [Patch(color=PALETTE[k % len(PALETTE)], label=n) for k, n in enumerate(names)]
    ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.01), ncol=min(len(handles), 4),
              frameon=False, fontsize=8)
    if title:
        ax.set_title(title, fontsize=9)
    return fig


def write_overlay_png(path: str | os.PathLike, abundances, component_names: Sequence[str], *,
                      title: str | None = None, pixel_size_um: tuple[float, float] | None = None,
                      percentile: float = DEFAULT_PERCENTILE, unit: str | Sequence[str] = "counts", rois=None,
                      scale: float = 1.0):
    """Write the composite beside the small multiples as one PNG (atomic); returns the path.

    ``scale`` is the downsampling factor of ``abundances`` relative to the image (for the
    scale bar and the ROI outlines).
    """
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    a = _planes(abundances)
    limits = upper_limits(a, percentile)
    names = list(component_names)
    ny, nx = a.shape[1:]
    rows = (len(names) + 1) // 2
    height = max(5.5, 3.0 * min(1.6, max(0.5, ny / nx)) * rows + 0.6)
    fig = Figure(figsize=(14.0, height), layout="constrained")
    left, right = fig.subfigures(1, 2, width_ratios=[1.0, 1.25])
    composite_figure(a, names, limits=limits, pixel_size_um=pixel_size_um, rois=rois, title=title, scale=scale,
                     fig=left)
    maps_figure(a, names, unit, pixel_size_um=pixel_size_um, rois=rois, limits=limits, scale=scale, columns=2,
                fig=right)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, facecolor="white")
    return write_bytes_atomic(path, buf.getvalue())
