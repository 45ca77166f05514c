"""Phantom calibration: weighted line fit against statsmodels and scipy, LOD rule, bad phantoms, the command."""

import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import tifffile
from scipy.optimize import curve_fit

from probeplan.cli.main import main
from probeplan.errors import InputError, ModelValidityWarning
from probeplan.study.calibration import (
    CALIBRATION_COLUMNS,
    apply_calibration,
    calibrate_points,
    read_calibration_csv,
    read_phantom_csv,
    weighted_line_fit,
)

M = np.array([[800.0, 50.0], [300.0, 400.0], [40.0, 900.0]])  # counts per µM, 3 channels x 2 probes
CH = ["c1", "c2", "c3"]
LEVELS = [0.0, 0.0, 0.25, 0.5, 1.0, 2.0]
SLOPE = {"dotA": 1.0, "dotB": 1.0}  # abundance units per µM: the references are in counts per µM


def test_weighted_fit_matches_statsmodels_and_scipy():
    rng = np.random.default_rng(3)
    c = np.array([0, 0, 0.5, 1, 2, 4, 8.0])
    se = 0.5 + 0.2 * c
    y = 5.0 + 12.0 * c + rng.normal(0, se)
    fit = weighted_line_fit(c, y, se)
    ref = sm.WLS(y, sm.add_constant(c), weights=1 / se**2).fit()  # statsmodels, reference implementation
    assert [fit["intercept"], fit["slope"]] == pytest.approx(ref.params, rel=1e-10)
    assert [fit["intercept_se"], fit["slope_se"]] == pytest.approx(ref.bse, rel=1e-8)
    assert fit["cov_intercept_slope"] == pytest.approx(ref.cov_params()[0, 1], rel=1e-8)
    assert fit["r2"] == pytest.approx(ref.rsquared, rel=1e-10)
    popt, pcov = curve_fit(lambda x, b, m: b + m * x, c, y, sigma=se, absolute_sigma=False)  # scipy
    assert [fit["intercept"], fit["slope"]] == pytest.approx(popt, rel=1e-7)
    assert fit["slope_se"] == pytest.approx(np.sqrt(pcov[1, 1]), rel=1e-6)


def _points(levels=LEVELS, slope=10.0, blank_sd=2.0, comp="A"):
    rows = [{"component": comp, "concentration_uM": c, "mean": 3.0 + slope * c + (0.5 if i == 0 else 0.0),
             "se": 0.3, "pixel_sd": blank_sd, "line": i + 2} for i, c in enumerate(levels)]
    return pd.DataFrame(rows)


def test_lod_is_three_sigma_of_blank_wells_over_slope():
    cal = calibrate_points(_points(), depth_mm=2.0, tissue="1 % Intralipid")
    row = cal.table.iloc[0]
    blank_sd = np.std([3.5, 3.0], ddof=1)  # two blank wells: the SD of their means (IUPAC 3 sigma rule)
    assert row["lod_uM"] == pytest.approx(3 * blank_sd / row["slope_counts_per_uM"])
    assert row["loq_uM"] == pytest.approx(10 * blank_sd / row["slope_counts_per_uM"])  # ICH Q2(R1)
    assert (row["range_low_uM"], row["range_high_uM"]) == (0.25, 2.0)
    assert row["phantom_depth_mm"] == 2.0 and row["phantom_tissue"] == "1 % Intralipid"
    assert list(cal.table.columns)[:7] == list(CALIBRATION_COLUMNS[:7])
    one_blank = calibrate_points(_points(levels=[0.0, 0.5, 1.0, 2.0], blank_sd=4.0), depth_mm=0.0)
    assert one_blank.table.iloc[0]["lod_uM"] == pytest.approx(3 * 4.0 / one_blank.table.iloc[0]["slope_counts_per_uM"])
    assert "single-pixel" in one_blank.notes[0]


@pytest.mark.parametrize("levels, means, match", [
    ([0.0, 1.0], None, "at least three"),
    ([0.5, 1.0, 2.0], None, "no blank"),
    ([0.0, 1.0, 2.0, 4.0], [1.0, 10.0, 8.0, 30.0], "not monotonic"),
])
def test_bad_phantoms_name_the_row(levels, means, match):
    pts = _points(levels=levels)
    if means is not None:
        pts["mean"] = means
    with pytest.raises(InputError, match=match) as exc:
        calibrate_points(pts, depth_mm=0.0, where="phantom.csv")
    assert str(exc.value).startswith("phantom.csv:")
    if means is not None:
        assert str(exc.value).startswith("phantom.csv:4")  # the 2 µM row (CSV line 4) breaks monotony


