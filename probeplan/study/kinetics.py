"""Time courses of ROI abundance per animal: washout half-life and time of peak, with confidence intervals.

Two published one-compartment pharmacokinetic forms, chosen by the number of time points:

``"uptake-washout"`` (five or more time points with the peak strictly inside)
    ``C(t) = A (exp(-k_e t) - exp(-k_a t))``, ``k_a > k_e`` — the Bateman function
    (Bateman 1910, Proc. Cambridge Philos. Soc. 15, 423–427), the one-compartment model with
    first-order uptake and first-order elimination (Gibaldi & Perrier, Pharmacokinetics,
    2nd ed., Marcel Dekker 1982, ch. 1).  Half-life ``ln 2 / k_e`` (the slower, terminal
    rate: with ``k_a > k_e`` imposed, a "flip-flop" course where uptake is the slower step
    would be reported as washout), time of peak ``t_max = ln(k_a / k_e) / (k_a - k_e)``.
``"washout"`` (fewer points, or the peak at the first point)
    ``C(t) = C_0 exp(-k t)`` fitted to the points from the observed peak on (at least
    three; Gibaldi & Perrier ch. 1, the mono-exponential decline); the time of peak is the
    observed one (``t_peak_source = "observed"``).

Fits are unweighted least squares with ``scipy.optimize.curve_fit``; confidence intervals
use the fit's covariance with Student's t quantile on ``n - p`` degrees of freedom: the
rate's interval is mapped through ``ln 2 / k`` (monotone; an upper bound of infinity when
the interval reaches zero), and the time of peak's by the delta method.  A course that
only rises has no washout to fit (``model = "none"``).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd

__all__ = ["KINETICS_COLUMNS", "KINETICS_NOTES", "MIN_POINTS_UPTAKE_WASHOUT", "MIN_POINTS_WASHOUT", "RESOLVABLE_SPAN_FACTOR",
           "bateman",
           "washout", "fit_time_course", "fit_time_courses"]

KINETICS_COLUMNS = ("animal", "roi", "component", "model", "half_life_h", "t_peak_h", "half_life_ci_low",
                    "half_life_ci_high", "t_peak_ci_low", "t_peak_ci_high", "t_peak_source", "rate_per_h",
                    "uptake_rate_per_h", "n_points", "group", "note")
KINETICS_NOTES = (
    "One row per animal x ROI x component, fitted to the ROI mean abundance over time.",
    "model 'uptake-washout': Bateman function A (exp(-ke t) - exp(-ka t)), one-compartment first-order uptake "
    "and elimination (Bateman 1910; Gibaldi & Perrier 1982), used with >= 5 time points and the peak inside; "
    "'washout': C0 exp(-k t) from the observed peak on (>= 3 points); 'none': no washout to fit.",
    "half_life_h = ln 2 / ke; 95 % confidence intervals from the fit covariance (Student t, n - p dof).",
    "A half-life whose rate is not distinguished from zero and that exceeds 10x the time span observed, or a "
    "t_peak interval wider than that, is left empty: the data cannot resolve it (the half-life's lower bound "
    "stays, and the note says so).",
)
#: A half-life or an interval longer than this many times the observed time span is not resolved by the data
#: (our choice: beyond it the point estimate is set by noise, not by the time course).
RESOLVABLE_SPAN_FACTOR = 10.0
MIN_POINTS_UPTAKE_WASHOUT = 5
MIN_POINTS_WASHOUT = 3
_LN2 = math.log(2.0)


def bateman(t, amplitude, k_e, k_gap):
    """Uptake–washout curve ``A (exp(-k_e t) - exp(-(k_e + k_gap) t))`` (``k_a = k_e + k_gap``)."""
    t = np.asarray(t, dtype=np.float64)
    return amplitude * (np.exp(-k_e * t) - np.exp(-(k_e + k_gap) * t))


def washout(t, c0, k):
    """Mono-exponential washout ``C_0 exp(-k t)``."""
    return c0 * np.exp(-k * np.asarray(t, dtype=np.float64))


def _empty(model, n, note, t_peak=math.nan, source=""):
    return {"model": model, "half_life_h": math.nan, "half_life_ci_low": math.nan, "half_life_ci_high": math.nan,
            "t_peak_h": t_peak, "t_peak_ci_low": math.nan, "t_peak_ci_high": math.nan, "t_peak_source": source,
            "rate_per_h": math.nan, "uptake_rate_per_h": math.nan, "n_points": n, "note": note}


def _half_life_ci(k, se, tq):
    lo_k, hi_k = k - tq * se, k + tq * se
    return _LN2 / hi_k if hi_k > 0 else math.nan, _LN2 / lo_k if lo_k > 0 else math.inf


def _fit_washout(t, c, i_peak):
    from scipy import optimize, stats

    tt, cc = t[i_peak:], c[i_peak:]
    n = tt.size
    if n < MIN_POINTS_WASHOUT:
        return _empty("none", n, f"{n} point(s) from the peak on: at least {MIN_POINTS_WASHOUT} are needed for a "
                      "washout fit with a confidence interval", float(t[i_peak]), "observed")
    pos = cc > 0
    if pos.sum() >= 2:
        slope = np.polyfit(tt[pos], np.log(cc[pos]), 1)[0]
        k0 = max(-slope, 1e-6)
    else:
        k0 = 1.0 / max(tt[-1] - tt[0], 1e-6)
    c00 = cc[0] * math.exp(k0 * tt[0])
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            p, cov = optimize.curve_fit(washout, tt, cc, p0=[c00, k0], maxfev=20000)
    except (RuntimeError, ValueError) as exc:
        return _empty("none", n, f"washout fit failed ({exc})", float(t[i_peak]), "observed")
    k = float(p[1])
    row = _empty("washout", n, "", float(t[i_peak]), "observed")
    row["rate_per_h"] = k
    if k <= 0:
        row["note"] = "no decline from the peak on: no washout half-life"
        return row
    row["half_life_h"] = _LN2 / k
    se = math.sqrt(cov[1, 1]) if np.isfinite(cov).all() and n > 2 else math.nan
    if math.isfinite(se):
        tq = float(stats.t.ppf(0.975, n - 2))
        row["half_life_ci_low"], row["half_life_ci_high"] = _half_life_ci(k, se, tq)
        if not math.isfinite(row["half_life_ci_high"]):
            row["note"] = "washout rate not distinguished from zero (the half-life's upper bound is infinite)"
    return row


def _fit_bateman(t, c, i_peak):
    from scipy import optimize, stats

    n = t.size
    tail = slice(i_peak, None)
    pos = c[tail] > 0
    ke0 = max(-np.polyfit(t[tail][pos], np.log(c[tail][pos]), 1)[0], 1e-4) if pos.sum() >= 2 else 1.0 / t[-1]
    tp = max(float(t[i_peak]), 1e-6)
    # a first guess for k_a: the t_max formula solved for k_a at the observed peak, by bracketing
    ka0 = ke0 * 3.0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            ka0 = optimize.brentq(lambda ka: math.log(ka / ke0) / (ka - ke0) - tp, ke0 * (1 + 1e-9) + 1e-12,
                                  ke0 * 1e6 + 1e3)
        except (ValueError, ZeroDivisionError):
            pass
    shape_at_peak = math.exp(-ke0 * tp) - math.exp(-ka0 * tp)
    a0 = float(c[i_peak]) / shape_at_peak if shape_at_peak > 0 else float(c.max())
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            p, cov = optimize.curve_fit(bateman, t, c, p0=[a0, ke0, max(ka0 - ke0, 1e-6)],
                                        bounds=([0.0, 0.0, 0.0], [np.inf, np.inf, np.inf]), maxfev=20000)
    except (RuntimeError, ValueError) as exc:
        return None, f"uptake-washout fit failed ({exc}); washout fitted instead"
    _, ke, gap = (float(v) for v in p)
    if not (ke > 0 and gap > 0 and np.isfinite(cov).all()):
        return None, "uptake-washout fit did not give two distinct positive rates; washout fitted instead"
    ka = ke + gap
    row = _empty("uptake-washout", n, "")
    row["rate_per_h"], row["uptake_rate_per_h"] = ke, ka
    row["half_life_h"] = _LN2 / ke
    tq = float(stats.t.ppf(0.975, n - 3))
    row["half_life_ci_low"], row["half_life_ci_high"] = _half_life_ci(ke, math.sqrt(cov[1, 1]), tq)
    if not math.isfinite(row["half_life_ci_high"]):
        row["note"] = "washout rate not distinguished from zero (the half-life's upper bound is infinite)"

    def tmax(q):
        ke_, ka_ = q[0], q[0] + q[1]
        return math.log(ka_ / ke_) / (ka_ - ke_)

    t_peak = tmax((ke, gap))
    h = 1e-6
    grad = np.array([(tmax((ke * (1 + h), gap)) - tmax((ke * (1 - h), gap))) / (2 * ke * h),
                     (tmax((ke, gap * (1 + h))) - tmax((ke, gap * (1 - h)))) / (2 * gap * h)])
    se_tp = math.sqrt(max(float(grad @ cov[1:, 1:] @ grad), 0.0))
    row.update(t_peak_h=t_peak, t_peak_ci_low=t_peak - tq * se_tp, t_peak_ci_high=t_peak + tq * se_tp,
               t_peak_source="fit")
    return row, ""


def fit_time_course(time_h, value) -> dict:
    """Fit one time course (see the module notes for the model chosen).

    Parameters
    ----------
    time_h, value : array_like
        Times (h) and values; NaN values are left out.

    Returns
    -------
    dict
        Keys of :data:`KINETICS_COLUMNS` from ``model`` on.

    Examples
    --------
    >>> t = [1.0, 4.0, 24.0, 48.0]
    >>> r = fit_time_course(t, [10 * 0.5 ** (x / 12.0) for x in t])
    >>> r["model"], round(r["half_life_h"], 6)
    ('washout', 12.0)
    """
    t = np.asarray(time_h, dtype=np.float64)
    c = np.asarray(value, dtype=np.float64)
    ok = np.isfinite(t) & np.isfinite(c)
    t, c = t[ok], c[ok]
    order = np.argsort(t)
    t, c = t[order], c[order]
    n = t.size
    if n < 2:
        return _empty("none", n, "fewer than two time points")
    i_peak = int(np.argmax(c))
    if i_peak == n - 1:
        return _empty("none", n, "the value rises to the last time point: no washout observed", float(t[-1]),
                      "observed")
    note = ""
    if n >= MIN_POINTS_UPTAKE_WASHOUT and i_peak > 0 and t[0] >= 0:
        row, note = _fit_bateman(t, c, i_peak)
        if row is not None:
            return _unresolved_left_empty(row, float(t[-1] - t[0]))
    row = _fit_washout(t, c, i_peak)
    if note:
        row["note"] = "; ".join(x for x in (note, row["note"]) if x)
    return _unresolved_left_empty(row, float(t[-1] - t[0]))


def _unresolved_left_empty(row: dict, span_h: float) -> dict:
    """Empty the figures the time course cannot resolve (see :data:`RESOLVABLE_SPAN_FACTOR`), saying so."""
    limit = RESOLVABLE_SPAN_FACTOR * span_h
    notes = [row["note"]] if row["note"] else []
    if math.isinf(row["half_life_ci_high"]) and row["half_life_h"] > limit:
        row["half_life_h"] = math.nan
        notes = [f"washout rate not distinguished from zero: the half-life is at least {row['half_life_ci_low']:.3g} h "
                 f"(lower 95 % bound), longer than a {span_h:g} h time course can measure"]
    if row["t_peak_ci_high"] - row["t_peak_ci_low"] > limit:
        row["t_peak_ci_low"] = row["t_peak_ci_high"] = math.nan
        notes.append("the peak time's interval is wider than the time course can resolve")
    row["note"] = "; ".join(notes)
    return row


def fit_time_courses(measurements: pd.DataFrame, *, quantity: str = "mean",
                     background: str | None = None) -> tuple[pd.DataFrame, list[str]]:
    """Kinetics table: one fit per animal x ROI x component of ``quantity`` over time.

    Returns
    -------
    (DataFrame with columns :data:`KINETICS_COLUMNS`, list of notes)
    """
    rows = []
    for (animal, roi, comp), sub in measurements.groupby(["animal", "roi", "component"], sort=True):
        fit = fit_time_course(sub["time_h"], sub[quantity])
        rows.append({"animal": animal, "group": str(sub["group"].iloc[0]), "roi": roi, "component": comp, **fit})
    table = pd.DataFrame(rows, columns=list(KINETICS_COLUMNS))
    notes = []
    if len(table):
        counts = table["model"].value_counts().to_dict()
        notes.append("Models used: " + ", ".join(f"{k} {v}" for k, v in sorted(counts.items())) + ".")
    return table, notes
