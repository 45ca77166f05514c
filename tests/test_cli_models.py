"""The depth and channels commands, and the HTML report writer."""

from __future__ import annotations

import json
import re

import pytest

from probeplan.cli.main import main
from probeplan.report.document import Report, write_report

BASE = ["--irradiance", "8", "--exposure-s", "0.01", "--f-number", "4", "--binning", "2"]


def test_depth_json(capsys):
    rc = main(["depth", "--probe", "CdTe:700", "--probe", "CdTeSe:780", "--extinction", "8e5", "--extinction", "1.5e6",
               "--filter", "700/30", "--filter", "780/40", "--depth-max-mm", "6", "--json", *BASE])
    assert rc == 0
    out = json.loads(capsys.readouterr().out)
    assert [s["probe"] for s in out["summary"]] == ["CdTe 700 nm", "CdTeSe 780 nm"]
    assert out["sbr_threshold_note"] == "common practice, not a standard"
    assert 0 < out["skin"]["fraction_of_mpe"] < 1
    assert len(out["rows"]) == 2 * 13


def test_depth_writes_plot_and_csv(tmp_path, capsys):
    png, csv = tmp_path / "d.png", tmp_path / "d.csv"
    assert main(["depth", "--probe", "CdTe:700", "--filter", "700/30", "--plot", str(png), "--csv", str(csv), *BASE]) == 0
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert csv.read_text().startswith("probe,depth_mm,signal_e")
    assert "research use only" in capsys.readouterr().out.lower()


@pytest.mark.parametrize(
    ("args", "match"),
    [
        (["--probe", "CdTe700", "--filter", "700/30"], "write MATERIAL:PEAK"),
        (["--probe", "CdTx:700", "--filter", "700/30"], "did you mean 'CdTe'"),
        (["--probe", "CdTe:950", "--filter", "700/30"], "outside the CdTe emission range"),
        (["--probe", "CdTe:700", "--filter", "seven hundred"], "cannot read"),
        (["--probe", "CdTe:700", "--filter", "700/30", "--tissue", "skn"], "did you mean 'skin'"),
        (["--probe", "CdTe:700", "--filter", "700/30", "--depth-max-mm", "-1"], "--depth-max-mm: got -1, allowed above 0 up to 100 mm"),
    ],
)
def test_depth_bad_input_exit_2(capsys, args, match):
    assert main(["depth", *args, *BASE]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert re.search(match, err)


def test_channels_json_and_separability_exit(capsys):
    args = ["channels", "--probe", "CdTe:700", "--probe", "CdTe:700", "--filter", "700/30", "--filter", "780/40",
            "--depth-mm", "2", *BASE]
    assert main([*args, "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["separable"] == [False]
    assert main([*args, "--fail-if-not-separable"]) == 1


def test_channels_plot(tmp_path):
    png = tmp_path / "c.png"
    assert main(["channels", "--probe", "CdTe:700", "--probe", "CdTeSe:780", "--extinction", "8e5", "--extinction",
                 "1.5e6", "--filter", "700/30", "--filter", "780/40", "--plot", str(png), *BASE]) == 0
    assert png.stat().st_size > 1000


def test_report_is_self_contained(tmp_path):
    import matplotlib

    matplotlib.use("Agg")
    from probeplan.report.figures import new_figure

    rep = Report("Test report", cautions=["heavy metal"], assumptions=["an assumption"])
    rep.add_table("checks", "Rule checks", [{"rule": "a", "passed": True}, {"rule": "b", "passed": False}])
    fig, ax = new_figure()
    ax[0][0].plot([0, 1], [0, 1])
    rep.add_figure("a line", fig)
    files = write_report(rep, tmp_path / "out")
    html = files["html"].read_text()
    assert "For research use only" in html and "heavy metal" in html and "an assumption" in html
    assert "data:image/png;base64," in html
    assert "http://" not in html and "https://" not in html  # nothing fetched from a network
    assert "FAIL" in html and files["checks"].read_text().splitlines()[0] == "rule,passed"
    assert json.loads(files["json"].read_text())["tables"]["checks"]["rows"][1]["passed"] is False
