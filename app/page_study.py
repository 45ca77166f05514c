"""The study view: a whole study's results, each animal over time, group comparisons and kinetics.

Two ways in: run a study table on this computer (:func:`probeplan.study.runs.run_study`:
the study table and the reference spectra by their paths, the regions as text forms or
an ROI file with rectangles, ellipses and polygons: a path, an upload or the regions drawn in
the unmix view), or upload the result tables a study run wrote (``measurements.csv`` and,
when present, ``groups.csv`` and ``kinetics.csv``, read with :mod:`probeplan.study.results`).
Figures come from :mod:`probeplan.report.study`; the statistics are the study run's, not
the page's.  With the study plan, the plan's predictions are put beside the measurements
(:func:`probeplan.study.closure.closure`: the closure table, the fitted unknowns and the
refined plan to download).
"""

from __future__ import annotations

from pathlib import Path

import streamlit as st

from app.page_common import (
    FIGURE_DPI,
    captured_warnings,
    fmt,
    guard,
    safe_name,
    save_upload,
    session_folder,
    show_notes,
)

__all__ = ["study_view"]

_QUANTITIES = {"tbr": "target-to-background ratio", "mean": "mean abundance"}
_SOURCES = {"run": "run a study table on this computer", "upload": "upload a study's result tables"}


@st.cache_data(show_spinner=False, max_entries=16)
def _uploaded_table(kind: str, data: bytes, name: str):
    from probeplan.study import results

    reader = {"measurements": results.read_measurements, "groups": results.read_groups,
              "kinetics": results.read_kinetics}[kind]
    return reader(data, name=name)


@st.cache_data(show_spinner=False, max_entries=32)
def _time_course_png(m, roi: str, component: str, quantity: str, unit: str) -> bytes:
    from probeplan.report.document import figure_png_bytes
    from probeplan.report.study import group_time_course_figure

    return figure_png_bytes(group_time_course_figure(m, roi=roi, component=component, quantity=quantity,
                                                     unit=unit), dpi=FIGURE_DPI)


def _shown(df, columns: dict[str, str]) -> list[dict]:
    return [{label: (fmt(r[c]) if isinstance(r[c], float) else r[c]) for c, label in columns.items() if c in r}
            for r in df.to_dict("records")]


def _region_inputs(text: str) -> tuple[list[str], Path | None]:
    """Region lines (``name:x0,y0,x1,y1``, ``name:ellipse:cx,cy,rx,ry``, ``name:polygon:...``), an ROI file's path,
    an uploaded ROI file, or the regions drawn in the unmix view: (text forms, the one ROI file)."""
    from probeplan.errors import input_error
    from probeplan.unmixing.roifile import write_roi_file

    ss = st.session_state
    specs: list[str] = []
    files: list[Path] = []
    for line in (ln.strip() for ln in text.splitlines()):
        if line.lower().endswith(".json"):
            files.append(Path(line).expanduser())
        elif line:
            specs.append(line)
    up = ss.get("up_study_rois")
    if up is not None:
        files.append(save_upload(up.getvalue(), up.name or "rois.json", sub="study"))
    drawn = ss.get("unmix_regions") or []
    if ss.get("w_study_use_drawn") and drawn:
        background = ss.get("w_roi_background")
        names = [r.name for r in drawn]
        (session_folder() / "study").mkdir(parents=True, exist_ok=True)
        files.append(write_roi_file(session_folder() / "study" / "drawn_rois.json", drawn,
                                    background=background if background in names else None))
    if len(files) > 1:
        raise input_error("regions", f"{len(files)} ROI files given (a path, an upload or the drawn regions)",
                          "give one ROI file: it holds every region")
    return specs, (files[0] if files else None)


def _closure(measurements, plan, references, background: str, depth_mm: float | None, notes: list):
    """Predicted beside measured (:func:`probeplan.study.closure.closure`), as ``probeplan study --plan`` writes it.

    ``plan`` is a path (read with :func:`probeplan.study.plan.load_plan`) or ``(text, name)`` of an upload."""
    from probeplan.study.closure import closure
    from probeplan.study.plan import load_plan, parse_plan_text
    from probeplan.study.runs import load_references

    with captured_warnings(notes):
        plan = parse_plan_text(plan[0], source=plan[1]) if isinstance(plan, tuple) else load_plan(plan)
        c = closure(measurements, plan, load_references(references), background_roi=background, depth_mm=depth_mm)
    notes += c.notes
    return c


