"""The plan view: a study plan and the institution's rules in, the rule-by-rule check out,
and the report to download (HTML, or a zip with the CSV and JSON tables).
"""

from __future__ import annotations

import io
import zipfile

import streamlit as st
from app.page_common import DEMO_DIR, fmt, guard, session_folder, show_notes

__all__ = ["plan_view"]

_MAX_TEXT_BYTES = 1_000_000


def _demo_text(name: str) -> str:
    try:
        return (DEMO_DIR / name).read_text(encoding="utf-8")
    except OSError:
        return ""


def _on_upload(upload_key: str, text_key: str) -> None:
    """Copy an uploaded TOML file's text into its text area (runs before the widgets are drawn)."""
    up = st.session_state.get(upload_key)
    if up is None:
        return
    data = up.getvalue()
    if len(data) > _MAX_TEXT_BYTES:
        st.session_state["plan_upload_error"] = (f"{up.name}: larger than {_MAX_TEXT_BYTES // 1000} kB; "
                                                 "give a plan or rules TOML file")
        return
    try:
        st.session_state[text_key] = data.decode("utf-8-sig")
        st.session_state.pop("plan_upload_error", None)
    except UnicodeDecodeError:
        st.session_state["plan_upload_error"] = f"{up.name}: not UTF-8 text; save the TOML file as UTF-8"


def _reset_demo() -> None:
    st.session_state["w_plan_text"] = _demo_text("plan.toml")
    st.session_state["w_rules_text"] = _demo_text("rules.toml")
    st.session_state.pop("plan_evaluation", None)


def _report_files(ev) -> tuple[bytes, bytes, bytes]:
    """(report.html, report.pdf, zip of every report file) as bytes, written in the session folder."""
    from probeplan.report.document import plan_report, report_pdf_bytes, write_report

    out = session_folder() / "report"
    report = plan_report(ev)
    pdf = report_pdf_bytes(report)
    report.extra_files["report.pdf"] = pdf
    written = write_report(report, out)
    html = written["html"].read_bytes()
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as zf:
        for path in written.values():
            zf.write(path, arcname=f"report/{path.name}")
    return html, pdf, buf.getvalue()


def plan_view() -> None:
    """Edit or upload a plan and rules, check it, download the report."""
    ss = st.session_state
    st.header("Plan: check the study plan, write the report")
    st.caption("The plan (TOML) describes animals, probes, doses, target, acquisition and statistics; the rules "
               "file (TOML) holds the institution's limits and overrides probeplan's defaults. Both start with the "
               "invented demo study; edit them here or upload your own.")
    ss.setdefault("w_plan_text", _demo_text("plan.toml"))
    ss.setdefault("w_rules_text", _demo_text("rules.toml"))
    c = st.columns(2)
    c[0].file_uploader("upload a plan (TOML)", type=["toml", "txt"], key="up_plan",
                       on_change=_on_upload, args=("up_plan", "w_plan_text"))
    c[1].file_uploader("upload a rules file (TOML)", type=["toml", "txt"], key="up_rules",
                       on_change=_on_upload, args=("up_rules", "w_rules_text"))
    if ss.get("plan_upload_error"):
        st.error(ss["plan_upload_error"])
    c = st.columns(2)
    c[0].text_area("study plan (plan.toml)", persist_state="session", key="w_plan_text", height=360)
    c[1].text_area("institution rules (rules.toml; empty = probeplan's defaults)",
                   persist_state="session", key="w_rules_text", height=360)
    b = st.columns([1, 1, 2])
    check = b[0].button("Check the plan", type="primary", key="btn_check")
    b[1].button("Back to the demo files", key="btn_plan_demo", on_click=_reset_demo)
    if check:
        ss.pop("plan_evaluation", None)
        with guard("plan"):
            from probeplan.study.evaluate import evaluate_plan
            from probeplan.study.plan import parse_plan_text
            from probeplan.study.rules import default_rules, parse_rules_text

            plan = parse_plan_text(str(ss["w_plan_text"]), source="plan.toml")
            rules_text = str(ss["w_rules_text"])
            rules = parse_rules_text(rules_text, filename="rules.toml") if rules_text.strip() else default_rules()
            ev = evaluate_plan(plan, rules)
            ss["plan_evaluation"] = (ev, *_report_files(ev))
    stored = ss.get("plan_evaluation")
    if stored is None:
        return
    ev, html, pdf, zipped = stored
    with guard("plan results"):
        if ev.passed:
            st.success(f"Every rule passes ({len(ev.checks)} checks).")
        else:
            st.error(f"{len(ev.failed)} of {len(ev.checks)} rules are broken: "
                     + ", ".join(c.rule_id for c in ev.failed))
        for w in ev.warnings:
            st.warning(w)
        rows = [{
            "result": "pass" if c.passed else "FAIL",
            "rule": c.rule_id,
            "what": c.description,
            "planned": fmt(c.value),
            "": c.comparison,
            "limit": fmt(c.limit),
            "unit": c.unit,
            "source of the limit": c.source + (" (example value)" if c.example_only else ""),
        } for c in ev.checks]
        st.subheader("Rule by rule")
        st.dataframe(rows, hide_index=True, width="stretch")
        for t in ev.tables:
            with st.expander(t.title):
                if t.note:
                    st.caption(t.note)
                cols = t.columns or (list(t.rows[0]) if t.rows else [])
                st.dataframe([{c_: (fmt(r.get(c_)) if isinstance(r.get(c_), float) else r.get(c_)) for c_ in cols}
                              for r in t.rows], hide_index=True, width="stretch")
        st.subheader("The report for the protocol")
        st.caption("A narrative first part (aim, design, animal numbers, doses, light, schedule, and marked places "
                   "for what only the institution can write), then the results with figures, then the assumptions.")
        c = st.columns(3)
        c[0].download_button("Report (PDF)", pdf, file_name="report.pdf", mime="application/pdf", key="dl_report_pdf",
                             type="primary")
        c[1].download_button("Report (HTML)", html, file_name="report.html", mime="text/html", key="dl_report_html")
        c[2].download_button("Report with tables (zip)", zipped, file_name="probeplan-report.zip",
                             mime="application/zip", key="dl_report_zip")
        from probeplan.report.protocol import plain_assumptions

        show_notes(plain_assumptions(ev.assumptions), title="How the plan was read, and the assumptions")
    _phantom_section(ev)


