"""The Streamlit page, driven with streamlit.testing.v1.AppTest, and the ``probeplan app`` command.

The page only calls library functions; these tests check that its controls reach
the library (moving a control changes the numbers shown), that bad input is shown
as one error line and never as a traceback, that uploads stay in the session's
private folder, and that the research-use caution is on every view.  The science
itself is tested against its sources in the library's own tests.
"""

from __future__ import annotations

import gc
import importlib
import re
import sys
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("streamlit")
from streamlit.testing.v1 import AppTest  # noqa: E402

from probeplan import RESEARCH_USE_CAUTION  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
APP = ROOT / "app" / "main.py"
TIMEOUT = 180  # seconds per script run: generous, for a busy machine (not a speed target; see tests/benchmarks)


def _app() -> AppTest:
    at = AppTest.from_file(str(APP), default_timeout=TIMEOUT)
    at.run()
    _clean(at)
    return at


def _clean(at: AppTest) -> None:
    """No traceback on the page."""
    assert not at.exception, [e.value for e in at.exception]


def _errors(at: AppTest) -> list[str]:
    return [e.value for e in at.error]


def _view(at: AppTest, view: str) -> AppTest:
    """Switch to a view through the page's navigation (its script ``app/view_<view>.py``)."""
    at.switch_page(f"view_{view}.py").run()
    _clean(at)
    return at


def _table(at: AppTest, index: int = 0):
    return at.dataframe[index].value


def _image_count(at: AppTest) -> int:
    return len(at.get("image"))


# --------------------------------------------------------------------------- depth view


def test_depth_view_shows_three_probes_plot_and_caution():
    at = _app()
    assert any(RESEARCH_USE_CAUTION in w.value for w in at.warning)
    assert _errors(at) == []
    table = _table(at)
    assert list(table["probe"]) == ["CdTe 700 nm", "CdTeSe 780 nm", "InAs 880 nm"]
    assert list(table["filter"]) == ["700/30", "780/40", "880/50"]
    assert _image_count(at) >= 1
    # the skin limit is shown beside the irradiance (640 nm, >= 10 s: 200 mW/cm^2, ANSI Z136.1 C_A = 1 below 700 nm)
    assert any("200" in m.value and "mW/cm²" in m.value for m in at.sidebar.metric)


def test_changing_a_probe_peak_changes_the_table():
    at = _app()
    before = _table(at).iloc[0].to_dict()
    at.number_input(key="w_peak_0").set_value(720.0).run()
    _clean(at)
    after = _table(at).iloc[0].to_dict()
    assert after["probe"] == "CdTe 720 nm"
    changed = [k for k in before if k not in ("probe",) and before[k] != after[k]]
    assert changed, (before, after)


def test_skin_and_fat_layers_change_the_depth_table():
    # The depth view's layer controls: skin and subcutaneous fat over the tissue (probeplan.model.layers).
    at = _app()
    before = _table(at).iloc[0].to_dict()
    # skin only: the default InAs probe emits beyond the shipped fat table (1098 nm), where fat is refused
    at.number_input(key="w_skin_mm").set_value(0.5).run()
    _clean(at)
    assert _errors(at) == []
    after = _table(at).iloc[0].to_dict()
    assert [k for k in before if k != "probe" and before[k] != after[k]]
    assert any("layered tissue (skin 0.5 mm / " in str(getattr(m, "value", m))
               for m in list(at.markdown) + list(at.caption) + list(at.info) + list(at.warning))


def test_sbr_threshold_moves_the_lost_depth():
    at = _app()
    col = "depth where SBR < 2 (mm)"
    before = list(_table(at)[col])
    at.slider(key="w_sbr_threshold").set_value(1.5).run()
    _clean(at)
    after = list(_table(at)["depth where SBR < 1.5 (mm)"])
    assert before != after
    # a lower threshold is crossed deeper (SBR falls with depth)
    assert all(float(a) > float(b) for a, b in zip(after, before, strict=True) if b[0].isdigit() and a[0].isdigit())


def test_irradiance_above_the_skin_limit_is_flagged_above_the_plots():
    # one session of the default set-up: two 0.05 s exposures on one site (the library's one rule);
    # 10 W/cm^2 breaks the N^-1/4 rule for repeated short exposures (ANSI Z136.1 / IEC 60825-1)
    at = _app()
    at.sidebar.number_input(key="w_irradiance").set_value(10000.0).run()
    _clean(at)
    assert any("of the skin maximum permissible exposure: ABOVE the allowed" in e for e in _errors(at))


def test_a_source_left_on_is_warned_beside_the_session_check():
    # 500 mW/cm^2 passes one shuttered session but not 600 s of continuous light (0.2 W/cm^2 at 650 nm)
    at = _app()
    at.sidebar.number_input(key="w_irradiance").set_value(500.0).run()
    _clean(at)
    assert not any("ABOVE the allowed" in e for e in _errors(at))
    assert any("If the source stays on" in w.value for w in at.warning)


def test_bad_filter_text_is_one_error_line():
    at = _app()
    at.text_input(key="w_filter_1").set_value("banana").run()
    _clean(at)
    errs = _errors(at)
    assert any("filter" in e and "'banana'" in e for e in errs), errs


def test_peak_outside_the_material_range_is_refused_with_the_range():
    at = _app()
    at.number_input(key="w_peak_0").set_value(900.0).run()
    _clean(at)
    assert any("outside the CdTe emission range" in e for e in _errors(at)), _errors(at)