@st.cache_data(show_spinner=False, max_entries=8)
def _closure_of_uploads(measurements, plan: bytes, plan_name: str, references: bytes, refs_name: str,
                        background: str, depth_mm: float | None):
    """:func:`_closure` of uploaded files (cached: the upload form runs on every rerun); returns (closure, notes)."""
    import tempfile

    from probeplan.errors import input_error

    notes: list[str] = []
    try:
        text = plan.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise input_error(plan_name, "is not UTF-8 text", "save the plan TOML file as UTF-8") from None
    with tempfile.TemporaryDirectory(prefix="probeplan-closure-") as d:
        refs_path = Path(d) / safe_name(refs_name, "references.csv")
        refs_path.write_bytes(references)  # a private temporary copy for the reader, not an output
        c = _closure(measurements, (text, safe_name(plan_name, "plan.toml")), refs_path, background, depth_mm, notes)
    return c, notes


def _depth() -> float | None:
    ss = st.session_state
    return float(ss["w_study_depth"]) if ss.get("w_study_depth_known") else None


def _plan_path() -> Path | None:
    ss = st.session_state
    up = ss.get("up_study_plan")
    if up is not None:
        return save_upload(up.getvalue(), up.name or "plan.toml", sub="study")
    if str(ss.get("w_study_plan") or "").strip():
        return Path(str(ss["w_study_plan"]).strip()).expanduser()
    return None


def _run(study_csv: str, references: str, rois_text: str, background: str, method: str) -> None:
    from probeplan.errors import input_error
    from probeplan.study.runs import run_study
    from probeplan.unmixing.roifile import background_name

    if not study_csv.strip() or not references.strip():
        raise input_error("study", "the study table and the reference spectra are both needed",
                          "give the path of each file on this computer")
    specs, roi_file = _region_inputs(rois_text)
    background = background_name([roi_file] if roi_file else [], background.strip() or None)
    plan_path, depth = _plan_path(), _depth()
    notes: list[str] = []
    bar = st.progress(0.0, text="running the study…")
    done = [0]

    def progress(acq, status: str) -> None:
        done[0] += 1
        bar.progress(min(1.0, done[0] / max(1, done[0] + 1)), text=f"{acq.animal} at {acq.time_h:g} h: {status}")

    refs_path = Path(references.strip()).expanduser()
    dark = str(st.session_state.get("w_study_dark") or "").strip()
    with captured_warnings(notes):
        result = run_study(Path(study_csv.strip()).expanduser(), refs_path, rois=specs, roi_file=roi_file,
                           roi_background=background, method=method, progress=progress,
                           dark_path=Path(dark).expanduser() if dark else None)
    bar.empty()
    tables = {"measurements": result.measurements, "groups": result.groups, "kinetics": result.kinetics,
              "unit": result.unit, "notes": [*result.notes, *notes], "source": Path(study_csv).name,
              "background": background}
    if plan_path is not None:
        tables["closure"] = _closure(result.measurements, plan_path, refs_path, background, depth, tables["notes"])
    st.session_state["study_tables"] = tables


