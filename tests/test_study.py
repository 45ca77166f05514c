"""The study runner: measurements against a synthetic study's known truth, bad input, resuming.

The synthetic study here is our own: two probes seen in three channels, a square "tumour"
ROI and a "background" ROI, Poisson counts, two groups of animals at three time points.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import tifffile

from probeplan.cli.main import main
from probeplan.io.stacks import write_stack
from probeplan.study.runs import read_table_csv, run_study

M = np.array([[0.6, 0.1], [0.3, 0.3], [0.1, 0.6]])
CHANNELS = ["ch650", "ch700", "ch750"]
BACKGROUND = 200.0  # abundance (counts) of each probe outside the tumour
ROIS = ["tumour:4,4,12,12", "background:14,0,24,24"]
#: Tumour abundance of probe A per group and time (probe B stays at BACKGROUND everywhere).
TUMOUR = {("ctrl", 1.0): 600.0, ("ctrl", 24.0): 400.0, ("ctrl", 48.0): 300.0,
          ("treated", 1.0): 1200.0, ("treated", 24.0): 800.0, ("treated", 48.0): 500.0}


def _truth_stack(amount, rng):
    ab = np.full((2, 24, 24), BACKGROUND)
    ab[0, 4:12, 4:12] = amount
    return rng.poisson(np.einsum("ck,kyx->cyx", M, ab)).astype(np.uint16)


def make_study(folder, *, animals=("ctrl", "ctrl", "ctrl", "treated", "treated", "treated"), seed=3,
               per_channel=(0,)):
    """Write references, stacks and STUDY.csv; animals with an index in ``per_channel`` get one file per channel."""
    rng = np.random.default_rng(seed)
    (folder / "refs.csv").write_text(
        "channel,dotA,dotB\n" + "".join(f"{c},{M[i, 0]},{M[i, 1]}\n" for i, c in enumerate(CHANNELS)))
    rows = ["animal,group,time_h,file,channel"]
    for i, group in enumerate(animals):
        name = f"m{i + 1}"
        for t in (1.0, 24.0, 48.0):
            y = _truth_stack(TUMOUR[(group, t)], rng)
            if i in per_channel:
                for c, ch in enumerate(CHANNELS):
                    f = f"{name}.t{t:g}.{ch}.tif"
                    tifffile.imwrite(folder / f, y[c])
                    rows.append(f"{name},{group},{t:g},{f},{ch}")
            else:
                f = f"{name}.t{t:g}.tif"
                write_stack(folder / f, y, channel_names=CHANNELS, dtype=np.uint16)
                rows.append(f"{name},{group},{t:g},{f},")
    (folder / "study.csv").write_text("\n".join(rows) + "\n")
    return folder / "study.csv", folder / "refs.csv"


@pytest.fixture(scope="module")
def study_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("study")
    csv, refs = make_study(folder)
    out = folder / "out"
    code = main(["study", str(csv), "--references", str(refs), "--out", str(out),
                 *sum((["--roi", r] for r in ROIS), []), "--json"])
    assert code == 0
    return folder, csv, refs, out


def test_tables_have_the_interface_columns(study_run):
    _, _, _, out = study_run
    m = read_table_csv(out / "measurements.csv")
    g = read_table_csv(out / "groups.csv")
    k = read_table_csv(out / "kinetics.csv")
    assert list(m.columns[:8]) == ["animal", "group", "time_h", "roi", "component", "mean", "se", "tbr"]
    assert list(g.columns[:14]) == ["time_h", "roi", "component", "quantity", "group_a", "group_b", "n_a", "n_b",
                                    "difference", "ci_low", "ci_high", "p_welch", "p_rank", "p_adjusted"]
    assert list(k.columns[:6]) == ["animal", "roi", "component", "model", "half_life_h", "t_peak_h"]
    assert len(m) == 6 * 3 * 2 * 2  # animals x times x ROIs x components
    assert set(g["quantity"]) == {"mean", "tbr"}
    assert (out / "report.html").read_text(encoding="utf-8").count("data:image/png") >= 3
    assert "For research use only" in (out / "report.html").read_text(encoding="utf-8")
    assert "least squares" in (out / "measurements.csv").read_text(encoding="utf-8").splitlines()[1]


def test_tbr_matches_the_known_truth(study_run):
    """TBR of the synthetic study against the abundances it was made from (our own synthetic truth)."""
    _, _, _, out = study_run
    m = read_table_csv(out / "measurements.csv")
    a = m[(m["roi"] == "tumour") & (m["component"] == "dotA")]
    truth = np.array([TUMOUR[(g, t)] / BACKGROUND for g, t in zip(a["group"], a["time_h"], strict=True)])
    z = (a["tbr"].to_numpy() - truth) / a["tbr_se"].to_numpy()
    assert np.all(np.abs(z) < 4.5)
    assert np.allclose(a["tbr"], truth, rtol=0.05)
    # probe B is at background in the tumour: TBR 1 (no clamp bias)
    b = m[(m["roi"] == "tumour") & (m["component"] == "dotB")]
    assert np.allclose(b["tbr"], 1.0, atol=0.1)


def test_one_file_per_channel_gives_the_same_as_a_stack(tmp_path):
    """The same pixels as per-channel files or as one stack give identical measurements."""
    csv, refs = make_study(tmp_path, animals=("ctrl", "ctrl"), per_channel=(0,), seed=9)
    csv2 = tmp_path / "s2"
    csv2.mkdir()
    make_study(csv2, animals=("ctrl", "ctrl"), per_channel=(), seed=9)
    r1 = run_study(csv, refs, rois=ROIS)
    r2 = run_study(csv2 / "study.csv", csv2 / "refs.csv", rois=ROIS)
    cols = ["animal", "time_h", "roi", "component", "mean", "se", "tbr"]
    pd.testing.assert_frame_equal(r1.measurements[cols], r2.measurements[cols])
    assert set(r1.measurements["channel_match"]) == {"by name"}


def test_roi_mean_is_not_biased_by_the_clamp(tmp_path):
    """An absent probe: the ROI mean is ~0 within its standard error, while the NNLS map's mean is positive.

    E[max(0, Z)] = sigma / sqrt(2 pi) for Gaussian Z of mean 0 (a property of the normal distribution).
    """
    from probeplan.io.stacks import read_stack

    rng = np.random.default_rng(5)
    ab = np.zeros((2, 40, 40))
    ab[1] = 400.0  # probe A absent everywhere
    y = rng.poisson(np.einsum("ck,kyx->cyx", M, ab)).astype(np.uint16)
    write_stack(tmp_path / "a.tif", y, channel_names=CHANNELS, dtype=np.uint16)
    (tmp_path / "refs.csv").write_text(
        "channel,dotA,dotB\n" + "".join(f"{c},{M[i, 0]},{M[i, 1]}\n" for i, c in enumerate(CHANNELS)))
    (tmp_path / "s.csv").write_text("animal,group,time_h,file\nm1,g,1,a.tif\n")
    r = run_study(tmp_path / "s.csv", tmp_path / "refs.csv", out_dir=tmp_path / "out", rois=["background:0,0,40,40"])
    row = r.measurements[(r.measurements["component"] == "dotA")].iloc[0]
    assert abs(row["mean"]) < 3 * row["se"]
    nnls_map, _ = read_stack(tmp_path / "out" / "acquisitions" / "m1_1h_abundance.ome.tif")
    clamped = float(nnls_map[0].mean())
    assert clamped > 10 * row["se"]
    sigma = row["sd"]
    assert clamped == pytest.approx(sigma / np.sqrt(2 * np.pi), rel=0.25)


def test_rerun_resumes_and_changed_input_is_redone(tmp_path):
    csv, refs = make_study(tmp_path, animals=("ctrl", "treated"), per_channel=())
    out = tmp_path / "out"
    r1 = run_study(csv, refs, out_dir=out, rois=ROIS)
    assert r1.skipped == []
    r2 = run_study(csv, refs, out_dir=out, rois=ROIS)
    assert len(r2.skipped) == 6
    pd.testing.assert_frame_equal(r1.measurements, r2.measurements, check_dtype=False)
    write_stack(tmp_path / "m1.t24.tif", _truth_stack(999.0, np.random.default_rng(0)), channel_names=CHANNELS,
                dtype=np.uint16)
    r3 = run_study(csv, refs, out_dir=out, rois=ROIS)
    assert len(r3.skipped) == 5 and "m1_24h" not in r3.skipped


def test_group_of_one_animal_is_not_compared_but_measured(tmp_path, capsys):
    csv, refs = make_study(tmp_path, animals=("ctrl", "ctrl", "treated"), per_channel=())
    out = tmp_path / "out"
    assert main(["study", str(csv), "--references", str(refs), "--out", str(out),
                 *sum((["--roi", r] for r in ROIS), [])]) == 0
    g = read_table_csv(out / "groups.csv")
    assert g["p_welch"].isna().all() and g["note"].str.contains("1 animal").all()
    assert "comparison(s) refused" in capsys.readouterr().out
    assert read_table_csv(out / "measurements.csv")["animal"].nunique() == 3


def _run_cli(args):
    return main(["study", *[str(a) for a in args]])


@pytest.mark.parametrize("case", ["missing file", "duplicate", "unknown column", "channel names", "one group twice"])
def test_bad_study_table_exit_2_nothing_written(tmp_path, capsys, case):
    csv, refs = make_study(tmp_path, animals=("ctrl", "treated"), per_channel=(0,))
    text = csv.read_text()
    lines = text.splitlines()
    if case == "missing file":
        lines[2] = lines[2].replace(".tif", "_gone.tif")
        expect = ":3: file"
    elif case == "duplicate":
        lines.append(lines[2])
        expect = "listed again"
    elif case == "unknown column":
        lines = [lines[0] + ",dose"] + [line + ",1" for line in lines[1:]]
        expect = "unknown column"
    elif case == "channel names":
        lines = [line.replace("ch700", "ch701") for line in lines]
        expect = "ch701"
    else:
        lines[-1] = lines[-1].replace("m2,", "m1,")
        expect = "is in group 'treated' here but in 'ctrl'"
    csv.write_text("\n".join(lines) + "\n")
    out = tmp_path / "out"
    before = {p: p.read_bytes() for p in tmp_path.iterdir() if p.is_file()}
    assert _run_cli([csv, "--references", refs, "--out", out, "--roi", ROIS[0], "--roi", ROIS[1]]) == 2
    err = capsys.readouterr().err
    assert expect in err and len(err.strip().splitlines()) == 1
    assert not out.exists()
    assert before == {p: p.read_bytes() for p in tmp_path.iterdir() if p.is_file()}


def test_dotted_names_do_not_collide(tmp_path):
    """mouse1.day1.tif and mouse1.day3.tif are two acquisitions with their own outputs."""
    rng = np.random.default_rng(2)
    for f in ("mouse1.day1.tif", "mouse1.day3.tif"):
        write_stack(tmp_path / f, _truth_stack(500.0, rng), channel_names=CHANNELS, dtype=np.uint16)
    (tmp_path / "refs.csv").write_text(
        "channel,dotA,dotB\n" + "".join(f"{c},{M[i, 0]},{M[i, 1]}\n" for i, c in enumerate(CHANNELS)))
    (tmp_path / "s.csv").write_text("animal,group,time_h,file\nmouse1,g,24,mouse1.day1.tif\nmouse1,g,72,mouse1.day3.tif\n")
    r = run_study(tmp_path / "s.csv", tmp_path / "refs.csv", out_dir=tmp_path / "out", rois=ROIS)
    assert sorted(r.measurements["acquisition"].unique()) == ["mouse1_24h", "mouse1_72h"]
    assert (tmp_path / "out" / "acquisitions" / "mouse1_72h_abundance.ome.tif").is_file()


def test_shaped_rois_roi_file_reuse_and_automatic_roi(tmp_path):
    csv, refs = make_study(tmp_path, animals=("ctrl", "treated"), per_channel=())
    out = tmp_path / "out"
    r1 = run_study(csv, refs, out_dir=out, rois=["tumour:polygon:4,4,12,4,12,12,4,12", "background:14,0,24,24"],
                   auto_rois=["found=dotA"])
    m = r1.measurements
    assert set(m["roi"]) == {"tumour", "background", "found"}
    # the polygon traces the tumour square: the same pixels as the rectangle
    r0 = run_study(csv, refs, rois=ROIS)
    cols = ["animal", "time_h", "roi", "component", "mean", "tbr"]
    a = m[m["roi"] != "found"][cols].reset_index(drop=True)
    pd.testing.assert_frame_equal(a, r0.measurements[cols].reset_index(drop=True))
    found = m[(m["roi"] == "found") & (m["component"] == "dotA")]
    assert (found["n_pixels"] >= 64).all()  # Otsu finds the tumour square (8 x 8 pixels)
    assert (out / "rois.json").is_file() and (out / "acquisitions" / "m1_1h_auto_rois.json").is_file()
    r2 = run_study(csv, refs, out_dir=tmp_path / "again", roi_file=out / "rois.json")
    pd.testing.assert_frame_equal(r2.measurements[cols].reset_index(drop=True), a)