def test_tissue_composition_sliders_change_the_result():
    at = _app()
    before = list(_table(at)["SNR at 2 mm"])
    at.sidebar.radio(key="w_tissue_mode").set_value("composition").run()
    _clean(at)
    assert list(_table(at)["SNR at 2 mm"]) == before  # the preset's own composition: same numbers
    at.sidebar.slider(key="w_comp_blood_fraction").set_value(0.08).run()
    _clean(at)
    after = list(_table(at)["SNR at 2 mm"])
    assert after != before
    # more blood absorbs more: the SNR at depth falls
    assert all(float(a) < float(b) for a, b in zip(after, before, strict=True))


def test_composition_over_one_is_refused():
    at = _app()
    at.sidebar.radio(key="w_tissue_mode").set_value("composition").run()
    at.sidebar.slider(key="w_comp_water_fraction").set_value(1.0).run()
    at.sidebar.slider(key="w_comp_blood_fraction").set_value(0.2).run()
    _clean(at)
    assert any("fractions exceed 1" in e for e in _errors(at)), _errors(at)


def test_values_survive_a_visit_to_another_view():
    at = _app()
    at.number_input(key="w_peak_1").set_value(800.0).run()
    _view(at, "plan")
    _view(at, "depth")
    assert at.number_input(key="w_peak_1").value == 800.0
    assert "CdTeSe 800 nm" in list(_table(at)["probe"])


# --------------------------------------------------------------------------- channels view


def test_channels_view_and_a_filter_change():
    at = _view(_app(), "channels")
    assert any(RESEARCH_USE_CAUTION in w.value for w in at.warning)
    metrics = {m.label: m.value for m in at.metric}
    cond = float(metrics["condition number"])
    assert 1.0 <= cond < 10.0
    assert metrics["separable"] == "yes"
    noise = _table(at)
    assert list(noise["probe"]) == ["CdTe 700 nm", "CdTeSe 780 nm", "InAs 880 nm"]
    # the same filter for two probes: their columns become nearly alike, the set far worse conditioned
    at.text_input(key="w_filter_2").set_value("780/40").run()
    _clean(at)
    cond2 = float({m.label: m.value for m in at.metric}["condition number"].replace("∞", "inf"))
    assert cond2 > 3 * cond


def test_channels_needs_a_channel_per_probe():
    at = _view(_app(), "channels")
    at.number_input(key="w_n_probes").set_value(4).run()
    _clean(at)
    assert _errors(at) == [] or all("channel" in e or "probe" in e for e in _errors(at))
    at.text_input(key="w_filter_3").set_value("").run()
    _clean(at)
    assert _errors(at), "an empty filter must be refused"


def test_design_search_and_apply_a_set():
    at = _view(_app(), "channels")
    # a small search: one CdTe series, four filters, two probes
    at.checkbox(key="w_ds_on_1").uncheck()
    at.checkbox(key="w_ds_on_2").uncheck()
    at.number_input(key="w_ds_from_0").set_value(660.0)
    at.number_input(key="w_ds_to_0").set_value(720.0)
    at.number_input(key="w_ds_step_0").set_value(30.0)
    at.number_input(key="w_ds_centre_from").set_value(660.0)
    at.number_input(key="w_ds_centre_to").set_value(720.0)
    at.number_input(key="w_ds_centre_step").set_value(30.0)
    at.text_input(key="w_ds_widths").set_value("30")
    at.number_input(key="w_ds_k").set_value(2)
    at.button(key="FormSubmitter:design_form-Search").click().run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    best = at.dataframe[-1].value
    assert list(best["rank"])[:1] == [1]
    first = best.iloc[0]
    at.button(key="apply_design_1").click().run()
    _clean(at)
    assert at.number_input(key="w_n_probes").value == 2
    applied = [f"{at.selectbox(key=f'w_mat_{i}').value} {at.number_input(key=f'w_peak_{i}').value:g} nm" for i in range(2)]
    assert ", ".join(applied) == first["probes"]
    assert ", ".join(at.text_input(key=f"w_filter_{i}").value for i in range(2)) == first["filters"]
    assert list(_table(at)["probe"]) == applied


def test_design_bad_widths_is_an_error_line():
    at = _view(_app(), "channels")
    at.text_input(key="w_ds_widths").set_value("thirty")
    at.button(key="FormSubmitter:design_form-Search").click().run()
    _clean(at)
    assert any("filter widths" in e for e in _errors(at))


# --------------------------------------------------------------------------- unmix view


def _test_stack(tmp_path: Path) -> tuple[bytes, bytes, np.ndarray, np.ndarray]:
    """A 3-channel stack mixed from two known abundance maps (test data of our own)."""
    from probeplan.io.stacks import write_stack

    refs = np.array([[0.7, 0.1], [0.2, 0.3], [0.1, 0.6]])  # columns sum to 1 (the page's 'sum' normalisation)
    abundance = np.zeros((2, 40, 48))
    abundance[0, 5:15, 5:15] = 1000.0
    abundance[1, 20:35, 25:40] = 600.0
    abundance += 50.0
    stack = np.einsum("ck,kyx->cyx", refs, abundance)
    path = write_stack(tmp_path / "stack.tif", stack, channel_names=["ch700", "ch780", "ch880"])
    csv = "channel,dotA,dotB\nch700,0.7,0.1\nch780,0.2,0.3\nch880,0.1,0.6\n"
    return path.read_bytes(), csv.encode(), abundance, refs


def _roi_file(*regions: dict, size=(48, 40), background="background") -> bytes:
    import json

    return json.dumps({"kind": "probeplan ROIs", "version": 1, "image_size": list(size), "background": background,
                       "rois": list(regions)}).encode()


