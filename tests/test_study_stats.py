"""Group comparisons and kinetics fits, against outside references.

- Welch's t-test and its confidence interval: statsmodels' independent implementation
  (``CompareMeans.ttest_ind/tconfint_diff`` with ``usevar="unequal"``).
- Mann–Whitney U: the exact null distribution by counting (two groups of three, completely
  separated: p = 2 / C(6, 3) = 0.1; Mann & Whitney 1947).
- Holm's adjustment: the step-down rule worked by hand (Holm 1979).
- Kinetics: synthetic time courses with a known half-life; the time of peak against a
  numerical maximum found by ``scipy.optimize.minimize_scalar``.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import optimize

from probeplan.study.kinetics import bateman, fit_time_course, fit_time_courses
from probeplan.study.stats import compare_groups, compare_two, holm


def test_welch_against_statsmodels():
    from statsmodels.stats.weightstats import CompareMeans, DescrStatsW

    a = np.array([12.1, 14.3, 11.8, 15.2, 13.0])
    b = np.array([9.4, 10.1, 13.9, 8.2])
    r = compare_two(a, b)
    cm = CompareMeans(DescrStatsW(a), DescrStatsW(b))
    _, p, df = cm.ttest_ind(usevar="unequal")
    lo, hi = cm.tconfint_diff(usevar="unequal")
    assert r["p_welch"] == pytest.approx(p, rel=1e-10)
    assert r["df_welch"] == pytest.approx(df, rel=1e-10)
    assert (r["ci_low"], r["ci_high"]) == pytest.approx((lo, hi), rel=1e-10)
    assert r["difference"] == pytest.approx(a.mean() - b.mean())


def test_rank_test_exact_distribution():
    # completely separated groups of 3: 2 of the C(6,3) = 20 equally likely rankings are as extreme
    r = compare_two([1.0, 2.0, 3.0], [10.0, 11.0, 12.0])
    assert r["p_rank"] == pytest.approx(2 / math.comb(6, 3))


def test_holm_worked_example():
    # sorted p: 0.01, 0.03, 0.04 -> x3, x2, x1 = 0.03, 0.06, 0.04 -> running maximum 0.03, 0.06, 0.06
    assert holm([0.04, 0.01, 0.03]).tolist() == pytest.approx([0.06, 0.03, 0.06])


def test_one_animal_is_refused_with_reason():
    r = compare_two([1.0], [2.0, 3.0])
    assert math.isnan(r["p_welch"]) and "1 animal" in r["note"]


def test_groups_table_holm_over_all_rows_and_planned_effect():
    rows = []
    rng = np.random.default_rng(0)
    for t in (1.0, 24.0):
        for g, shift in (("a", 0.0), ("b", 2.0), ("c", 0.5)):
            for i in range(4):
                rows.append({"animal": f"{g}{i}", "group": g, "time_h": t, "roi": "tumour", "component": "x",
                             "mean": 10 + shift + rng.normal(), "tbr": 2 + shift + rng.normal()})
    m = pd.DataFrame(rows)
    g, notes = compare_groups(m, planned_effect={"effect_size": 2.0, "sd": 1.0})
    assert len(g) == 2 * 2 * 3  # times x quantities x pairs
    assert g["p_adjusted"].to_numpy() == pytest.approx(holm(g["p_welch"]))
    assert (g["p_adjusted"] >= g["p_welch"]).all()
    assert (g["planned_d"] == 2.0).all()


def test_washout_half_life_recovered_exactly():
    t = np.array([2.0, 6.0, 24.0, 48.0])
    r = fit_time_course(t, 100.0 * 0.5 ** (t / 18.0))
    assert r["model"] == "washout"
    assert r["half_life_h"] == pytest.approx(18.0, rel=1e-6)
    # log-linear regression of ln C on t (scipy.stats.linregress) gives the same rate for exact data
    from scipy.stats import linregress

    assert r["rate_per_h"] == pytest.approx(-linregress(t, np.log(100.0 * 0.5 ** (t / 18.0))).slope, rel=1e-6)


def test_uptake_washout_recovered_and_peak_against_scipy():
    ke, ka = math.log(2) / 20.0, 0.5
    t = np.array([0.5, 1.0, 2.0, 4.0, 8.0, 24.0, 48.0, 72.0])
    r = fit_time_course(t, bateman(t, 50.0, ke, ka - ke))
    assert r["model"] == "uptake-washout"
    assert r["half_life_h"] == pytest.approx(20.0, rel=1e-4)
    peak = optimize.minimize_scalar(lambda x: -bateman(x, 50.0, ke, ka - ke), bounds=(0.0, 72.0), method="bounded",
                                    options={"xatol": 1e-9})
    assert r["t_peak_h"] == pytest.approx(peak.x, rel=1e-4)


def test_noisy_course_ci_covers_the_truth_most_of_the_time():
    """Coverage of the 95 % CI of the half-life over 40 seeded noisy courses (loose: 80 % or more)."""
    ke, ka = math.log(2) / 12.0, 1.0
    t = np.array([0.5, 1.0, 2.0, 4.0, 8.0, 16.0, 24.0, 48.0])
    rng = np.random.default_rng(11)
    covered = 0
    for _ in range(40):
        y = bateman(t, 100.0, ke, ka - ke) * (1 + 0.05 * rng.standard_normal(t.size))
        r = fit_time_course(t, y)
        covered += r["half_life_ci_low"] <= 12.0 <= r["half_life_ci_high"]
    assert covered >= 32


def test_rising_course_has_no_washout_and_table_has_one_row_per_course():
    r = fit_time_course([1.0, 2.0, 3.0], [1.0, 2.0, 3.0])
    assert r["model"] == "none" and "rises" in r["note"]
    m = pd.DataFrame({"animal": ["a"] * 3 + ["b"] * 3, "group": ["g"] * 6, "roi": ["t"] * 6, "component": ["x"] * 6,
                      "time_h": [1.0, 4.0, 24.0] * 2, "mean": [9.0, 7.0, 2.0, 8.0, 6.0, 1.0]})
    k, notes = fit_time_courses(m)
    assert list(k["animal"]) == ["a", "b"] and (k["model"] == "washout").all()


def test_a_flat_time_course_leaves_the_half_life_empty_with_its_lower_bound():
    # a value that barely falls (autofluorescence-like): the fitted rate is not distinguished from zero, so a
    # point half-life (noise-driven, thousands of hours) is not reported; its lower 95 % bound stays
    from probeplan.study.kinetics import RESOLVABLE_SPAN_FACTOR, fit_time_course

    t = np.array([1.0, 4.0, 8.0, 24.0, 48.0, 96.0])
    c = 100.0 + np.array([0.0, 0.6, -0.4, 0.3, -0.5, -0.2])
    r = fit_time_course(t, c)
    assert math.isnan(r["half_life_h"]) and math.isinf(r["half_life_ci_high"])
    assert 0 < r["half_life_ci_low"] < math.inf
    assert "at least" in r["note"] and "can measure" in r["note"]
    # a resolved washout keeps its numbers: 12 h half-life over 95 h (well inside 10x the span)
    r = fit_time_course(t, 10 * 0.5 ** (t / 12.0) + 1e-3 * np.sin(t))
    assert r["half_life_h"] == pytest.approx(12.0, rel=1e-3) and r["half_life_h"] < RESOLVABLE_SPAN_FACTOR * 95
