"""The demo study: its files come from the seeded generator, and the whole job recovers the ground truth."""

from __future__ import annotations

import numpy as np
import pytest

from probeplan.cli.main import main
from probeplan.demo import DEMO_FILES, demo_folder, generate_demo_files, run_demo
from probeplan.io.stacks import read_stack
from probeplan.unmixing.references import read_references_csv


def test_shipped_demo_files_are_the_generator_output(tmp_path):
    generate_demo_files(tmp_path)
    folder = demo_folder()
    for name in DEMO_FILES:
        if name.endswith(".csv"):
            a = read_references_csv(folder / name, normalise=None)
            b = read_references_csv(tmp_path / name, normalise=None)
            np.testing.assert_allclose(a.matrix, b.matrix, rtol=1e-12)
            assert a.component_names == b.component_names
        else:
            np.testing.assert_array_equal(read_stack(folder / name)[0], read_stack(tmp_path / name)[0], err_msg=name)


@pytest.fixture(scope="module")
def demo_result(tmp_path_factory):
    return run_demo(tmp_path_factory.mktemp("demo") / "out")


def test_demo_recovers_ground_truth_within_predicted_uncertainty(demo_result):
    # Gaussian statistics: about 95.4 % of estimates lie within ±2 standard errors and 68.3 % within ±1
    # (common practice); the Poisson counts here are large enough for the normal approximation.
    for row in demo_result.summary["recovery"]:
        assert 0.93 <= row["within_2_sigma"] <= 0.975, row
        assert 0.64 <= row["within_1_sigma"] <= 0.72, row


def test_demo_writes_report_and_passes_its_rules(demo_result):
    assert demo_result.rules_passed
    html = demo_result.report.read_text()
    assert "For research use only" in html and "cadmium" in html
    for name in ("roi_statistics.csv", "ground_truth.csv", "unmix_qc.csv", "checks.csv", "report.json"):
        assert (demo_result.report.parent / name).is_file(), name
    assert (demo_result.out_dir / "unmix" / "abundance.ome.tif").is_file()


def test_demo_roi_tbr_finds_the_targeted_probe(demo_result):
    import csv

    rows = list(csv.DictReader(open(demo_result.report.parent / "roi_statistics.csv")))
    tbr = {(r["roi"], r["component"]): float(r["tbr"]) for r in rows}
    # The scene puts probe A in the tumour and probe B in the node at the target concentration,
    # 4x the background uptake (the plan's uptake ratio).
    assert tbr[("tumour", "probe A (700)")] == pytest.approx(4.0, rel=0.1)
    assert tbr[("node", "probe B (780)")] == pytest.approx(4.0, rel=0.1)


def test_demo_command(tmp_path, capsys):
    assert main(["demo", "--out", str(tmp_path / "d")]) == 0
    out = capsys.readouterr().out
    assert "report:" in out and str(tmp_path / "d") in out
    assert main(["demo", "--out", str(tmp_path / "d" / "report" / "report.html")]) == 2


def test_references_from_the_channel_model_match_the_demo_references():
    # The demo's reference CSV was written from the channel model; predicting the references from the
    # plan (probeplan unmix --references-from-plan) must give the same probe columns.
    from probeplan.study.evaluate import plan_references
    from probeplan.study.plan import load_plan

    predicted = plan_references(load_plan(demo_folder() / "plan.toml"))
    shipped = read_references_csv(demo_folder() / "references.csv", normalise=None)
    k = len(predicted.component_names)
    assert predicted.component_names == shipped.component_names[:k]
    assert predicted.channel_names == shipped.channel_names
    np.testing.assert_allclose(predicted.matrix, shipped.matrix[:, :k], rtol=1e-9)


def test_unmix_command_with_references_from_plan(tmp_path, capsys):
    folder = demo_folder()
    out = tmp_path / "a.ome.tif"
    assert main(["unmix", str(folder / "stack.tif"), "--references-from-plan", str(folder / "plan.toml"),
                 "--dark", str(folder / "dark.tif"), "--out", str(out)]) == 0
    abundance, _ = read_stack(out)
    assert abundance.shape == (3, 128, 128)


def test_demo_study_tbr_and_half_life_against_the_known_truth(demo_result):
    """The demo study was generated with known concentrations (our own synthetic truth)."""
    from probeplan.demo import DEMO_STUDY_HALF_LIFE_H, DEMO_STUDY_TIMES_H, demo_study_truth
    from probeplan.study.runs import read_table_csv

    study = demo_result.out_dir / "study"
    m = read_table_csv(study / "measurements.csv")
    truth = demo_study_truth()
    both = m.merge(truth, on=["animal", "group", "time_h", "roi", "component"], suffixes=("", "_true"))
    assert len(m) == 6 * len(DEMO_STUDY_TIMES_H) * 4 * 4  # animals x times x ROIs x components (3 probes + autofl.)
    assert len(both) == 6 * len(DEMO_STUDY_TIMES_H) * 4 * 3
    tumour = both[(both["roi"] == "tumour") & (both["component"] == "probe A (700)")]
    z = (tumour["tbr"] - tumour["tbr_true"]) / tumour["tbr_se"]
    assert (z.abs() < 5).all() and np.allclose(tumour["tbr"], tumour["tbr_true"], rtol=0.05)
    k = read_table_csv(study / "kinetics.csv")
    kt = k[(k["roi"] == "tumour") & (k["component"] == "probe A (700)")]
    assert (kt["model"] == "uptake-washout").all()
    assert np.allclose(kt["half_life_h"], DEMO_STUDY_HALF_LIFE_H, rtol=0.05)
    g = read_table_csv(study / "groups.csv")
    assert set(g["group_a"]) | set(g["group_b"]) == {"control", "blocked"}
    html = (study / "report.html").read_text(encoding="utf-8")
    assert "For research use only" in html and html.count("data:image/png") >= 3
    assert "Demo study" in demo_result.report.read_text(encoding="utf-8")
    assert (demo_result.out_dir / "study_data" / "study.csv").is_file()
    assert any(p.name.endswith(".channel1.tif") for p in (demo_result.out_dir / "study_data").iterdir())


def test_demo_report_puts_predicted_beside_measured(demo_result):
    # the plan predicts SBR ~1.3 at 3 mm for probe A (raw channel) and the images measure TBR ~3.8 (unmixed
    # abundances, predicted as the uptake ratio 4): the report names each quantity
    rows = {(r["component"], r["quantity"]): r for r in demo_result.summary["closure"]}
    assert rows[("probe A (700)", "sbr")]["predicted"] == pytest.approx(1.3, abs=0.05)
    assert rows[("probe A (700)", "tbr")]["measured"] == pytest.approx(3.8, abs=0.15)
    html = demo_result.report.read_text(encoding="utf-8")
    assert "Predicted beside measured" in html and "they measure different things" in html