def test_unmix_upload_unmix_and_roi(tmp_path):
    stack, csv, truth, _ = _test_stack(tmp_path)
    at = _view(_app(), "unmix")
    assert any(RESEARCH_USE_CAUTION in w.value for w in at.warning)
    at.file_uploader(key="up_stack").set_value(("../../my stack (1).tif", stack, "image/tiff"))
    at.file_uploader(key="up_refs").set_value(("refs.csv", csv, "text/csv"))
    at.button(key="btn_unmix").click().run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    assert _image_count(at) >= 2
    # regions come back from a ROI file: the dotA square (pixel centres 5..14) and a background strip
    rois = _roi_file({"name": "dotA", "shape": "rectangle", "x": [5, 14], "y": [5, 14]},
                     {"name": "background", "shape": "rectangle", "x": [40, 47], "y": [0, 4]})
    at.file_uploader(key="up_rois").set_value(("rois.json", rois, "application/json")).run()
    _clean(at)
    assert list(_table(at)["region"]) == ["dotA", "background"]
    assert at.selectbox(key="w_roi_background").value == "background"
    at.button(key="btn_roi_measure").click().run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    rows = _table(at, -1)
    a_in_roi = rows[(rows["region"] == "dotA") & (rows["component"] == "dotA")].iloc[0]
    # noise-free mixture: the exact abundance comes back (1000 + 50 inside, 50 in the background region)
    assert float(a_in_roi["mean abundance (counts)"]) == pytest.approx(1050.0, rel=1e-3)
    assert float(a_in_roi["target-to-background ratio"]) == pytest.approx(21.0, rel=1e-3)
    assert int(a_in_roi["pixels"]) == 100
    # the upload is in the session's private folder, under a sanitised basename
    folder = at.session_state["_session_folder"].path
    saved = sorted(p.name for p in (folder / "uploads").iterdir())
    assert saved == ["my_stack_1_.tif", "refs.csv"]
    labels = [b.label for b in at.get("download_button")]
    assert any("OME-TIFF" in lab for lab in labels) and any("CSV" in lab for lab in labels)
    assert any("ROI file" in lab for lab in labels)


def test_unmix_automatic_target_region_is_offered_and_taken(tmp_path):
    stack, csv, _, _ = _test_stack(tmp_path)
    at = _view(_app(), "unmix")
    at.file_uploader(key="up_stack").set_value(("stack.tif", stack, "image/tiff"))
    at.file_uploader(key="up_refs").set_value(("refs.csv", csv, "text/csv"))
    at.button(key="btn_unmix").click().run()
    _clean(at)
    assert any("Automatic target region for dotA" in i.value for i in at.info)
    at.button(key="btn_roi_auto").click().run()
    _clean(at)
    table = _table(at, -1)
    assert list(table["region"]) == ["dotA spot"]
    # the test map's dotA square is pixels 5..14 (x and y): the suggested region spans their centres, 5.5 to 14.5
    # from the image's corner
    row = table.iloc[0]
    assert (row["x from (pixel)"], row["x to"], row["y from"], row["y to"]) == ("5.5", "14.5", "5.5", "14.5")


def test_unmix_with_the_demo_data():
    at = _view(_app(), "unmix")
    box = at.checkbox(key="w_sep_demo")
    if box.disabled:
        pytest.skip("the demo data is not available in this checkout")
    box.check().run()
    at.button(key="btn_unmix").click().run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    assert _image_count(at) >= 2
    at.button(key="btn_roi_measure").click().run()
    _clean(at)
    rows = _table(at, -1)
    assert {"tumour", "muscle"} <= set(rows["region"])


def test_unmix_bad_uploads_show_errors(tmp_path):
    stack, csv, _, _ = _test_stack(tmp_path)
    at = _view(_app(), "unmix")
    at.button(key="btn_unmix").click().run()
    _clean(at)
    assert any("upload" in e for e in _errors(at))
    at.file_uploader(key="up_stack").set_value(("stack.tif", b"not a tiff at all", "image/tiff"))
    at.file_uploader(key="up_refs").set_value(("refs.csv", csv, "text/csv"))
    at.button(key="btn_unmix").click().run()
    _clean(at)
    assert any("stack.tif" in e for e in _errors(at)), _errors(at)
    bad_refs = b"channel,dotA,dotB\nch700,0.7,x\nch780,0.2,0.3\nch880,0.1,0.6\n"
    at.file_uploader(key="up_stack").set_value(("stack.tif", stack, "image/tiff"))
    at.file_uploader(key="up_refs").set_value(("refs.csv", bad_refs, "text/csv"))
    at.button(key="btn_unmix").click().run()
    _clean(at)
    assert any("refs.csv:2" in e and "not a number" in e for e in _errors(at)), _errors(at)
    at.file_uploader(key="up_refs").set_value(("refs.csv", csv.replace(b"ch880", b"ch999"), "text/csv"))
    at.button(key="btn_unmix").click().run()
    _clean(at)
    assert any("ch880" in e for e in _errors(at)), _errors(at)
    at.file_uploader(key="up_refs").set_value(("refs.csv", csv, "text/csv"))
    at.button(key="btn_unmix").click().run()
    _clean(at)
    # a ROI file drawn on another image, and one whose region lies outside this image
    other = _roi_file({"name": "t", "shape": "ellipse", "x": [1, 5], "y": [1, 5]}, size=(500, 500))
    at.file_uploader(key="up_rois").set_value(("other.json", other, "application/json")).run()
    _clean(at)
    assert any("500 x 500" in e and "48 x 40" in e for e in _errors(at)), _errors(at)
    outside = _roi_file({"name": "t", "shape": "rectangle", "x": [100, 120], "y": [1, 5]}, background="t")
    at.file_uploader(key="up_rois").set_value(("outside.json", outside, "application/json")).run()
    _clean(at)
    assert any("holds no pixel" in e for e in _errors(at)), _errors(at)



