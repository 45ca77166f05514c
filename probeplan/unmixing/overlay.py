"""False-colour overlay of abundance maps as a PNG with a legend (matplotlib, Agg backend).

Each component gets one colour; its abundance, scaled to its own ``percentile`` (default
99.5 %) and clipped to [0, 1], weights that colour, and the weighted colours add (then
clip).  The palette is our own choice of hues spread around the colour circle with
different lightness, so that neighbours differ in both hue and lightness (readable by
most colour-vision deficiencies and in greyscale); beyond its length colours repeat.
"""

from __future__ import annotations

import io
import math
import os
from collections.abc import Sequence

import numpy as np

from probeplan.errors import input_error
from probeplan.io.atomic import write_bytes_atomic

__all__ = ["PALETTE", "overlay_rgb", "downsample_mean", "write_overlay_png", "overlay_factor"]

#: Component colours (RGB 0–1): amber, azure, rose, teal, pale yellow, indigo, grey, white.
PALETTE = (
    (0.93, 0.60, 0.05),
    (0.20, 0.62, 0.95),
    (0.85, 0.30, 0.55),
    (0.10, 0.70, 0.55),
    (0.95, 0.90, 0.45),
    (0.40, 0.30, 0.80),
    (0.60, 0.60, 0.60),
    (1.00, 1.00, 1.00),
)


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


def overlay_rgb(abundances, *, colours: Sequence[Sequence[float]] | None = None,
                percentile: float = 99.5) -> np.ndarray:
    """An RGB image (Y, X, 3), values in [0, 1], from abundances (K, Y, X).

    Examples
    --------
    >>> import numpy as np
    >>> rgb = overlay_rgb(np.stack([np.eye(3), np.zeros((3, 3))]))
    >>> rgb.shape, bool(np.allclose(rgb[0, 0], PALETTE[0]))
    ((3, 3, 3), True)
    """
    a = np.asarray(abundances, dtype=np.float64)
    if a.ndim != 3:
        raise input_error("abundances", f"shape {a.shape}, expected (K, Y, X)", "give one 2-D map per component")
    colours = np.asarray(colours if colours is not None else [PALETTE[k % len(PALETTE)] for k in range(a.shape[0])])
    rgb = np.zeros((*a.shape[1:], 3))
    for k in range(a.shape[0]):
        finite = a[k][np.isfinite(a[k])]
        top = np.percentile(finite, percentile) if finite.size else 0.0
        if top <= 0:
            continue
        w = np.clip(np.nan_to_num(a[k] / top, nan=0.0), 0.0, 1.0)
        rgb += w[..., None] * colours[k]
    return np.clip(rgb, 0.0, 1.0)


def write_overlay_png(path: str | os.PathLike, abundances, component_names: Sequence[str], *,
                      title: str | None = None, pixel_size_um: tuple[float, float] | None = None,
                      percentile: float = 99.5):
    """Write the false-colour overlay with a legend as PNG (atomic); returns the path."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch

    rgb = overlay_rgb(abundances, percentile=percentile)
    fig = Figure(figsize=(7, 6), dpi=120)
    ax = fig.add_subplot()
    ax.imshow(rgb, interpolation="nearest")
    ax.set_xticks([])
    ax.set_yticks([])
    handles = [Patch(color=PALETTE[k % len(PALETTE)], label=n) for k, n in enumerate(component_names)]
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, title="component")
    note = f"each map scaled to its {percentile:g}th percentile"
    if pixel_size_um is not None:
        note += f"; pixel {pixel_size_um[1]:.3g} µm"
    ax.set_xlabel(note, fontsize=8)
    if title:
        ax.set_title(title, fontsize=9)
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", facecolor="white")
    return write_bytes_atomic(path, buf.getvalue())
