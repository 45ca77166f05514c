"""Figures shared by the command line, the report and the page (matplotlib, Agg).

Line colours are the Okabe–Ito set (Okabe & Ito, *Color Universal Design*, 2008; Wong,
Nat. Methods 8, 441, 2011), chosen to stay distinct for readers with the common
colour-vision deficiencies; the abundance maps and their composite come from
:mod:`probeplan.unmixing.overlay`.  Every axis carries its unit; axes are linear unless
the quantity spans orders of magnitude, and then the label says so; tick labels and
annotations use the report's number formatter (no ``2×10⁰``, no ``0.00`` for 0.0046).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

__all__ = ["PALETTE", "colour", "depth_figure", "spectra_figure", "crosstalk_figure", "channels_figure", "maps_figure",
           "escaped_spectra_figure", "composite_figure", "phantom_sbr_figure",
           "depth_and_spectra_figure", "new_figure"]

#: Line colours on white, Okabe–Ito (blue, orange, bluish green, reddish purple, vermilion, sky blue, black);
#: yellow is left out, being too pale on white.
PALETTE = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#D55E00", "#56B4E9", "#000000")


def _number(value: float, digits: int = 3) -> str:
    from probeplan.format import format_number

    return format_number(float(value), digits)


def _plain_ticks(ax, axis: str = "y") -> None:
    """Tick labels as plain numbers from the report's formatter (a log axis would otherwise print 2×10⁰)."""
    from matplotlib.ticker import FuncFormatter

    fmt = FuncFormatter(lambda v, _pos: _number(v, 3))
    target = ax.yaxis if axis == "y" else ax.xaxis
    target.set_major_formatter(fmt)
    target.set_minor_formatter(FuncFormatter(lambda v, _pos: ""))


def colour(i: int) -> str:
    """The i-th palette colour (cycling)."""
    return PALETTE[i % len(PALETTE)]


def new_figure(rows: int = 1, cols: int = 1, *, width: float = 9.0, height: float = 3.2,
               layout: str | None = "constrained"):
    """A figure and its axes from a non-interactive backend (never opens a window).

    ``layout=None``: no layout solver (the caller sets fixed margins); drawing is then much faster.
    """
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height * rows), layout=layout)
    axes = fig.subplots(rows, cols, squeeze=False)
    return fig, axes


def depth_figure(profiles: Sequence, *, sbr_threshold: float | None = 2.0, target_depth_mm: float | None = None,
                 quick: bool = False):
    """SBR, SNR and blur against depth (three panels) for one profile per probe.

    ``quick``: fixed margins instead of matplotlib's layout solver and no minor ticks on the
    SNR axis, which more than halves the drawing time; for the page, which redraws the figure
    whenever a control moves (render it without ``bbox_inches="tight"``: the margins are set).
    """
    fig, axes = new_figure(1, 3, width=12.0, height=3.6, layout=None if quick else "constrained")
    _draw_depth(axes[0], profiles, sbr_threshold=sbr_threshold, target_depth_mm=target_depth_mm)
    if quick:
        from matplotlib.ticker import NullLocator

        axes[0][1].yaxis.set_minor_locator(NullLocator())
        fig.subplots_adjust(left=0.05, right=0.995, bottom=0.135, top=0.93, wspace=0.24)
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
    # Linear SBR axis: what matters is where each curve crosses the threshold, so the axis stops at a few
    # times the threshold (shallow SBRs above it are off the top; the table gives them).
    top = max((float(np.nanmax(p.sbr)) for p in profiles), default=2.0)
    cap = 5.0 * (sbr_threshold or 2.0)
    ax_sbr.set_ylim(1.0, min(top, cap) * 1.05 if top > 1.0 else 2.0)
    if top > cap:
        ax_sbr.set_title(f"SBR axis cut at {_number(cap, 3)}", fontsize=8, loc="right", color="0.35")
    ax_snr.set_ylabel("SNR per pixel (log axis: spans decades)")
    ax_snr.set_yscale("log")
    _plain_ticks(ax_snr)
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
    # Filter labels sit in a band above the curves (emission peaks are 1, transmissions at most 1), on two
    # alternating rows when neighbouring filters are close, so no label covers a peak or another label.
    span = float(wl[-1] - wl[0]) or 1.0
    last_x = {0: -np.inf, 1: -np.inf}
    for j, (name, t) in enumerate(filters):
        t = np.asarray(t, dtype=float)
        ax.fill_between(wl, 0, t, color="0.6", alpha=0.18 + 0.07 * (j % 2), step=None, lw=0)
        band = wl[t >= 0.5 * float(t.max())] if float(t.max()) > 0 else wl[[int(np.argmax(t))]]
        x = float(np.clip((band[0] + band[-1]) / 2, wl[0] + 0.04 * span, wl[-1] - 0.04 * span))
        row = 0 if x - last_x[0] > 0.09 * span else 1
        last_x[row] = x
        ax.text(x, 1.04 + 0.085 * row, name, ha="center", va="bottom", fontsize=8, color="0.25")
    for i, (name, e) in enumerate(emissions):
        m = float(np.max(e)) or 1.0
        ax.plot(wl, np.asarray(e) / m, color=colour(i), lw=2, label=name)
    if excitation_nm is not None and wl[0] <= excitation_nm <= wl[-1]:
        ax.axvline(excitation_nm, color="#7a0000", lw=1.5, ls="--", label=f"excitation {excitation_nm:g} nm")
    ax.set_xlabel("wavelength (nm)")
    ax.set_ylabel("emission (peak = 1) / filter transmission")
    ax.set_ylim(0, 1.25)
    ax.set_yticks([0, 0.25, 0.5, 0.75, 1.0])
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
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
        ax.text(c, r, _number(v, 2) if math.isfinite(v) else "–", ha="center", va="center", fontsize=9,
                color="white" if v < 0.55 else "black")
    ax.set_xticks(range(len(probe_names)), probe_names, rotation=20, ha="right", fontsize=8)
    ax.set_yticks(range(len(channel_names)), channel_names, fontsize=8)
    ax.set_xlabel("probe")
    ax.set_ylabel("channel")
    if title:
        ax.set_title(title, fontsize=10)
    fig.colorbar(im, ax=ax, label="response / own-channel response")
    return fig


