"""The study view's reading of a study's result tables, and its time-course figure.

Group means and standard errors in the figure are checked against scipy.stats (``sem``);
the tables are test data of our own.
"""

from __future__ import annotations

import numpy as np
import pytest

from probeplan.errors import InputError
from probeplan.study.results import read_groups, read_kinetics, read_measurements


def measurements_csv() -> str:
    rng = np.random.default_rng(11)
    lines = ["animal,group,time_h,roi,component,mean,se,tbr"]
    for group, level in (("vehicle", 1.5), ("treated", 2.5)):
        for a in range(3):
            for t in (1.0, 24.0, 48.0):
                tbr = level + 0.3 * rng.standard_normal() - 0.005 * t
                lines.append(f"{group}-{a},{group},{t},tumour,dot A,{100 * tbr:.3f},2.0,{tbr:.4f}")
    return "\n".join(lines) + "\n"


def test_measurements_are_read_and_checked(tmp_path):
    df = read_measurements(measurements_csv().encode(), name="measurements.csv")
    assert len(df) == 18 and df["time_h"].dtype == float
    with pytest.raises(InputError, match="measurements.csv: has no column 'tbr'"):
        read_measurements(measurements_csv().replace(",tbr", ",ratio").encode(), name="measurements.csv")
    bad = measurements_csv().replace(",24.0,", ",a day,", 1)
    with pytest.raises(InputError, match=r"m.csv:\d+: time_h = 'a day' is not a number"):
        read_measurements(bad.encode(), name="m.csv")
    with pytest.raises(InputError, match="does not exist"):
        read_measurements(tmp_path / "missing.csv")
    g = "time_h,roi,component,quantity,group_a,group_b,n_a,n_b,difference,ci_low,ci_high,p_welch,p_rank,p_adjusted\n"
    assert len(read_groups((g + "1,tumour,dot A,tbr,treated,vehicle,3,3,1.0,0.2,1.8,0.02,0.1,0.06\n").encode())) == 1
    k = "animal,roi,component,model,half_life_h,t_peak_h\nv-0,tumour,dot A,one-phase,20.5,\n"
    assert np.isnan(read_kinetics(k.encode())["t_peak_h"].iloc[0])


def test_time_course_figure_shows_each_animal_and_the_group_mean_and_se():
    from scipy.stats import sem

    from probeplan.report.study import group_time_course_figure

    df = read_measurements(measurements_csv().encode())
    fig = group_time_course_figure(df, roi="tumour", component="dot A", quantity="tbr")
    ax = fig.axes[0]
    assert ax.get_yscale() == "linear" and ax.get_xlabel() == "time after injection (h)"
    animals = [ln for ln in ax.lines if ln.get_linewidth() < 1.0 and ln.get_marker() == "o"]
    assert len(animals) == 6  # one thin line per animal
    for container, group in zip(ax.containers, ("treated", "vehicle"), strict=True):
        line, _caps, (bars,) = container
        g = df[df["group"] == group].sort_values("time_h")
        expected = g.groupby("time_h")["tbr"].mean().to_numpy()
        assert np.allclose(line.get_ydata(), expected)
        spans = np.array([seg[1, 1] - seg[0, 1] for seg in bars.get_segments()]) / 2
        assert np.allclose(spans, g.groupby("time_h")["tbr"].apply(lambda v: sem(v)).to_numpy())