def test_unmix_under_abuse_one_line_each_nothing_outside_the_session(tmp_path, monkeypatch):
    """An oversized upload, a unicode / ``../`` name, a library failure of an unexpected kind: one line each,
    no exception box, and every file the page wrote is inside the session's folder."""
    import streamlit

    from probeplan.io.stacks import write_stack

    _, csv, _, _ = _test_stack(tmp_path)
    big = write_stack(tmp_path / "big.tif", np.ones((3, 400, 400)), channel_names=["ch700", "ch780", "ch880"])
    at = _view(_app(), "unmix")
    at.file_uploader(key="up_stack").set_value(("../../стек ☃ (1).tif", big.read_bytes(), "image/tiff"))
    at.file_uploader(key="up_refs").set_value(("..\\..\\refs.csv", csv, "text/csv"))
    previous = streamlit.get_option("server.maxUploadSize")
    streamlit.config.set_option("server.maxUploadSize", 1)  # 1 MB: the 1.9 MB stack is larger
    try:
        at.button(key="btn_unmix").click().run()
    finally:
        streamlit.config.set_option("server.maxUploadSize", previous)
    _clean(at)
    errors = _errors(at)
    assert len(errors) == 1 and "more than the page accepts" in errors[0] and "\n" not in errors[0], errors
    assert not at.exception

    import probeplan.unmixing.pipeline as pipeline

    def broken(*args, **kwargs):
        raise RuntimeError("incompatible keyframe\nsecond line")

    monkeypatch.setattr(pipeline, "unmix_file", broken)
    at.button(key="btn_unmix").click().run()
    _clean(at)
    errors = _errors(at)
    assert len(errors) == 1 and "RuntimeError" in errors[0] and "\n" not in errors[0], errors
    assert not at.exception
    folder = at.session_state["_session_folder"].path
    saved = sorted(p.name for p in (folder / "uploads").iterdir())
    assert saved == ["_1_.tif", "refs.csv"], saved
    assert all(folder in p.resolve().parents for p in folder.rglob("*"))

def test_separate_with_references_from_control_stacks():
    """The demo's single-probe and unlabelled controls give the references on the page."""
    demo = Path(__file__).resolve().parents[1] / "demo_tissue"
    at = _view(_app(), "unmix")
    at.radio(key="w_sep_refs_from").set_value("control stacks").run()
    at.file_uploader(key="up_stack").set_value(("stack.tif", (demo / "stack.tif").read_bytes(), "image/tiff"))
    at.file_uploader(key="up_controls").set_value([
        (f"probe{k}.tif", (demo / f"control_{k}.tif").read_bytes(), "image/tiff") for k in (1, 2, 3)])
    at.file_uploader(key="up_unlabelled").set_value(("unlabelled.tif", (demo / "unlabelled.tif").read_bytes(),
                                                     "image/tiff"))
    at.text_input(key="w_sep_unlabelled_as").set_value("autofluorescence")
    at.button(key="btn_unmix").click().run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    assert at.session_state["unmix_result"]["names"] == ["probe1", "probe2", "probe3", "autofluorescence"]


# --------------------------------------------------------------------------- plan view


def test_plan_view_checks_the_demo_plan_and_offers_the_report():
    at = _view(_app(), "plan")
    assert any(RESEARCH_USE_CAUTION in w.value for w in at.warning)
    assert "[study]" in at.text_area(key="w_plan_text").value
    at.button(key="btn_check").click().run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    rows = _table(at)
    assert len(rows) >= 5 and set(rows["result"]) <= {"pass", "FAIL"}
    labels = [b.label for b in at.get("download_button")]
    assert "Report (HTML)" in labels and "Report with tables (zip)" in labels


def test_plan_view_reports_a_broken_rule():
    at = _view(_app(), "plan")
    text = re.sub(r"dose_nmol_per_kg = [0-9.]+", "dose_nmol_per_kg = 5000", at.text_area(key="w_plan_text").value, count=1)
    at.text_area(key="w_plan_text").set_value(text)
    at.button(key="btn_check").click().run()
    _clean(at)
    rows = _table(at)
    assert "FAIL" in set(rows["result"])
    assert any("rules are broken" in e for e in _errors(at))


def test_plan_view_bad_toml_names_the_file_and_line():
    at = _view(_app(), "plan")
    at.text_area(key="w_plan_text").set_value("[study]\ntitle = \n")
    at.button(key="btn_check").click().run()
    _clean(at)
    assert any("plan.toml" in e for e in _errors(at)), _errors(at)
    at.text_area(key="w_plan_text").set_value(at.text_area(key="w_plan_text").value)
    at.text_area(key="w_rules_text").set_value('[injection.mouse]\niv = { value = 0.1, unit = "mL" }\n')
    at.text_area(key="w_plan_text").set_value((ROOT / "demo_tissue" / "plan.toml").read_text(encoding="utf-8"))
    at.button(key="btn_check").click().run()
    _clean(at)
    assert any("rules.toml:2" in e and "mL/kg" in e for e in _errors(at)), _errors(at)


def test_plan_upload_replaces_the_text():
    at = _view(_app(), "plan")
    text = "# uploaded copy\n" + (ROOT / "demo_tissue" / "plan.toml").read_text(encoding="utf-8")
    at.file_uploader(key="up_plan").set_value(("plan.toml", text.encode(), "application/toml"))
    at.run()
    _clean(at)
    assert at.text_area(key="w_plan_text").value.startswith("# uploaded copy\n")


# --------------------------------------------------------------------------- page helpers


@pytest.fixture()
def page_common():
    sys.path.insert(0, str(ROOT))
    try:
        yield importlib.import_module("app.page_common")
    finally:
        sys.path.remove(str(ROOT))


