"""Command-line tests of ``probeplan design`` (exit codes, JSON output, agreement with the library)."""

from __future__ import annotations

import json

import pytest

from probeplan.model import dots
from probeplan.model import optics
from probeplan.cli.main import main
from probeplan.design.search import design

BASE = ["design", "--candidate-probe", "CdTe:660-720:20", "--candidate-probe", "CdTe:690",
        "--candidate-filter", "660/20", "--candidate-filter", "700/40", "--filter-grid", "680:740:30:20",
        "--excitation-nm", "532", "--k", "2", "--depth-mm", "2", "--top", "3"]


def test_json_exit_0_and_same_winner_as_the_library(capsys):
    assert main(BASE + ["--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["caution"].startswith("For research use only")
    assert out["candidate_probes"] == ["CdTe 660 nm", "CdTe 680 nm", "CdTe 700 nm", "CdTe 720 nm", "CdTe 690 nm"]
    assert out["candidate_filters"] == ["660/20", "700/40", "680/20", "710/20", "740/20"]
    counts = out["counts"]
    assert counts["total_combinations"] == 10 * 10
    assert counts["evaluated"] + counts["pruned"] == counts["total_combinations"]
    assert len(out["candidates"]) == 3
    # the same search through the library (the command's defaults: 0.05 s, 0.01 µM, f/2, 0.1x, 2 mm target)
    probes = [dots.make_probe("CdTe", p) for p in (660, 680, 700, 720, 690)]
    filters = [optics.parse_filter(f) for f in ("660/20", "700/40", "680/20", "710/20", "740/20")]
    lib = design("soft tissue", probes, filters, sources=optics.Laser(532.0, 1.0),
                 camera=optics.camera("si-deep-depletion"), lens=optics.Lens(2.0, 0.1), k=2, depth_mm=2.0,
                 exposure_s=0.05, concentration_uM=0.01, top=3)
    best = out["candidates"][0]
    assert best["probes"] == list(lib.best.probes) and best["filters"] == list(lib.best.filters)
    assert best["worst_snr"] == pytest.approx(lib.best.worst_snr, rel=1e-12)


def test_text_output_has_table_and_explanation(capsys):
    assert main(BASE) == 0
    text = capsys.readouterr().out
    assert "For research use only" in text
    assert "worst_snr" in text and "limiting_probe" in text
    assert "Exhaustive search: 100 combinations" in text
    assert "vs #2" in text and "skin MPE 200 mW/cm^2" in text


@pytest.mark.parametrize("extra, message", [
    (["--k", "9"], "k: 9 probes to multiplex but only 5 candidate probes"),
    (["--filter-grid", "680:740"], "--filter-grid: cannot read '680:740'"),
    (["--irradiance", "500"], "above the skin MPE"),
    (["--candidate-probe", "CdTe:700-650:10"], "probe series: CdTe:700-650:10"),
])
def test_bad_input_exits_2_with_one_line(capsys, extra, message):
    assert main(BASE + extra) == 2
    err = capsys.readouterr().err
    assert message in err
    assert err.count("\n") == 1 and err.startswith("probeplan design: error:")


def test_no_filter_exits_2(capsys):
    assert main(["design", "--candidate-probe", "CdTe:700", "--k", "1", "--depth-mm", "2"]) == 2
    assert "--candidate-filter/--filter-grid: no candidate filter given" in capsys.readouterr().err
