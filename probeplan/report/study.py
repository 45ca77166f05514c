"""The study report: per-animal values over time, group comparisons per time point, kinetics fits, tables, cautions.

:func:`study_report` builds a :class:`~probeplan.report.document.Report` from a
:class:`~probeplan.study.runs.StudyResult`; :func:`write_study_report` writes it as one
self-contained ``report.html`` in the study's output folder (the tables themselves are the
study's ``measurements.csv``, ``groups.csv`` and ``kinetics.csv`` beside it).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from probeplan.report.document import LASER_CAUTION, Report, render_html
from probeplan.report.figures import colour, new_figure
from probeplan.unmixing.pipeline import DEPTH_COMPARISON_CAUTION

__all__ = ["study_report", "write_study_report", "ANIMAL_CAUTION", "MAX_PANELS", "group_time_course_figure"]

#: Shown on every study report.
ANIMAL_CAUTION = (
    "These results come from animal experiments: the animal care committee's approved protocol governs group sizes, "
    "time points, doses and humane end points. Statistics here are exploratory aids; the study's pre-registered "
    "analysis plan and a statistician decide what is reported."
)
#: Most panels in one figure (ROI x component, in table order); the rest are in the tables.
MAX_PANELS = 6


def _panels(measurements, background):
    rois = [r for r in dict.fromkeys(measurements["roi"]) if r != background]
    comps = list(dict.fromkeys(measurements["component"]))
    return [(r, c) for r in rois for c in comps][:MAX_PANELS]


def _grid(n):
    cols = min(3, n)
    return max(1, math.ceil(n / cols)), max(cols, 1)


def time_course_figure(measurements, *, quantity="tbr", background="background", unit=""):
    """Per-animal points over time (lines join one animal), one panel per target ROI x component."""
    panels = _panels(measurements, background)
    rows, cols = _grid(len(panels))
    fig, axes = new_figure(rows, cols, width=4.0 * cols, height=3.0)
    groups = sorted(measurements["group"].astype(str).unique())
    for i, (roi, comp) in enumerate(panels):
        ax = axes[i // cols][i % cols]
        sub = measurements[(measurements["roi"] == roi) & (measurements["component"] == comp)]
        for gi, g in enumerate(groups):
            for j, (_, a) in enumerate(sub[sub["group"].astype(str) == g].groupby("animal")):
                a = a.sort_values("time_h")
                ax.plot(a["time_h"], a[quantity], "o-", color=colour(gi), alpha=0.7, ms=4,
                        label=g if j == 0 else None)
        ax.set_title(f"{roi}: {comp}", fontsize=9)
        ax.set_xlabel("time (h)")
        ax.set_ylabel("TBR" if quantity == "tbr" else f"mean ({unit})" if unit else "mean")
        if i == 0:
            ax.legend(fontsize=8, title="group", title_fontsize=8)
    for j in range(len(panels), rows * cols):
        axes[j // cols][j % cols].set_visible(False)
    return fig


def comparison_figure(groups, *, quantity="tbr"):
    """Difference between groups with its 95 % CI at each time point, one panel per ROI x component."""
    g = groups[groups["quantity"] == quantity]
    keys = list(dict.fromkeys(zip(g["roi"], g["component"], strict=True)))[:MAX_PANELS]
    rows, cols = _grid(len(keys))
    fig, axes = new_figure(rows, cols, width=4.0 * cols, height=3.0)
    for i, (roi, comp) in enumerate(keys):
        ax = axes[i // cols][i % cols]
        sub = g[(g["roi"] == roi) & (g["component"] == comp)]
        for pi, ((ga, gb), p) in enumerate(sub.groupby(["group_a", "group_b"])):
            p = p.sort_values("time_h")
            lo = (p["difference"] - p["ci_low"]).to_numpy()
            hi = (p["ci_high"] - p["difference"]).to_numpy()
            ax.errorbar(p["time_h"] + 0.01 * pi * max(1.0, float(p["time_h"].max())), p["difference"],
                        yerr=np.vstack([lo, hi]), fmt="o", color=colour(pi), capsize=3, label=f"{ga} − {gb}")
            for t, d, padj in zip(p["time_h"], p["difference"], p["p_adjusted"], strict=True):
                if np.isfinite(padj):
                    ax.annotate(f"p={padj:.2g}", (t, d), fontsize=7, xytext=(4, 4), textcoords="offset points")
        ax.axhline(0.0, color="#888", lw=0.8)
        ax.set_title(f"{roi}: {comp} ({quantity})", fontsize=9)
        ax.set_xlabel("time (h)")
        ax.set_ylabel("difference (95 % CI)")
        if i == 0:
            ax.legend(fontsize=8)
    for j in range(len(keys), rows * cols):
        axes[j // cols][j % cols].set_visible(False)
    return fig


def kinetics_figure(measurements, kinetics, *, background="background", unit=""):
    """Measured ROI means over time with the fitted curve of each animal."""
    from probeplan.study.kinetics import bateman, washout

    panels = _panels(measurements, background)
    rows, cols = _grid(len(panels))
    fig, axes = new_figure(rows, cols, width=4.0 * cols, height=3.0)
    groups = sorted(measurements["group"].astype(str).unique())
    for i, (roi, comp) in enumerate(panels):
        ax = axes[i // cols][i % cols]
        sub = measurements[(measurements["roi"] == roi) & (measurements["component"] == comp)]
        tmax = float(sub["time_h"].max()) if len(sub) else 1.0
        tt = np.linspace(0.0, tmax, 200)
        for animal, a in sub.groupby("animal"):
            gi = groups.index(str(a["group"].iloc[0]))
            ax.plot(a["time_h"], a["mean"], "o", color=colour(gi), ms=4)
            k = kinetics[(kinetics["animal"] == animal) & (kinetics["roi"] == roi) & (kinetics["component"] == comp)]
            if not len(k):
                continue
            k = k.iloc[0]
            if k["model"] == "uptake-washout":
                ke, ka = k["rate_per_h"], k["uptake_rate_per_h"]
                tp = k["t_peak_h"]
                peak = float(a.loc[(a["time_h"] - tp).abs().idxmin(), "mean"])
                shape = bateman(tt, 1.0, ke, ka - ke)
                # amplitude from the measured points by least squares (the table holds rates only)
                s_at = bateman(a["time_h"].to_numpy(), 1.0, ke, ka - ke)
                amp = float(s_at @ a["mean"].to_numpy() / (s_at @ s_at)) if s_at @ s_at > 0 else peak
                ax.plot(tt, amp * shape, "-", color=colour(gi), lw=1)
            elif k["model"] == "washout" and np.isfinite(k["rate_per_h"]):
                t0 = float(k["t_peak_h"])
                aa = a[a["time_h"] >= t0]
                s_at = washout(aa["time_h"].to_numpy(), 1.0, k["rate_per_h"])
                amp = float(s_at @ aa["mean"].to_numpy() / (s_at @ s_at))
                t2 = tt[tt >= t0]
                ax.plot(t2, washout(t2, amp, k["rate_per_h"]), "-", color=colour(gi), lw=1)
        ax.set_title(f"{roi}: {comp}", fontsize=9)
        ax.set_xlabel("time (h)")
        ax.set_ylabel(f"mean ({unit})" if unit else "mean")
    for j in range(len(panels), rows * cols):
        axes[j // cols][j % cols].set_visible(False)
    return fig


def group_time_course_figure(measurements, *, roi: str, component: str, quantity: str = "tbr", unit: str = "counts"):
    """One ROI and component: each animal over time (thin lines) with each group's mean ± SE at each time.

    ``measurements`` is the study's measurements table (a DataFrame with animal, group,
    time_h, roi, component and the ``quantity`` column: ``"mean"`` or ``"tbr"``).  Linear
    axes; group colours from :data:`the palette`; the mean ± standard error of the animals at
    each time is drawn slightly to the right of the points so that neither hides the other.
    """
    import pandas as pd

    df = measurements[(measurements["roi"] == roi) & (measurements["component"] == component)]
    df = df[pd.notna(df[quantity])]
    fig, axes = new_figure(1, 1, width=8.0, height=4.2)
    ax = axes[0][0]
    times = np.sort(df["time_h"].unique())
    span = float(times[-1] - times[0]) if len(times) > 1 else 1.0
    for i, (group, g) in enumerate(df.groupby("group", sort=True)):
        c = colour(i)
        for _animal, a in g.groupby("animal"):
            a = a.sort_values("time_h")
            ax.plot(a["time_h"], a[quantity], color=c, lw=0.7, alpha=0.45, marker="o", ms=3.5)
        stats = g.groupby("time_h")[quantity].agg(["mean", "std", "count"])
        se = stats["std"] / np.sqrt(stats["count"])
        ax.errorbar(stats.index + 0.012 * span, stats["mean"], yerr=se.fillna(0.0), color=c, lw=2.0, marker="s",
                    ms=6, capsize=4, label=f"{group} (n = {g['animal'].nunique()}): mean ± SE")
    label = {"tbr": "target-to-background ratio", "mean": f"mean abundance ({unit})"}.get(quantity, quantity)
    ax.set_xlabel("time after injection (h)")
    ax.set_ylabel(label)
    ax.set_title(f"{component} in {roi}", fontsize=10)
    if quantity == "tbr":
        ax.axhline(1.0, color="0.5", lw=0.8, ls=":")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    return fig


def _rows(df):
    return [{k: (v.item() if hasattr(v, "item") else v) for k, v in r.items()} for r in df.to_dict("records")]


def study_report(result, settings=None) -> Report:
    """The report of a study run (:func:`probeplan.study.runs.run_study`)."""
    from probeplan.study.kinetics import KINETICS_NOTES
    from probeplan.study.runs import MEASUREMENTS_NOTES
    from probeplan.study.stats import GROUPS_NOTES

    background = settings.roi_background if settings is not None else "background"
    m, g, k = result.measurements, result.groups, result.kinetics
    report = Report("Study results", subtitle=f"{m['animal'].nunique()} animals, groups "
                    f"{', '.join(sorted(m['group'].astype(str).unique()))}, time points "
                    f"{', '.join(f'{t:g}' for t in sorted(m['time_h'].unique()))} h", cautions=[ANIMAL_CAUTION,
                                                                                               LASER_CAUTION,
                                                                                               DEPTH_COMPARISON_CAUTION])
    report.summary.append(f"Abundance unit: {result.unit}.")
    tested = g[g["p_welch"].notna()] if len(g) else g
    if len(tested):
        sig = tested[tested["p_adjusted"] < 0.05]
        report.summary.append(f"{len(tested)} group comparisons tested; {len(sig)} with Holm-adjusted Welch p < 0.05.")
    report.summary.extend(result.notes[1:])
    if result.skipped:
        report.summary.append(f"{len(result.skipped)} acquisition(s) unchanged since an earlier run were reused.")
    try:
        report.add_figure("Per-animal target-to-background ratio over time (one line per animal, colour = group)",
                          time_course_figure(m, quantity="tbr", background=background))
        if len(g):
            report.add_figure("Difference between groups in TBR at each time point (95 % CI, Welch–Satterthwaite; "
                              "p Holm-adjusted)", comparison_figure(g, quantity="tbr"))
        report.add_figure("ROI mean abundance over time with each animal's fitted kinetics",
                          kinetics_figure(m, k, background=background, unit=result.unit))
    except ValueError:  # a study with no target ROI has nothing to draw
        pass
    report.add_table("groups", "Group comparisons", _rows(g), note=" ".join(GROUPS_NOTES))
    report.add_table("kinetics", "Kinetics per animal, ROI and component", _rows(k), note=" ".join(KINETICS_NOTES))
    report.add_table("measurements", "Measurements per animal, time point, ROI and component", _rows(m),
                     note=" ".join(MEASUREMENTS_NOTES))
    report.assumptions.append("ROI means are unconstrained least-squares abundances; maps are unmixed with "
                              f"{settings.method if settings is not None else 'the chosen method'}.")
    return report


def write_study_report(report: Report, out_dir) -> Path:
    """Write ``report.html`` into the study's output folder (atomic); return its path."""
    from probeplan.io.atomic import write_text_atomic

    return write_text_atomic(Path(out_dir) / "report.html", render_html(report))