@pytest.mark.parametrize(("name", "expected"), [
    ("../../etc/passwd", "passwd"),
    ("C:\\Users\\x\\stack.tif", "stack.tif"),
    ("my stack (1).tif", "my_stack_1_.tif"),
    ("..", "upload"),
    (".hidden.csv", "hidden.csv"),
    ("ÿ<script>.csv", "_script_.csv"),
])
def test_safe_name(page_common, name, expected):
    assert page_common.safe_name(name) == expected


def test_session_folder_is_removed_with_its_holder(page_common):
    holder = page_common._SessionFolder()
    path = holder.path
    (path / "x.bin").write_bytes(b"1")
    assert path.is_dir()
    del holder
    gc.collect()
    assert not path.exists()


# --------------------------------------------------------------------------- the command


def test_app_command_line_is_loopback_streamlit(monkeypatch, capsys):
    from probeplan.cli.main import main
    from probeplan.cli.commands import app as app_cmd

    launched = {}
    monkeypatch.setattr(app_cmd, "_launch", lambda cmd: launched.setdefault("cmd", cmd) and 0)
    assert main(["app", "--port", "8999", "--max-upload-mb", "50"]) == 0
    cmd = launched["cmd"]
    assert cmd[1:5] == ["-m", "streamlit", "run", str(APP)]
    opts = dict(zip(cmd[5::2], cmd[6::2], strict=True))
    assert opts["--server.address"] == "127.0.0.1"
    assert opts["--server.port"] == "8999"
    assert opts["--server.maxUploadSize"] == "50"
    assert opts["--server.headless"] == "true" and opts["--browser.gatherUsageStats"] == "false"
    out = capsys.readouterr()
    assert RESEARCH_USE_CAUTION in out.out and "authentication" not in out.err


def test_app_command_warns_when_not_loopback(monkeypatch, capsys):
    from probeplan.cli.main import main
    from probeplan.cli.commands import app as app_cmd

    monkeypatch.setattr(app_cmd, "_launch", lambda cmd: 0)
    assert main(["app", "--host", "0.0.0.0"]) == 0
    assert "NO authentication" in capsys.readouterr().err


@pytest.mark.parametrize("argv", [["app", "--port", "0"], ["app", "--max-upload-mb", "0"], ["app", "--host", " "]])
def test_app_command_refuses_bad_options(monkeypatch, capsys, argv):
    from probeplan.cli.main import main
    from probeplan.cli.commands import app as app_cmd

    monkeypatch.setattr(app_cmd, "_launch", lambda cmd: pytest.fail("must not start"))
    assert main(argv) == 2
    assert "probeplan app: error:" in capsys.readouterr().err


def test_app_command_without_the_page(monkeypatch, tmp_path, capsys):
    from probeplan.cli.main import main
    from probeplan.cli.commands import app as app_cmd

    from probeplan.io import shipped

    # an installation whose page folder is there but empty (damaged): refused, nothing started
    empty = tmp_path / "site-packages" / "probeplan" / "app"
    empty.mkdir(parents=True)
    monkeypatch.setattr(shipped, "shipped_folder", lambda name: empty)
    monkeypatch.setattr(app_cmd, "_launch", lambda cmd: pytest.fail("must not start"))
    assert main(["app"]) == 2
    err = capsys.readouterr().err
    assert "is missing" in err and "reinstall probeplan" in err



# --------------------------------------------------------------------------- navigation


def _views_in_order() -> list[tuple[str, str, str]]:
    import ast

    tree = ast.parse(APP.read_text(encoding="utf-8"))
    for node in tree.body:
        if isinstance(node, ast.AnnAssign | ast.Assign):
            target = node.target if isinstance(node, ast.AnnAssign) else node.targets[0]
            if isinstance(target, ast.Name) and target.id == "VIEWS":
                return list(ast.literal_eval(node.value))
    raise AssertionError("app/main.py defines no VIEWS")


def test_navigation_lists_the_views_in_the_order_of_the_work_each_with_the_caution():
    views = _views_in_order()
    assert [title.split(":")[0] for _, title, _ in views] == ["Depth", "Channels", "Unmix", "Study", "Plan"]
    at = _app()
    for script, title, _ in views:
        at.switch_page(script).run()
        _clean(at)
        assert any(RESEARCH_USE_CAUTION in w.value for w in at.warning), script
        assert at.header and at.header[0].value.split(":")[0] == title.split(":")[0], script


# --------------------------------------------------------------------------- study view


def _measurements_csv() -> str:
    """Two groups of three animals at three times (test data of our own)."""
    lines = ["animal,group,time_h,roi,component,mean,se,tbr"]
    for group, level in (("vehicle", 1.5), ("treated", 2.5)):
        for a in range(3):
            for t in (1.0, 24.0, 48.0):
                tbr = level + 0.1 * a - 0.005 * t
                lines.append(f"{group}-{a},{group},{t},tumour,dot A,{100 * tbr:.3f},2.0,{tbr:.4f}")
    return "\n".join(lines) + "\n"


def test_study_view_shows_animals_over_time_and_the_comparisons():
    measurements_csv = _measurements_csv
    at = _view(_app(), "study")
    at.radio(key="w_study_source").set_value("upload").run()
    assert any("measurements.csv" in i.value for i in at.info)
    at.file_uploader(key="up_study_measurements").set_value(("measurements.csv", measurements_csv().encode(),
                                                            "text/csv"))
    groups = ("time_h,roi,component,quantity,group_a,group_b,n_a,n_b,difference,ci_low,ci_high,p_welch,p_rank,"
              "p_adjusted\n24,tumour,dot A,tbr,treated,vehicle,3,3,0.9,0.31,1.49,0.0046,0.1,0.0138\n"
              "24,tumour,dot A,mean,treated,vehicle,3,3,90,31,149,0.0046,0.1,0.0138\n")
    at.file_uploader(key="up_study_groups").set_value(("groups.csv", groups.encode(), "text/csv")).run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    assert any("6 animals" in m.value for m in at.markdown)
    assert _image_count(at) >= 1
    table = _table(at, -1)
    assert len(table) == 1 and table.iloc[0]["p (Welch)"] == "0.0046"  # a small p value keeps its figures
    at.radio(key="w_study_quantity").set_value("mean").run()
    _clean(at)
    assert _table(at, -1).iloc[0]["difference (a − b)"] == "90"