def _closure_form(*, uploads_references: bool) -> None:
    """Optional: the study plan (and the target depth when known) for predicted beside measured."""
    ss = st.session_state
    with st.expander("Predicted beside measured (optional): give the study plan", expanded=False):
        st.caption("With the plan, the study's measurements are put beside what the plan predicted for each probe "
                   "(signal, background, SBR, TBR, noise), the model's unknowns are fitted, and a refined plan for "
                   "the next study is offered (as 'probeplan study --plan' writes closure.csv and refined_plan.toml).")
        c = st.columns([2, 2, 1, 1])
        c[0].text_input("study plan (TOML) on this computer", key="w_study_plan", persist_state="session",
                        placeholder="/path/to/plan.toml")
        c[1].file_uploader("or upload the plan (TOML)", type=["toml", "txt"], key="up_study_plan")
        ss.setdefault("w_study_depth_known", False)
        ss.setdefault("w_study_depth", 3.0)
        c[2].checkbox("target depth known", key="w_study_depth_known", persist_state="session",
                      help="Known from anatomy or from the spectrum: the throughput is then fitted from the signal "
                           "at that depth; otherwise the depth is fitted.")
        c[3].number_input("target depth (mm)", min_value=0.0, max_value=50.0, step=0.5, key="w_study_depth",
                          persist_state="session", disabled=not ss["w_study_depth_known"])
        if uploads_references:
            st.file_uploader("reference spectra the images were unmixed with (CSV)", type=["csv", "txt"],
                             key="up_study_refs")


def _run_form() -> None:
    ss = st.session_state
    c = st.columns(2)
    c[0].text_input("study table (STUDY.csv: animal, group, time_h, file[, channel])", key="w_study_csv",
                    persist_state="session", placeholder="/path/to/STUDY.csv")
    c[1].text_input("reference spectra (CSV)", key="w_study_refs", persist_state="session",
                    placeholder="/path/to/references.csv")
    c = st.columns([3, 2])
    c[0].text_area("regions, one per line: name:x0,y0,x1,y1 (a rectangle), name:ellipse:cx,cy,rx,ry, "
                   "name:polygon:x1,y1,x2,y2,x3,y3,… (pixels from the image's top-left corner), or the path of an "
                   "ROI file (.json)", key="w_study_rois", persist_state="session", height=90)
    c[1].file_uploader("or an ROI file saved from the unmix view (rectangles, ellipses, polygons)", type=["json"],
                       key="up_study_rois")
    n_drawn = len(ss.get("unmix_regions") or [])
    ss.setdefault("w_study_use_drawn", False)
    c[1].checkbox(f"use the {n_drawn} regions drawn in the unmix view", key="w_study_use_drawn",
                  disabled=not n_drawn)
    c = st.columns([2, 2, 1])
    ss.setdefault("w_study_background", "")
    c[0].text_input("background region (empty: the ROI file's, else 'background')", key="w_study_background",
                    persist_state="session")
    c[1].text_input("dark frame stack (optional, subtracted)", key="w_study_dark", persist_state="session",
                    placeholder="/path/to/dark.tif")
    c[2].selectbox("method", ["nnls", "ls", "wls"], key="w_study_method", persist_state="session")
    _closure_form(uploads_references=False)
    if st.button("Run the study", type="primary", key="btn_study_run"):
        ss.pop("study_tables", None)
        with guard("study"):
            _run(str(ss["w_study_csv"]), str(ss["w_study_refs"]), str(ss["w_study_rois"]),
                 str(ss["w_study_background"]), str(ss["w_study_method"]))


def _upload_form() -> None:
    ss = st.session_state
    c = st.columns(3)
    up_m = c[0].file_uploader("measurements (CSV)", type=["csv"], key="up_study_measurements")
    up_g = c[1].file_uploader("group comparisons (CSV, optional)", type=["csv"], key="up_study_groups")
    up_k = c[2].file_uploader("kinetics (CSV, optional)", type=["csv"], key="up_study_kinetics")
    _closure_form(uploads_references=True)  # after the result tables: they come first on the page
    if up_m is None:
        st.info("Upload the study's measurements.csv to see it.")
        ss.pop("study_tables", None)
        return
    with guard("study"):
        tables = {"measurements": _uploaded_table("measurements", up_m.getvalue(),
                                                  safe_name(up_m.name or "measurements.csv")),
                  "groups": None, "kinetics": None, "unit": "", "notes": [], "source": up_m.name}
        for kind, up in (("groups", up_g), ("kinetics", up_k)):
            if up is not None:
                tables[kind] = _uploaded_table(kind, up.getvalue(), safe_name(up.name or f"{kind}.csv"))
        m = tables["measurements"]
        if "unit" in m.columns and m["unit"].notna().any():
            tables["unit"] = str(m["unit"].dropna().iloc[0])
        ss["study_tables"] = tables
        up_plan, up_refs = ss.get("up_study_plan"), ss.get("up_study_refs")
        if up_plan is not None:
            from probeplan.errors import input_error

            if up_refs is None:
                raise input_error("predicted beside measured", "needs the reference spectra the images were unmixed "
                                  "with", "upload them beside the plan")
            if "background" not in set(m["roi"]):
                raise input_error(tables["source"], "has no region named 'background'",
                                  "predicted beside measured compares each target with the 'background' region")
            tables["background"] = "background"
            tables["closure"], notes = _closure_of_uploads(m, up_plan.getvalue(), up_plan.name or "plan.toml",
                                                           up_refs.getvalue(), up_refs.name or "references.csv",
                                                           "background", _depth())
            tables["notes"] = [*tables["notes"], *notes]


