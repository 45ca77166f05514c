"""The study view: a whole study's results, each animal over time, group comparisons and kinetics.

Two ways in: run a study table on this computer (:func:`probeplan.study.runs.run_study`:
the study table and the reference spectra by their paths, the regions as rectangles or a
ROI file), or upload the result tables a study run wrote (``measurements.csv`` and, when
present, ``groups.csv`` and ``kinetics.csv``, read with :mod:`probeplan.study.results`).
Figures come from :mod:`probeplan.report.study`; the statistics are the study run's, not
the page's.
"""

from __future__ import annotations

from pathlib import Path

import streamlit as st

from app.page_common import FIGURE_DPI, captured_warnings, fmt, guard, safe_name, show_notes

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


def _rois_from_text(text: str) -> list[str]:
    """Region lines: ``name:x0,y0,x1,y1`` rectangles, or the path of a ROI file (its rectangles)."""
    from probeplan.unmixing.shapes import read_roi_file, rectangle_spec

    lines = [ln.strip() for ln in text.splitlines() if ln.strip()]
    out: list[str] = []
    for line in lines:
        if line.lower().endswith(".json"):
            shapes, _bg = read_roi_file(Path(line).expanduser())
            out += [rectangle_spec(s) for s in shapes]
        else:
            out.append(line)
    return out


def _run(study_csv: str, references: str, rois_text: str, background: str, method: str) -> None:
    from probeplan.errors import input_error
    from probeplan.study.runs import run_study

    if not study_csv.strip() or not references.strip():
        raise input_error("study", "the study table and the reference spectra are both needed",
                          "give the path of each file on this computer")
    notes: list[str] = []
    bar = st.progress(0.0, text="running the study…")
    done = [0]

    def progress(acq, status: str) -> None:
        done[0] += 1
        bar.progress(min(1.0, done[0] / max(1, done[0] + 1)), text=f"{acq.animal} at {acq.time_h:g} h: {status}")

    with captured_warnings(notes):
        result = run_study(Path(study_csv.strip()).expanduser(), Path(references.strip()).expanduser(),
                           rois=_rois_from_text(rois_text), roi_background=background.strip() or "background",
                           method=method, progress=progress)
    bar.empty()
    st.session_state["study_tables"] = {"measurements": result.measurements, "groups": result.groups,
                                        "kinetics": result.kinetics, "unit": result.unit,
                                        "notes": [*result.notes, *notes], "source": Path(study_csv).name}


def _run_form() -> None:
    ss = st.session_state
    c = st.columns(2)
    c[0].text_input("study table (STUDY.csv: animal, group, time_h, file[, channel])", key="w_study_csv",
                    persist_state="session", placeholder="/path/to/STUDY.csv")
    c[1].text_input("reference spectra (CSV)", key="w_study_refs", persist_state="session",
                    placeholder="/path/to/references.csv")
    c = st.columns([3, 1, 1])
    c[0].text_area("regions: one rectangle per line (name:x0,y0,x1,y1, pixels) or the path of a ROI file saved "
                   "from the unmix view", key="w_study_rois", persist_state="session", height=90)
    ss.setdefault("w_study_background", "background")
    c[1].text_input("background region", key="w_study_background", persist_state="session")
    c[2].selectbox("method", ["nnls", "ls", "wls"], key="w_study_method", persist_state="session")
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
        show_notes(list(dict.fromkeys(tables.get("notes") or [])), title="How the study was measured")