def test_study_view_bad_table_is_one_error_line():
    at = _view(_app(), "study")
    at.radio(key="w_study_source").set_value("upload").run()
    at.file_uploader(key="up_study_measurements").set_value(("m.csv", b"animal,group\n1,a\n", "text/csv")).run()
    _clean(at)
    assert any("m.csv: has no column 'time_h'" in e for e in _errors(at)), _errors(at)


def test_study_view_runs_a_study_table_with_a_roi_file(tmp_path):
    """A small study of our own: dot A is 3x its background in the tumour of group 'high', 1.5x in 'low'."""
    import json

    from probeplan.io.stacks import write_stack

    refs = np.array([[0.6, 0.1], [0.3, 0.3], [0.1, 0.6]])
    channels = ["ch650", "ch700", "ch750"]
    (tmp_path / "refs.csv").write_text("channel,dotA,dotB\n" + "".join(
        f"{c},{refs[i, 0]},{refs[i, 1]}\n" for i, c in enumerate(channels)))
    rows = ["animal,group,time_h,file"]
    for group, level in (("low", 1.5), ("high", 3.0)):
        for a in range(2):
            for t in (1.0, 24.0):
                ab = np.full((2, 20, 20), 100.0)
                ab[0, 2:8, 2:8] = 100.0 * level
                name = f"{group}{a}_{t:g}.tif"
                write_stack(tmp_path / name, np.einsum("ck,kyx->cyx", refs, ab), channel_names=channels)
                rows.append(f"{group}{a},{group},{t:g},{name}")
    (tmp_path / "study.csv").write_text("\n".join(rows) + "\n")
    (tmp_path / "rois.json").write_text(json.dumps({"kind": "probeplan ROIs", "version": 1, "rois": [
        {"name": "tumour", "shape": "rectangle", "x": [2, 7], "y": [2, 7]},
        {"name": "background", "shape": "rectangle", "x": [12, 19], "y": [12, 19]}]}))
    at = _view(_app(), "study")
    at.text_input(key="w_study_csv").set_value(str(tmp_path / "study.csv"))
    at.text_input(key="w_study_refs").set_value(str(tmp_path / "refs.csv"))
    at.text_area(key="w_study_rois").set_value(str(tmp_path / "rois.json"))
    at.button(key="btn_study_run").click().run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    assert any("4 animals" in m.value for m in at.markdown)
    assert at.selectbox(key="w_study_roi").value == "tumour"
    assert _image_count(at) >= 1
    groups = _table(at, 0)
    # noise-free study: the difference in tumour TBR between the groups is 3.0 - 1.5 at both times
    assert sorted(abs(float(v)) for v in groups["difference (a − b)"]) == pytest.approx([1.5, 1.5], rel=1e-6)
    at.text_area(key="w_study_rois").set_value("tumour:0,0,90,90")
    at.button(key="btn_study_run").click().run()
    _clean(at)
    assert any("tumour:0,0,90,90" in e or "extends past" in e for e in _errors(at)), _errors(at)


def test_plan_view_offers_a_phantom_for_the_plan():
    at = _view(_app(), "plan")
    at.button(key="btn_check").click().run()
    at.button(key="btn_phantom").click().run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    assert any("phantom replaces no review" in w.value for w in at.warning)
    prep = _table(at, -2)
    assert list(prep["step"]) == [1, 2, 3] and "water" in prep.iloc[2]["ingredient"]
    # the three volumes make up the 100 mL batch
    assert sum(float(v) for v in prep["volume (mL)"]) == pytest.approx(100.0, rel=1e-3)


def test_unmix_with_a_calibration_gives_maps_in_micromolar(tmp_path):
    stack, csv, _, _ = _test_stack(tmp_path)
    # a calibration line of our own for dotA: 100 counts per µM above 50 counts; range 0.1-20 µM, LOD 0.05 µM
    cal = ("component,slope_counts_per_uM,intercept_counts,lod_uM,r2,range_low_uM,range_high_uM,phantom_depth_mm\n"
           "dotA,100,50,0.05,0.999,0.1,20,0\n")
    at = _view(_app(), "unmix")
    at.file_uploader(key="up_stack").set_value(("stack.tif", stack, "image/tiff"))
    at.file_uploader(key="up_refs").set_value(("refs.csv", csv, "text/csv"))
    at.file_uploader(key="up_calibration").set_value(("calibration.csv", cal.encode(), "text/csv"))
    at.button(key="btn_unmix").click().run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    assert any("Concentration maps (µM)" in m.value for m in at.markdown)
    flags = next(df.value for df in at.dataframe if "pixels in range" in df.value.columns)
    # inside the 10 x 10 square (1000 + 50 counts) dotA is (1050 - 50) / 100 = 10 µM: in range; outside it is
    # 0 µM: below the LOD.  100 of the 48 x 40 pixels.
    row = flags.iloc[0]
    assert row["component"] == "dotA"
    assert row["pixels in range"] == f"{100 * 100 / (48 * 40):.1f} %"
    assert row["pixels below lod"] == f"{100 * (48 * 40 - 100) / (48 * 40):.1f} %"