def study_view() -> None:
    """Run or upload a study; see each animal over time, the group comparisons and the kinetics."""
    st.header("Study: animals and groups over time")
    st.caption("A whole study (one row per animal, time point, region and component): each animal over time, the "
               "groups' means, the group comparisons with their statistics and the kinetics fits.")
    ss = st.session_state
    ss.setdefault("w_study_source", "run")
    source = st.radio("results from", list(_SOURCES), format_func=_SOURCES.get, key="w_study_source",
                      persist_state="session", horizontal=True)
    if source == "run":
        _run_form()
    else:
        _upload_form()
    tables = ss.get("study_tables")
    if not tables:
        return
    with guard("study results"):
        m = tables["measurements"]
        rois, comps = sorted(m["roi"].unique()), sorted(m["component"].unique())
        targets = [r for r in rois if r != "background"] or rois
        if ss.get("w_study_roi") not in targets:
            ss["w_study_roi"] = targets[0]
        if ss.get("w_study_component") not in comps:
            ss["w_study_component"] = comps[0]
        c = st.columns(3)
        roi = c[0].selectbox("region", targets, key="w_study_roi")
        comp = c[1].selectbox("component", comps, key="w_study_component")
        quantity = c[2].radio("quantity", list(_QUANTITIES), format_func=_QUANTITIES.get, key="w_study_quantity",
                              horizontal=True)
        groups = sorted(m["group"].astype(str).unique())
        st.markdown(f"**{m['animal'].nunique()} animals** in {len(groups)} groups ({', '.join(groups)}), "
                    f"{m['time_h'].nunique()} time points ({tables['source']}).")
        unit = tables.get("unit") or "counts"
        st.image(_time_course_png(m, roi, comp, quantity, unit),
                 caption="Thin lines: each animal; squares: the group mean ± standard error of the animals at that "
                         "time (drawn a little to the right).", width="stretch")
        g = tables.get("groups")
        if g is not None and len(g):
            g = g[(g["roi"] == roi) & (g["component"] == comp) & (g["quantity"] == quantity)]
            st.subheader("Group comparisons")
            st.caption("Difference of group means (a − b) with its 95 % confidence interval; Welch's t test, the "
                       "rank-sum test, and the p value adjusted for the number of comparisons, as the study run "
                       "computed them.")
            st.dataframe(_shown(g.sort_values("time_h"), {
                "time_h": "time (h)", "group_a": "group a", "group_b": "group b", "n_a": "n a", "n_b": "n b",
                "difference": "difference (a − b)", "ci_low": "95 % CI low", "ci_high": "95 % CI high",
                "p_welch": "p (Welch)", "p_rank": "p (rank-sum)", "p_adjusted": "p adjusted"}),
                hide_index=True, width="stretch")
        k = tables.get("kinetics")
        if k is not None and len(k):
            k = k[(k["roi"] == roi) & (k["component"] == comp)]
            st.subheader("Kinetics")
            cols = {"animal": "animal", "model": "model", "half_life_h": "half-life (h)", "t_peak_h": "peak at (h)"}
            cols.update({c_: c_.replace("_", " ") for c_ in k.columns if c_.endswith(("_low", "_high"))})
            st.dataframe(_shown(k, cols), hide_index=True, width="stretch")
        _closure_section(tables)
        _concentration_section(tables)
        show_notes(list(dict.fromkeys(tables.get("notes") or [])), title="How the study was measured")