def test_apply_calibration_propagates_and_flags():
    cal = calibrate_points(_points(), depth_mm=3.0)
    r = cal.table.iloc[0]
    a = np.array([[r["intercept_counts"] + r["slope_counts_per_uM"] * v for v in (0.0, 0.5, 5.0, np.nan)]])
    with pytest.warns(ModelValidityWarning, match="applied at 6 mm"):
        out = apply_calibration(a, np.full_like(a, 0.1), ["A"], cal, depth_mm=6.0)
    assert out["concentration_uM"][0, :3] == pytest.approx([0.0, 0.5, 5.0])
    assert out["flags"][0].tolist() == [1, 0, 3, 255]
    # first-order propagation: at c = 0 the variance is (SE_a^2 + var(b)) / m^2
    assert out["se_uM"][0, 0] == pytest.approx(np.hypot(0.1, r["intercept_se"]) / r["slope_counts_per_uM"])
    with pytest.warns(ModelValidityWarning, match="without the target's depth"):
        apply_calibration(a, a, ["A"], cal)


def _phantom_files(folder, rng, *, bad_component=False):
    """Two plates (one per probe), wells in a row, Poisson counts from M with a 20-count background."""
    rows = []
    for k, name in enumerate(["dotA", "dotB"]):
        conc = np.zeros((2, 20, 20 * len(LEVELS)))
        for j, c in enumerate(LEVELS):
            conc[k, 4:16, 20 * j + 4: 20 * j + 16] = c
        data = rng.poisson(np.einsum("ck,kyx->cyx", M, conc) + 20.0).astype(np.float32)
        f = folder / f"plate_{name}.ome.tif"
        tifffile.imwrite(f, data, ome=True, photometric="minisblack", metadata={"axes": "CYX", "Channel": {"Name": CH}})
        for j, c in enumerate(LEVELS):
            comp = "dotZ" if bad_component and j == 3 else name
            rows.append(f'{f.name},{comp},{c},"{20 * j + 5},5,{20 * j + 15},15"')
    p = folder / "phantom.csv"
    p.write_text("file,component,concentration_uM,roi\n" + "\n".join(rows) + "\n")
    ref = folder / "ref.csv"
    ref.write_text("channel,dotA,dotB,background\n" + "\n".join(
        f"{c},{M[i, 0]},{M[i, 1]},20" for i, c in enumerate(CH)) + "\n")
    return p, ref


