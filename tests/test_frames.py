"""Results that are tables come back as pandas DataFrames with the units in the column names,
and CSV files are written with pandas (read back here with pandas.read_csv, an outside reader)."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from probeplan.demo import demo_folder
from probeplan.design.search import design, probe_series
from probeplan.io.atomic import write_csv_atomic
from probeplan.model import optics
from probeplan.study.evaluate import evaluate_plan
from probeplan.study.plan import load_plan


def test_design_result_frame_has_one_row_per_candidate_in_rank_order():
    probes = probe_series("CdTe", 610.0, 730.0, 40.0)
    filters = [optics.parse_filter(f) for f in ("610/20", "650/20", "690/20", "730/20")]
    res = design("soft tissue", probes, filters, sources=optics.Laser(532.0, 1.0),
                 camera=optics.camera("si-deep-depletion"), lens=optics.Lens(2.0, 0.1), k=2, top=4,
                 depth_mm=2.0, exposure_s=0.1, concentration_uM=0.1)
    frame = res.to_frame()
    assert len(frame) == len(res.candidates) == 4
    assert frame["rank"].tolist() == [c.rank for c in res.candidates]
    assert frame["worst_snr"].is_monotonic_decreasing
    best = res.candidates[0]
    assert frame.loc[0, "probes"] == " + ".join(best.probes)
    assert frame.loc[0, "worst_snr"] == pytest.approx(best.worst_snr)
    assert {"irradiance_mw_per_cm2", "source_nm", "depth_mm", "exposure_s", "concentration_uM"} <= set(frame.columns)


def test_plan_rule_checks_frame_matches_the_checks():
    ev = evaluate_plan(load_plan(demo_folder() / "plan.toml"))
    frame = ev.checks_frame()
    assert len(frame) == len(ev.checks)
    assert frame["passed"].tolist() == [c.passed for c in ev.checks]
    assert frame["rule"].tolist() == [c.rule_id for c in ev.checks]
    # every evaluation table reads as a DataFrame too
    for table in ev.tables:
        assert list(table.frame().columns) == table.cols()


def test_csv_written_with_pandas_reads_back_with_pandas(tmp_path):
    rows = [{"animal": "m1", "time_h": 24, "mean": 0.1 + 0.2, "se": None, "tbr": math.nan},
            {"animal": "m2", "time_h": 48, "mean": np.float64(2.5e-7), "se": 0.01, "tbr": 3.0, "extra": "dropped"}]
    path = write_csv_atomic(tmp_path / "m.csv", rows, ["animal", "time_h", "mean", "se", "tbr"])
    back = pd.read_csv(path)
    assert back.columns.tolist() == ["animal", "time_h", "mean", "se", "tbr"]
    assert back["time_h"].tolist() == [24, 48]  # whole numbers stay whole
    assert back.loc[0, "mean"] == 0.1 + 0.2  # full precision round trip
    assert math.isnan(back.loc[0, "se"]) and math.isnan(back.loc[0, "tbr"])
    assert back.loc[1, "mean"] == 2.5e-7


def test_roi_statistics_is_a_frame_with_numeric_columns():
    from probeplan.unmixing.roi import ROI_COLUMNS, parse_rectangle, roi_statistics

    a = np.ones((2, 6, 6))
    a[:, :3, :3] = [[[4.0]], [[2.0]]]
    table = roi_statistics(a, [parse_rectangle("t:0,0,3,3"), parse_rectangle("background:3,3,6,6")], ["p", "q"])
    assert isinstance(table, pd.DataFrame) and tuple(table.columns) == ROI_COLUMNS
    assert table["mean"].dtype.kind == "f" and table["n_pixels"].dtype.kind == "i"
    t = table.set_index(["roi", "component"])
    assert t.loc[("t", "p"), "tbr"] == 4.0 and t.loc[("t", "q"), "tbr"] == 2.0  # mean over the background's mean