@st.cache_data(show_spinner=False, max_entries=8)
def _measurements_uM(measurements, calibration: bytes, name: str, depth_mm: float | None):
    """:func:`probeplan.study.calibration.calibrate_measurements` of an uploaded calibration.csv: (table, notes)."""
    import tempfile

    from probeplan.study.calibration import calibrate_measurements, read_calibration_csv

    notes: list[str] = []
    with tempfile.TemporaryDirectory(prefix="probeplan-calibration-") as d:
        path = Path(d) / safe_name(name, "calibration.csv")
        path.write_bytes(calibration)  # a private temporary copy for the reader, not an output
        with captured_warnings(notes):
            table = calibrate_measurements(measurements, read_calibration_csv(path), depth_mm=depth_mm)
    return table, notes


def _concentration_section(tables: dict) -> None:
    """The measurements in µM with a phantom calibration (as ``probeplan study --calibration`` writes them)."""
    up = st.file_uploader("calibration.csv (from 'probeplan calibrate' or the unmix view; optional: the "
                          "measurements in µM)", type=["csv"], key="up_study_calibration")
    if up is None:
        return
    table, notes = _measurements_uM(tables["measurements"], up.getvalue(), up.name or "calibration.csv", _depth())
    st.subheader("Measurements in µM")
    st.caption("Each region's mean and standard error converted with the calibration line; 'flag' says whether the "
               "value lies in the calibrated range, below the LOD or above the range. The depth check uses the "
               "target depth given above when it is known.")
    cols = [c for c in ("animal", "group", "time_h", "roi", "component", "mean", "se", "tbr", "unit", "flag")
            if c in table.columns]
    st.dataframe(_shown(table, {c: c.replace("_", " ") for c in cols}), hide_index=True, width="stretch",
                 key="df_study_uM")
    st.download_button("measurements_uM.csv", table.to_csv(index=False), file_name="measurements_uM.csv",
                       mime="text/csv", key="dl_study_uM")
    for n in dict.fromkeys(notes):
        st.caption(f"note: {n}")


def _closure_section(tables: dict) -> None:
    """The plan's predictions beside the measurements, the fitted unknowns and the refined plan."""
    c = tables.get("closure")
    if c is None:
        return
    from probeplan.io.atomic import table_to_csv_text
    from probeplan.study.closure import CLOSURE_COLUMNS

    st.subheader("Predicted beside measured")
    st.caption(f"Each probe in its own target region (its highest TBR) against the background region "
               f"'{tables.get('background', 'background')}'. SBR (the raw channel, what the plan predicts at depth) "
               "and TBR (the unmixed abundances) are different quantities: each row says what its numbers mean.")
    rows = c.table.to_dict("records")
    st.dataframe([{"component": r["component"], "quantity": r["quantity"], "predicted": fmt(r["predicted"]),
                   "measured": fmt(r["measured"]), "ratio (measured / predicted)": fmt(r["ratio"]),
                   "what it means": r["meaning"]} for r in rows], hide_index=True, width="stretch",
                 key="df_closure")
    if len(c.fits):
        st.markdown("**The model's unknowns fitted to the images** (mean ± standard error across animals)")
        st.dataframe([{k: (fmt(v) if isinstance(v, float) else v) for k, v in r.items()}
                      for r in c.fits.to_dict("records")], hide_index=True, width="stretch", key="df_closure_fits")
    d = st.columns(3)
    d[0].download_button("closure.csv", table_to_csv_text(rows, CLOSURE_COLUMNS), file_name="closure.csv",
                         mime="text/csv", key="dl_closure")
    d[1].download_button("closure_fits.csv", c.fits.to_csv(index=False), file_name="closure_fits.csv",
                         mime="text/csv", key="dl_closure_fits")
    d[2].download_button("Refined plan for the next study (TOML)", c.refined_plan_toml,
                         file_name="refined_plan.toml", mime="application/toml", key="dl_refined_plan")