def _skimage_mask(shape_yx, kind: str, x, y) -> np.ndarray:
    """Reference pixel sets from scikit-image's ``skimage.draw`` (pixel (r, c) centred on (r, c), so a vertex
    (x, y) of the ROI file, whose origin is the image's corner, is (y - 0.5, x - 0.5) there)."""
    from skimage.draw import ellipse, polygon

    m = np.zeros(shape_yx, bool)
    if kind == "ellipse":
        rr, cc = ellipse((y[0] + y[1]) / 2 - 0.5, (x[0] + x[1]) / 2 - 0.5, (y[1] - y[0]) / 2, (x[1] - x[0]) / 2,
                         shape=shape_yx)
    else:
        rr, cc = polygon(np.asarray(y) - 0.5, np.asarray(x) - 0.5, shape_yx)
    m[rr, cc] = True
    return m


def test_drawn_ellipse_and_polygon_are_measured_and_reach_the_study_view(tmp_path):
    """An ROI file of the current form with an ellipse and a polygon across the edge of dot A's square: the
    page's means are those of the scikit-image masks; the Study view runs a study with the same regions."""
    from probeplan.unmixing.roifile import roi_file_text
    from probeplan.unmixing.shapes import RoiShape

    stack, csv, truth, _ = _test_stack(tmp_path)
    (tmp_path / "refs.csv").write_bytes(csv)
    ell_x, ell_y = (5.7, 14.3), (9.4, 20.8)
    poly_x, poly_y = (8.2, 19.7, 12.6), (3.3, 11.9, 17.1)
    shapes = [RoiShape("node", "ellipse", ell_x, ell_y), RoiShape("edge", "polygon", poly_x, poly_y),
              RoiShape("background", "rectangle", (40, 48), (0, 5))]
    at = _view(_app(), "unmix")
    at.file_uploader(key="up_stack").set_value(("stack.tif", stack, "image/tiff"))
    at.file_uploader(key="up_refs").set_value(("refs.csv", csv, "text/csv"))
    at.button(key="btn_unmix").click().run()
    text = roi_file_text(shapes, image_size=(48, 40), background="background")
    at.file_uploader(key="up_rois").set_value(("rois.json", text.encode(), "application/json")).run()
    _clean(at)
    assert list(_table(at)["shape"]) == ["ellipse", "polygon", "rectangle"]
    at.button(key="btn_roi_measure").click().run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    rows = _table(at, -1)
    refs_masks = {"node": _skimage_mask((40, 48), "ellipse", ell_x, ell_y),
                  "edge": _skimage_mask((40, 48), "polygon", poly_x, poly_y)}
    for name, m in refs_masks.items():
        r = rows[(rows["region"] == name) & (rows["component"] == "dotA")].iloc[0]
        assert int(r["pixels"]) == int(m.sum())
        # the mask crosses the square's edge: the mean depends on exactly which pixels are in
        assert 50 < truth[0][m].mean() < 1000
        assert float(r["mean abundance (counts)"]) == pytest.approx(float(truth[0][m].mean()), rel=1e-3)
    # the Study view takes the regions drawn in the unmix view
    (tmp_path / "study.csv").write_text("animal,group,time_h,file\nm1,a,1,stack.tif\nm2,a,2,stack.tif\n")
    at = _view(at, "study")
    assert any(RESEARCH_USE_CAUTION in w.value for w in at.warning)
    at.text_input(key="w_study_csv").set_value(str(tmp_path / "study.csv"))
    at.text_input(key="w_study_refs").set_value(str(tmp_path / "refs.csv"))
    at.text_area(key="w_study_rois").set_value("")
    at.checkbox(key="w_study_use_drawn").check()
    at.button(key="btn_study_run").click().run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    m = at.session_state["study_tables"]["measurements"]
    for name, mask in refs_masks.items():
        got = m[(m["roi"] == name) & (m["component"] == "dotA")]["mean"]
        assert np.allclose(got, truth[0][mask].mean(), rtol=1e-3)
    # the same regions as an uploaded ROI file, with a bad file refused in one line
    at.checkbox(key="w_study_use_drawn").uncheck()
    bad = text.replace('"shape": "polygon"', '"shape": "star"').encode()
    at.file_uploader(key="up_study_rois").set_value(("rois.json", bad, "application/json"))
    at.button(key="btn_study_run").click().run()
    _clean(at)
    assert any("rois.json: rois[1].shape: 'star' is not known" in e for e in _errors(at)), _errors(at)


