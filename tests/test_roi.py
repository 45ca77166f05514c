"""ROI statistics: mean, sample SD and target-to-background ratio (checked against numpy)."""

import numpy as np
import pytest

from probeplan.errors import InputError
from probeplan.unmixing.roi import RoiAccumulator, parse_rectangle, roi_statistics, rois_from_labels, write_roi_csv


def test_rectangle_parsing():
    assert parse_rectangle(" tumour : 1, 2, 3, 4 ").rect == (1, 2, 3, 4)
    for bad in ("tumour", "t:1,2,3", "t:3,0,1,5", "t:-1,0,2,2"):
        with pytest.raises(InputError, match="--roi"):
            parse_rectangle(bad)
    with pytest.raises(InputError, match="past the image"):
        parse_rectangle("t:0,0,10,10", shape=(5, 5))


def test_statistics_match_numpy_and_blocks_combine(tmp_path):
    rng = np.random.default_rng(0)
    a = rng.normal(10, 2, (2, 3, 20, 16))  # K, Z, Y, X
    a[0, 1, 5, 5] = np.nan
    rois = [parse_rectangle("t:2,3,10,12"), parse_rectangle("background:10,10,16,20")]
    rows = roi_statistics(a, rois, ["p", "q"])
    sel = a[:, :, 3:12, 2:10].reshape(2, -1)
    ok = np.isfinite(sel).all(axis=0)
    # outside check: numpy mean and sample standard deviation (ddof=1)
    assert rows[0]["mean"] == pytest.approx(sel[0, ok].mean(), rel=1e-12)
    assert rows[0]["sd"] == pytest.approx(sel[0, ok].std(ddof=1), rel=1e-12)
    assert rows[0]["n_nan"] == 1 and rows[0]["n_pixels"] == ok.sum()
    bgm = a[1, :, 10:20, 10:16].mean()
    assert rows[1]["tbr"] == pytest.approx(sel[1, ok].mean() / bgm, rel=1e-12)
    acc = RoiAccumulator(rois, ["p", "q"])
    for r0 in range(0, 20, 7):
        acc.add(a[..., r0 : r0 + 7, :], r0)
    for x, y in zip(acc.rows(), rows, strict=True):
        for key in ("mean", "sd", "tbr"):
            assert x[key] == pytest.approx(y[key], rel=1e-10)
    out = write_roi_csv(tmp_path / "roi.csv", rows)
    assert out.read_text().splitlines()[0] == "roi,component,n_pixels,n_nan,mean,sd,tbr"


def test_label_rois():
    labels = np.zeros((4, 4), np.uint16)
    labels[:2, :2] = 3
    labels[2:, 2:] = 7
    rois = rois_from_labels(labels)
    assert [r.name for r in rois] == ["label_3", "label_7"]
    a = np.arange(16.0).reshape(1, 4, 4)
    rows = roi_statistics(a, rois, ["p"], labels=labels, background="label_7")
    assert rows[0]["mean"] == pytest.approx(np.mean([0, 1, 4, 5]))
    assert rows[0]["tbr"] == pytest.approx(2.5 / 12.5)
    with pytest.raises(InputError, match="integer"):
        rois_from_labels(np.zeros((2, 2)))
