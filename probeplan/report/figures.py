"""Figures shared by the command line, the report and the page (matplotlib, Agg).

The palette is our own colour-blind-safe set: hues chosen far apart in hue and
lightness so that they stay distinguishable under the common colour-vision
deficiencies (checked by eye under simulated deuteranopia and protanopia; a
design choice, not a standard).  Every axis carries its unit.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

__all__ = ["PALETTE", "colour", "depth_figure", "spectra_figure", "crosstalk_figure", "channels_figure", "maps_figure",
           "escaped_spectra_figure",
           "depth_and_spectra_figure", "new_figure"]

#: Probe colours: deep blue, orange, teal, magenta, ochre, grey-violet, dark green, brick.
PALETTE = ("#1f4e9c", "#e07b00", "#1b9e8a", "#b8337a", "#c9a227", "#6f6a9b", "#2f6b2f", "#a04a2a")


def colour(i: int) -> str:
    """The i-th palette colour (cycling)."""
    return PALETTE[i % len(PALETTE)]


def new_figure(rows: int = 1, cols: int = 1, *, width: float = 9.0, height: float = 3.2):
    """A figure and its axes from a non-interactive backend (never opens a window)."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height * rows), layout="constrained")
    axes = fig.subplots(rows, cols, squeeze=False)
    return fig, axes


def depth_figure(profiles: Sequence, *, sbr_threshold: float | None = 2.0, target_depth_mm: float | None = None):
    """SBR, SNR and blur against depth (three panels) for one profile per probe."""
    fig, axes = new_figure(1, 3, width=12.0, height=3.6)
    _draw_depth(axes[0], profiles, sbr_threshold=sbr_threshold, target_depth_mm=target_depth_mm)
    return fig


def _draw_depth(axes, profiles, *, sbr_threshold, target_depth_mm) -> None:
    ax_sbr, ax_snr, ax_blur = axes
    for i, p in enumerate(profiles):
        c = colour(i)
        ax_sbr.plot(p.depth_mm, p.sbr, color=c, label=p.probe)
        ax_snr.plot(p.depth_mm, np.maximum(p.snr, 1e-3), color=c, label=p.probe)
        ax_blur.plot(p.depth_mm, p.blur_fwhm_mm, color=c, label=p.probe)
        invalid = ~np.asarray(p.diffusion_valid)
        if invalid.any():
            ax_sbr.plot(p.depth_mm[invalid], p.sbr[invalid], ls="none", marker=".", ms=3, color=c, alpha=0.5)
    if sbr_threshold is not None:
        ax_sbr.axhline(sbr_threshold, color="0.3", ls="--", lw=1, label=f"SBR {sbr_threshold:g}")
    for ax in (ax_sbr, ax_snr, ax_blur):
        ax.set_xlabel("target depth (mm)")
        ax.grid(alpha=0.3)
        if target_depth_mm is not None:
            ax.axvline(target_depth_mm, color="0.5", lw=1, ls=":")
    ax_sbr.set_ylabel("SBR = (S + B) / B")
    ax_sbr.set_yscale("log")
    ax_snr.set_ylabel("SNR per pixel")
    ax_snr.set_yscale("log")
    ax_blur.set_ylabel("blur FWHM (mm)")
    ax_sbr.legend(fontsize=8)


def spectra_figure(wavelength_nm, emissions: Sequence[tuple[str, np.ndarray]], filters: Sequence[tuple[str, np.ndarray]],
                   *, excitation_nm: float | None = None, ax=None):
    """Probe emission spectra (lines) with filter transmission bands (shaded); draws on ``ax`` if given."""
    if ax is None:
        fig, axes = new_figure(1, 1, width=9.0, height=3.6)
        ax = axes[0][0]
    fig = ax.figure
    wl = np.asarray(wavelength_nm)
    for j, (name, t) in enumerate(filters):
        ax.fill_between(wl, 0, t, color="0.6", alpha=0.18 + 0.07 * (j % 2), step=None, lw=0)
        peak = int(np.argmax(t))
        ax.text(wl[peak], float(t[peak]) * 1.02, name, ha="center", va="bottom", fontsize=8, color="0.25")
    for i, (name, e) in enumerate(emissions):
        m = float(np.max(e)) or 1.0
        ax.plot(wl, np.asarray(e) / m, color=colour(i), lw=2, label=name)
    if excitation_nm is not None and wl[0] <= excitation_nm <= wl[-1]:
        ax.axvline(excitation_nm, color="#7a0000", lw=1.5, ls="--", label=f"excitation {excitation_nm:g} nm")
    ax.set_xlabel("wavelength (nm)")
    ax.set_ylabel("emission (peak = 1) / filter transmission")
    ax.set_ylim(0, 1.15)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="upper right")
    return fig