def _phantom_section(ev) -> None:
    """A phantom that mimics the plan's tissue, to test the plan before any animal is imaged."""
    from probeplan.report.document import figure_png_bytes
    from probeplan.report.figures import phantom_sbr_figure
    from probeplan.study.phantom import PHANTOM_CAUTION, plan_phantom

    ss = st.session_state
    st.subheader("A phantom to test the plan first")
    st.caption("A liquid phantom (Intralipid and India ink in water) with the plan tissue's absorption and "
               "scattering at the excitation and emission wavelengths, its preparation, and the SBR against depth it "
               "should give beside the tissue's.")
    if st.button("Make the phantom recipe", key="btn_phantom"):
        ss.pop("plan_phantom", None)
        with guard("phantom"):
            from app.page_common import captured_warnings

            notes: list[str] = []
            with captured_warnings(notes):
                ph = plan_phantom(ev.plan)
            png = figure_png_bytes(phantom_sbr_figure(ph.sbr_curve))
            ss["plan_phantom"] = (ph, png, notes)
    stored = ss.get("plan_phantom")
    if stored is None:
        return
    ph, png, notes = stored
    with guard("phantom results"):
        st.warning(PHANTOM_CAUTION, icon="⚠️")
        st.markdown("**Preparation**")
        st.dataframe([{"step": r["step"], "ingredient": r["ingredient"], "volume (mL)": fmt(r["volume_ml"]),
                       "mass (g)": fmt(r["mass_g"]), "how": r["how"]} for r in ph.preparation],
                     hide_index=True, width="stretch")
        st.markdown("**Optical properties: target and phantom**")
        cols = list(ph.properties[0]) if ph.properties else []
        from probeplan.report.document import column_label

        st.dataframe([{column_label(c): (fmt(r[c]) if isinstance(r[c], float) else r[c]) for c in cols}
                      for r in ph.properties], hide_index=True, width="stretch")
        st.image(png, caption="SBR against the inclusion's depth: solid, the plan's tissue; dashed, the phantom.",
                 width="stretch")
        from probeplan.report.protocol import plain_assumptions

        show_notes(plain_assumptions([*ph.notes, *notes]), title="Phantom notes")
