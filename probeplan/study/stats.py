"""Group comparisons of per-animal values: Welch's t-test, a rank test and Holm's adjustment.

For every time point x ROI x component x quantity (``mean`` abundance and ``tbr``) and
every pair of groups, the per-animal values of the two groups are compared:

* Welch's unequal-variance t-test (Welch 1947, Biometrika 34, 28–35,
  doi:10.1093/biomet/34.1-2.28) with the confidence interval of the difference of means
  from the Welch–Satterthwaite degrees of freedom (``scipy.stats.ttest_ind(equal_var=False)``);
* the Wilcoxon–Mann–Whitney rank-sum test (Mann & Whitney 1947, Ann. Math. Stat. 18, 50–60,
  doi:10.1214/aoms/1177730491; ``scipy.stats.mannwhitneyu``, exact for small groups without
  ties);
* Holm's step-down adjustment of the Welch p-values across the whole table (Holm 1979,
  Scand. J. Stat. 6, 65–70; ``statsmodels.stats.multitest.multipletests``), and likewise of
  the rank-test p-values.

The observed standardised effect (Cohen's d, difference over the pooled SD) is shown
beside the one the plan's power analysis assumed when a plan is given.  A group with fewer
than two animals is not compared: its row says why and holds no p-value.
"""

from __future__ import annotations

import itertools
import math
import warnings

import numpy as np
import pandas as pd

__all__ = ["GROUP_COLUMNS", "GROUPS_NOTES", "compare_groups", "compare_two", "holm"]

#: Columns of ``groups.csv`` (the first fourteen are the stable interface).
GROUP_COLUMNS = ("time_h", "roi", "component", "quantity", "group_a", "group_b", "n_a", "n_b", "difference",
                 "ci_low", "ci_high", "p_welch", "p_rank", "p_adjusted", "p_rank_adjusted", "mean_a", "mean_b",
                 "sd_a", "sd_b", "df_welch", "cohens_d", "planned_d", "note")
GROUPS_NOTES = (
    "One row per time point x ROI x component x quantity (mean abundance or tbr) x pair of groups; "
    "the values compared are one per animal.",
    "difference = mean_a - mean_b with its 95 % confidence interval (Welch-Satterthwaite degrees of freedom).",
    "p_welch: Welch's t-test; p_rank: Mann-Whitney U (two-sided); p_adjusted and p_rank_adjusted: Holm's "
    "step-down adjustment across every row of this table.",
    "cohens_d: difference / pooled SD; planned_d: effect_size / sd assumed by the plan's power analysis.",
)
_MIN_PER_GROUP = 2


def holm(p_values) -> np.ndarray:
    """Holm-adjusted p-values (NaN entries kept as NaN and left out of the family).

    Examples
    --------
    >>> holm([0.01, 0.04, 0.03, float("nan")]).round(3).tolist()
    [0.03, 0.06, 0.06, nan]
    """
    from statsmodels.stats.multitest import multipletests

    p = np.asarray(p_values, dtype=np.float64)
    out = np.full(p.shape, np.nan)
    ok = np.isfinite(p)
    if ok.any():
        out[ok] = multipletests(p[ok], method="holm")[1]
    return out