def crosstalk_figure(crosstalk, probe_names: Sequence[str], channel_names: Sequence[str], *, title: str = "", ax=None):
    """Crosstalk heat map: channels down, probes across, values annotated; draws on ``ax`` if given."""
    if ax is None:
        fig, axes = new_figure(1, 1, width=1.6 + 1.3 * len(probe_names), height=1.0 + 0.55 * len(channel_names))
        ax = axes[0][0]
    fig = ax.figure
    x = np.asarray(crosstalk, dtype=float)
    im = ax.imshow(x, cmap="cividis", vmin=0.0, vmax=1.0, aspect="auto")
    for (r, c), v in np.ndenumerate(x):
        ax.text(c, r, f"{v:.2f}" if math.isfinite(v) else "–", ha="center", va="center", fontsize=9,
                color="white" if v < 0.55 else "black")
    ax.set_xticks(range(len(probe_names)), probe_names, rotation=20, ha="right", fontsize=8)
    ax.set_yticks(range(len(channel_names)), channel_names, fontsize=8)
    ax.set_xlabel("probe")
    ax.set_ylabel("channel")
    if title:
        ax.set_title(title, fontsize=10)
    fig.colorbar(im, ax=ax, label="response / own-channel response")
    return fig


def channels_figure(wavelength_nm, probes, channels, crosstalk, probe_names, channel_names, *, depth_mm: float):
    """Emission spectra with filter bands (left) and the crosstalk map at one depth (right)."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(13.0, 3.8), layout="constrained")
    left, right = fig.subplots(1, 2, width_ratios=[2.2, 1.0])
    wl = np.asarray(wavelength_nm)
    spectra_figure(wl, [(p.name, p.emission_per_nm(wl)) for p in probes],
                   [(ch.name, ch.emission_filter.transmission(wl)) for ch in channels],
                   excitation_nm=float(channels[0].source.centre_nm), ax=left)
    crosstalk_figure(crosstalk, probe_names, channel_names, title=f"crosstalk at {depth_mm:g} mm", ax=right)
    return fig


def maps_figure(maps, titles: Sequence[str], unit: str, *, cmap: str = "magma"):
    """One image per map (first plane of Z/T stacks), each with its own colour bar labelled ``unit``.

    The colour scale runs from min(0, minimum) to the 99.5th percentile, so a
    few bright pixels do not wash out the rest.
    """
    n = len(titles)
    cols = min(n, 4)
    rows = (n + cols - 1) // cols
    fig, axes = new_figure(rows, cols, width=3.4 * cols, height=3.0)
    for i, ax in enumerate(axes.ravel()):
        if i >= n:
            ax.set_axis_off()
            continue
        m = np.asarray(maps[i], dtype=np.float64)
        while m.ndim > 2:
            m = m[0]
        finite = m[np.isfinite(m)]
        hi = float(np.percentile(finite, 99.5)) if finite.size else 1.0
        im = ax.imshow(m, cmap=cmap, vmin=min(0.0, float(finite.min())) if finite.size else 0.0,
                       vmax=hi if hi > 0 else None, interpolation="nearest")
        ax.set_title(titles[i], fontsize=9)
        ax.set_xlabel("x (pixel)")
        ax.set_ylabel("y (pixel)")
        fig.colorbar(im, ax=ax, label=unit, shrink=0.85)
    return fig


def escaped_spectra_figure(profiles: Sequence, *, depths_mm: Sequence[float] = (0.5, 2.0, 5.0, 8.0)):
    """The escaping emission spectrum (peak = 1) at a few depths, one panel per probe.

    Lighter lines are deeper targets; the dotted line is the escaping peak at the
    shallowest depth, so the shift with depth is visible.
    """
    n = len(profiles)
    fig, axes = new_figure(1, n, width=4.0 * n, height=3.2)
    _draw_spectra(axes[0], profiles, depths_mm)
    return fig


def _draw_spectra(axes, profiles, depths_mm) -> None:
    for ax, (i, p) in zip(axes, enumerate(profiles), strict=True):
        wl = np.asarray(p.wavelength_nm)
        chosen = [d for d in depths_mm if p.depth_mm[0] <= d <= p.depth_mm[-1]] or [float(p.depth_mm[0])]
        for j, d in enumerate(chosen):
            row = int(np.argmin(np.abs(p.depth_mm - d)))
            spec = np.asarray(p.escaped_spectrum[row], dtype=float)
            peak = float(spec.max())
            if peak > 0:
                alpha = 1.0 - 0.7 * j / max(1, len(chosen) - 1)
                ax.plot(wl, spec / peak, color=colour(i), alpha=alpha, label=f"{p.depth_mm[row]:g} mm")
        ax.axvline(float(p.escaped_peak_nm[0]), color="0.4", ls=":", lw=1)
        ax.set_title(p.probe, fontsize=9)
        ax.set_xlabel("wavelength (nm)")
        ax.set_ylabel("escaping emission (peak = 1)")
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7, title="target depth", title_fontsize=7)


def depth_and_spectra_figure(profiles: Sequence, sbr_threshold: float | None = 2.0, *,
                             target_depth_mm: float | None = None):
    """:func:`depth_figure` above :func:`escaped_spectra_figure` in one figure."""
    from matplotlib.figure import Figure

    n = len(profiles)
    fig = Figure(figsize=(max(12.0, 4.0 * n), 7.2), layout="constrained")
    top, bottom = fig.subfigures(2, 1)
    _draw_depth(top.subplots(1, 3), profiles, sbr_threshold=sbr_threshold, target_depth_mm=target_depth_mm)
    _draw_spectra(np.atleast_1d(bottom.subplots(1, n)), profiles, (0.5, 2.0, 5.0, 8.0))
    return fig