def test_study_view_shows_predicted_beside_measured_and_the_refined_plan(tmp_path):
    """The demo study (ours, invented) run from the Study view with its plan: the closure table of
    probeplan.study.closure, the demo's tumour TBR for probe A (3.8, as tests/test_closure.py finds) and
    the refined plan; then the same from uploaded result tables."""
    import shutil

    from probeplan.demo import demo_folder
    from probeplan.study.plan import load_plan, parse_plan_text

    folder = demo_folder()
    for name in ("stack.tif", "dark.tif", "references.csv", "plan.toml"):
        shutil.copy(folder / name, tmp_path / name)
    plan = load_plan(tmp_path / "plan.toml")
    (tmp_path / "study.csv").write_text("animal,group,time_h,file\nm1,vehicle,1,stack.tif\nm2,vehicle,1,stack.tif\n")
    at = _view(_app(), "study")
    at.text_input(key="w_study_csv").set_value(str(tmp_path / "study.csv"))
    at.text_input(key="w_study_refs").set_value(str(tmp_path / "references.csv"))
    at.text_input(key="w_study_dark").set_value(str(tmp_path / "dark.tif"))
    at.text_area(key="w_study_rois").set_value("\n".join(plan.analysis["rois"]))
    at.text_input(key="w_study_plan").set_value(str(tmp_path / "plan.toml"))
    at.button(key="btn_study_run").click().run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    assert any("Predicted beside measured" in h.value for h in at.subheader)
    table = next(df.value for df in at.dataframe if "what it means" in df.value.columns)
    assert len(table) == 15 and set(table["quantity"]) >= {"signal", "background", "sbr", "tbr", "noise"}
    tbr = table[(table["component"] == "probe A (700)") & (table["quantity"] == "tbr")].iloc[0]
    assert float(tbr["measured"]) == pytest.approx(3.8, abs=0.2)
    assert "TBR" in tbr["what it means"] or "ratio" in tbr["what it means"]
    labels = [b.label for b in at.get("download_button")]
    assert "Refined plan for the next study (TOML)" in labels and "closure.csv" in labels
    refined = at.session_state["study_tables"]["closure"].refined_plan_toml
    assert parse_plan_text(refined, source="refined").target["uptake_ratio"] > 1
    # a calibration of our own: the page's references are scaled to sum 1, so an abundance is µM times the column
    # sum of the demo's references (counts per µM); the tumour's probe A then comes back at the demo's 0.01 µM
    import pandas as pd

    refs = pd.read_csv(tmp_path / "references.csv", comment="#")
    cal = ("component,slope_counts_per_uM,intercept_counts,lod_uM,r2,range_low_uM,range_high_uM,phantom_depth_mm\n"
           + "".join(f"{p['name']},{refs[p['name']].sum()},0.0,0.0005,1.0,0.001,0.008,3.0\n" for p in plan.probes))
    at.file_uploader(key="up_study_calibration").set_value(("calibration.csv", cal.encode(), "text/csv")).run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    um = at.session_state["study_tables"]["measurements"]  # unchanged, in counts
    assert "flag" not in um.columns
    shown = next(df.value for df in at.dataframe if "flag" in df.value.columns)
    a = shown[(shown["roi"] == "tumour") & (shown["component"] == "probe A (700)")]
    assert float(a["mean"].iloc[0]) == pytest.approx(plan.target["concentration_uM"], rel=0.1)
    assert set(shown["unit"]) == {"uM"}
    # the result tables uploaded with the plan and the references give the same table
    measurements = at.session_state["study_tables"]["measurements"].to_csv(index=False).encode()
    at.radio(key="w_study_source").set_value("upload").run()
    at.file_uploader(key="up_study_measurements").set_value(("measurements.csv", measurements, "text/csv"))
    at.file_uploader(key="up_study_plan").set_value(("plan.toml", (tmp_path / "plan.toml").read_bytes(),
                                                     "application/toml"))
    at.file_uploader(key="up_study_refs").set_value(("references.csv", (tmp_path / "references.csv").read_bytes(),
                                                     "text/csv")).run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    again = next(df.value for df in at.dataframe if "what it means" in df.value.columns)
    assert list(again["measured"]) == list(table["measured"])
    # a plan that is not TOML is one error line naming the upload
    at.file_uploader(key="up_study_plan").set_value(("bad.toml", b"[target\n", "application/toml")).run()
    _clean(at)
    assert any("bad.toml:1: is not valid TOML" in e for e in _errors(at)), _errors(at)


def test_unmix_view_fits_a_phantom_calibration(tmp_path):
    """Phantom wells of our own (counts = M × concentration + 20, Poisson): the fitted slope is the column
    sum of M, known by construction, as in tests/test_calibration.py."""
    import tifffile

    mix = np.array([[800.0, 50.0], [300.0, 400.0], [40.0, 900.0]])  # counts per µM, 3 channels x 2 probes
    channels = ["c1", "c2", "c3"]
    levels = [0.0, 0.0, 0.25, 0.5, 1.0, 2.0]
    rng = np.random.default_rng(0)
    conc = np.zeros((2, 20, 20 * len(levels)))
    for j, c in enumerate(levels):
        conc[0, 4:16, 20 * j + 4: 20 * j + 16] = c
    data = rng.poisson(np.einsum("ck,kyx->cyx", mix, conc) + 20.0).astype(np.float32)
    tifffile.imwrite(tmp_path / "plate.ome.tif", data, ome=True, photometric="minisblack",
                     metadata={"axes": "CYX", "Channel": {"Name": channels}})
    (tmp_path / "phantom.csv").write_text("file,component,concentration_uM,roi\n" + "".join(
        f'plate.ome.tif,dotA,{c},"{20 * j + 5},5,{20 * j + 15},15"\n' for j, c in enumerate(levels)))
    (tmp_path / "ref.csv").write_text("channel,dotA,dotB,background\n" + "".join(
        f"{c},{mix[i, 0]},{mix[i, 1]},20\n" for i, c in enumerate(channels)))
    at = _view(_app(), "unmix")
    at.text_input(key="w_cal_phantom").set_value(str(tmp_path / "phantom.csv"))
    at.text_input(key="w_cal_refs").set_value(str(tmp_path / "ref.csv"))
    at.button(key="btn_cal_fit").click().run()
    _clean(at)
    assert _errors(at) == [], _errors(at)
    table = at.session_state["phantom_calibration"]["table"].set_index("component")
    assert table.loc["dotA", "slope_counts_per_uM"] == pytest.approx(mix[:, 0].sum(), rel=0.02)
    assert "calibration.csv (upload it above for maps in µM)" in [b.label for b in at.get("download_button")]
    at.text_input(key="w_cal_phantom").set_value(str(tmp_path / "missing.csv"))
    at.button(key="btn_cal_fit").click().run()
    _clean(at)
    assert any("missing.csv" in e for e in _errors(at)), _errors(at)