def compare_two(a, b, *, confidence: float = 0.95) -> dict:
    """Compare two samples: difference of means with Welch CI, Welch and rank-test p-values, Cohen's d.

    Examples
    --------
    >>> r = compare_two([1.0, 2.0, 3.0], [4.0, 5.0, 6.0])
    >>> r["difference"], round(r["p_rank"], 3)
    (-3.0, 0.1)
    """
    from scipy import stats

    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    na, nb = a.size, b.size
    row = {"n_a": na, "n_b": nb, "mean_a": float(a.mean()) if na else math.nan,
           "mean_b": float(b.mean()) if nb else math.nan, "sd_a": math.nan, "sd_b": math.nan, "difference": math.nan,
           "ci_low": math.nan, "ci_high": math.nan, "p_welch": math.nan, "p_rank": math.nan, "df_welch": math.nan,
           "cohens_d": math.nan, "note": ""}
    if na < _MIN_PER_GROUP or nb < _MIN_PER_GROUP:
        row["note"] = (f"not compared: a group has {min(na, nb)} animal(s) with a value; at least {_MIN_PER_GROUP} "
                       "per group are needed to estimate the spread")
        if na and nb:
            row["difference"] = row["mean_a"] - row["mean_b"]
        return row
    sa, sb = float(a.std(ddof=1)), float(b.std(ddof=1))
    row.update(sd_a=sa, sd_b=sb, difference=float(a.mean() - b.mean()))
    pooled = math.sqrt(((na - 1) * sa**2 + (nb - 1) * sb**2) / (na + nb - 2))
    if pooled > 0:
        row["cohens_d"] = row["difference"] / pooled
    if sa == 0 and sb == 0:
        row["note"] = "no spread within either group: Welch's test is undefined"
    else:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            res = stats.ttest_ind(a, b, equal_var=False)
            ci = res.confidence_interval(confidence)
        row.update(p_welch=float(res.pvalue), ci_low=float(ci.low), ci_high=float(ci.high), df_welch=float(res.df))
    row["p_rank"] = float(stats.mannwhitneyu(a, b, alternative="two-sided").pvalue)
    return row


def compare_groups(measurements: pd.DataFrame, *, background: str | None = "background",
                   planned_effect: dict | None = None, quantities=("mean", "tbr")) -> tuple[pd.DataFrame, list[str]]:
    """The groups table from the measurements (one value per animal) and notes on what was left out.

    Parameters
    ----------
    measurements : DataFrame
        Columns ``animal, group, time_h, roi, component`` and the quantities.
    background : str or None
        The background ROI: its ``tbr`` is 1 by definition and is not compared.
    planned_effect : dict, optional
        ``{"effect_size": ..., "sd": ...}`` from the plan.
    quantities : sequence of str

    Returns
    -------
    (DataFrame with columns :data:`GROUP_COLUMNS`, list of str)
    """
    rows = []
    notes: list[str] = []
    planned_d = math.nan
    if planned_effect:
        planned_d = float(planned_effect["effect_size"]) / float(planned_effect["sd"])
    groups = sorted(measurements["group"].astype(str).unique())
    if len(groups) < 2:
        notes.append(f"Only one group ({', '.join(groups)}): no group comparison.")
    keys = ["time_h", "roi", "component"]
    for (t, roi, comp), sub in measurements.groupby(keys, sort=True):
        for q in quantities:
            if q == "tbr" and roi == background:
                continue
            values = {g: sub.loc[sub["group"].astype(str) == g, q].to_numpy(dtype=np.float64) for g in groups}
            for ga, gb in itertools.combinations(groups, 2):
                va, vb = values[ga], values[gb]
                dropped = int((~np.isfinite(va)).sum() + (~np.isfinite(vb)).sum())
                r = compare_two(va[np.isfinite(va)], vb[np.isfinite(vb)])
                if dropped:
                    r["note"] = (r["note"] + "; " if r["note"] else "") + f"{dropped} animal(s) without a finite value"
                rows.append({"time_h": float(t), "roi": roi, "component": comp, "quantity": q, "group_a": ga,
                             "group_b": gb, **r, "planned_d": planned_d})
    table = pd.DataFrame(rows, columns=[c for c in GROUP_COLUMNS if c not in ("p_adjusted", "p_rank_adjusted")])
    table["p_adjusted"] = holm(table["p_welch"]) if len(table) else []
    table["p_rank_adjusted"] = holm(table["p_rank"]) if len(table) else []
    table = table[list(GROUP_COLUMNS)]
    refused = table["note"].str.startswith("not compared").sum() if len(table) else 0
    if refused:
        small = sorted({g for g in groups
                        if measurements.loc[measurements["group"].astype(str) == g, "animal"].nunique() < _MIN_PER_GROUP})
        notes.append(f"{refused} comparison(s) refused: group(s) {small or '(some time points)'} have fewer than "
                     f"{_MIN_PER_GROUP} animals with a value; their measurements are still in measurements.csv.")
    return table, notes