def channels_figure(wavelength_nm, probes, channels, crosstalk, probe_names, channel_names, *, depth_mm: float,
                    quick: bool = False):
    """Emission spectra with filter bands (left) and the crosstalk map at one depth (right).

    ``quick``: fixed margins instead of matplotlib's layout solver (see :func:`depth_figure`).
    """
    from matplotlib.figure import Figure

    fig = Figure(figsize=(13.0, 3.8), layout=None if quick else "constrained")
    left, right = fig.subplots(1, 2, width_ratios=[2.2, 1.0])
    if quick:  # room for the legend right of the spectra, the rotated probe names and the colour bar
        fig.subplots_adjust(left=0.05, right=0.97, bottom=0.2, top=0.91, wspace=0.42)
    wl = np.asarray(wavelength_nm)
    spectra_figure(wl, [(p.name, p.emission_per_nm(wl)) for p in probes],
                   [(ch.name, ch.emission_filter.transmission(wl)) for ch in channels],
                   excitation_nm=float(channels[0].source.centre_nm), ax=left)
    crosstalk_figure(crosstalk, probe_names, channel_names, title=f"crosstalk at {depth_mm:g} mm", ax=right)
    return fig


def maps_figure(maps, titles: Sequence[str], unit, *, cmap: str = "magma", **kwargs):
    """Small multiples of abundance (or error) maps: :func:`probeplan.unmixing.overlay.maps_figure`."""
    from probeplan.unmixing.overlay import maps_figure as _maps

    return _maps(maps, titles, unit, cmap=cmap, **kwargs)


def composite_figure(abundances, names: Sequence[str], **kwargs):
    """The colour-blind-safe composite: :func:`probeplan.unmixing.overlay.composite_figure`."""
    from probeplan.unmixing.overlay import composite_figure as _composite

    return _composite(abundances, names, **kwargs)


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
                ax.plot(wl, spec / peak, color=colour(i), alpha=alpha, label=f"{_number(p.depth_mm[row], 3)} mm")
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



def phantom_sbr_figure(rows: Sequence[dict], *, sbr_threshold: float | None = 2.0):
    """SBR against depth in the phantom (dashed) and in the plan's tissue (solid), one colour per probe.

    ``rows`` are :attr:`probeplan.study.phantom.PlanPhantom.sbr_curve` rows (probe, depth_mm,
    sbr_phantom, sbr_tissue).  Linear axes: the comparison is read where the curves cross
    the threshold.
    """
    fig, axes = new_figure(1, 1, width=8.0, height=3.8)
    ax = axes[0][0]
    probes = list(dict.fromkeys(r["probe"] for r in rows))
    for i, name in enumerate(probes):
        sub = [r for r in rows if r["probe"] == name]
        d = [r["depth_mm"] for r in sub]
        ax.plot(d, [r["sbr_tissue"] for r in sub], color=colour(i), lw=2, label=f"{name}: tissue")
        ax.plot(d, [r["sbr_phantom"] for r in sub], color=colour(i), lw=1.5, ls="--", label=f"{name}: phantom")
    if sbr_threshold is not None:
        ax.axhline(sbr_threshold, color="0.3", lw=1, ls=":", label=f"SBR {sbr_threshold:g}")
    top = max((max(r["sbr_tissue"], r["sbr_phantom"]) for r in rows), default=2.0)
    cap = 5.0 * (sbr_threshold or 2.0)
    ax.set_ylim(1.0, min(top, cap) * 1.05 if top > 1.0 else 2.0)
    ax.set_xlabel("inclusion depth (mm)")
    ax.set_ylabel("SBR = (S + B) / B")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    return fig