def test_calibrate_command_recovers_slope(tmp_path, capsys):
    p, ref = _phantom_files(tmp_path, np.random.default_rng(0))
    out = tmp_path / "cal"
    assert main(["calibrate", str(p), "--references", str(ref), "--out", str(out), "--depth-mm", "0",
                 "--tissue", "water", "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert "research use" in report["caution"].lower()
    cal = read_calibration_csv(out / "calibration.csv")
    # references read with sum-normalised columns: abundance per µM = the column sum of M (known by construction)
    for k, name in enumerate(["dotA", "dotB"]):
        row = cal.row(name)
        assert row["slope_counts_per_uM"] == pytest.approx(M[:, k].sum(), rel=0.02)
        assert abs(row["intercept_counts"]) < 0.02 * M[:, k].sum()
        assert row["r2"] > 0.999
        assert 0 < row["lod_uM"] < 0.25
    assert (out / "calibration.png").stat().st_size > 1000
    pts = pd.read_csv(out / "calibration_points.csv")
    assert len(pts) == 2 * len(LEVELS)


def test_calibrate_command_refuses_unknown_component(tmp_path, capsys):
    p, ref = _phantom_files(tmp_path, np.random.default_rng(1), bad_component=True)
    out = tmp_path / "cal"
    assert main(["calibrate", str(p), "--references", str(ref), "--out", str(out), "--depth-mm", "0"]) == 2
    err = capsys.readouterr().err
    assert "phantom.csv:5" in err and "dotZ" in err and "references" in err
    assert not out.exists()


def test_read_phantom_csv_bad_rows(tmp_path):
    p = tmp_path / "ph.csv"
    p.write_text('file,component,concentration_uM,roi\na.tif,A,-1,"0,0,2,2"\n')
    with pytest.raises(InputError, match=r"ph.csv:2: concentration_uM"):
        read_phantom_csv(p)
    p.write_text('file,component,concentration_uM,roi\na.tif,A,1,"0,0,2"\n')
    with pytest.raises(InputError, match=r"ph.csv:2: roi"):
        read_phantom_csv(p)
    p.write_text("file,component,roi\n")
    with pytest.raises(InputError, match="missing column"):
        read_phantom_csv(p)


def test_unmix_with_calibration_writes_uM_maps(tmp_path, capsys):
    from probeplan.io.stacks import read_stack

    p, ref = _phantom_files(tmp_path, np.random.default_rng(2))
    cal_dir = tmp_path / "cal"
    assert main(["calibrate", str(p), "--references", str(ref), "--out", str(cal_dir), "--depth-mm", "1"]) == 0
    capsys.readouterr()
    # a sample: dotA at 1.5 µM in a square, dotB at 0.1 µM everywhere
    rng = np.random.default_rng(5)
    conc = np.zeros((2, 30, 30))
    conc[0, 5:15, 5:15] = 1.5
    conc[1] = 0.1
    data = rng.poisson(np.einsum("ck,kyx->cyx", M, conc) + 20.0).astype(np.float32)
    s = tmp_path / "sample.ome.tif"
    tifffile.imwrite(s, data, ome=True, photometric="minisblack", metadata={"axes": "CYX", "Channel": {"Name": CH}})
    out = tmp_path / "res" / "a.ome.tif"
    out.parent.mkdir()
    assert main(["unmix", str(s), "--references", str(ref), "--out", str(out), "--calibration",
                 str(cal_dir / "calibration.csv"), "--depth-mm", "4", "--roi", "tumour:5,5,15,15",
                 "--roi", "background:20,20,30,30", "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["unit"] == "uM"
    assert any("applied at 4 mm" in n for n in report["notes"])  # phantom at 1 mm: the depth warning
    conc_map, info = read_stack(tmp_path / "res" / "a_uM.ome.tif")
    assert info.channel_names == ("dotA [uM]", "dotB [uM]")
    assert np.nanmean(conc_map[0, 5:15, 5:15]) == pytest.approx(1.5, rel=0.05)
    rows = pd.read_csv(tmp_path / "res" / "a_uM_roi.csv")
    assert set(rows["unit"]) == {"uM"}
    tumour_a = rows[(rows["roi"] == "tumour") & (rows["component"] == "dotA")].iloc[0]
    assert tumour_a["flag"] == "in_range" and tumour_a["mean"] == pytest.approx(1.5, rel=0.05)
    bg_b = rows[(rows["roi"] == "background") & (rows["component"] == "dotB")].iloc[0]
    assert bg_b["flag"] in ("below_range", "below_lod")  # 0.1 µM is under the lowest standard (0.25 µM)
    flags, _ = read_stack(tmp_path / "res" / "a_uM_flags.ome.tif")
    assert flags.dtype == np.uint8
    se, _ = read_stack(tmp_path / "res" / "a_uM_se.ome.tif")
    assert np.all(se[np.isfinite(se)] > 0)


def test_unmix_refuses_a_bad_calibration_before_writing(tmp_path, capsys):
    p, ref = _phantom_files(tmp_path, np.random.default_rng(4))
    bad = tmp_path / "calibration.csv"
    bad.write_text("component,slope_counts_per_uM\ndotA,3\n")
    out = tmp_path / "res" / "a.ome.tif"
    out.parent.mkdir()
    stack = tmp_path / "plate_dotA.ome.tif"
    assert main(["unmix", str(stack), "--references", str(ref), "--out", str(out), "--calibration", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "calibration.csv" in err and "missing column" in err
    assert list(out.parent.iterdir()) == []
    other = tmp_path / "other.csv"
    other.write_text(",".join(CALIBRATION_COLUMNS[:7]) + "\ndotQ,3,0,0.1,1,0.2,2\n")
    assert main(["unmix", str(stack), "--references", str(ref), "--out", str(out), "--calibration", str(other)]) == 2
    assert "none of the references' components" in capsys.readouterr().err
