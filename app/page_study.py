"""The study view: a study's results folder in, animals over time, group comparisons and kinetics out.

The view reads the study's result tables (``measurements.csv``, and when present
``groups.csv`` and ``kinetics.csv``) with :mod:`probeplan.study.results` and draws them
with :func:`probeplan.report.study.group_time_course_figure`; the statistics themselves are
the study run's, not the page's.
"""

from __future__ import annotations

import streamlit as st

from app.page_common import FIGURE_DPI, fmt, guard, safe_name

__all__ = ["study_view"]

_QUANTITIES = {"tbr": "target-to-background ratio", "mean": "mean abundance"}


@st.cache_data(show_spinner=False, max_entries=16)
def _table(kind: str, data: bytes, name: str):
    from probeplan.study import results

    reader = {"measurements": results.read_measurements, "groups": results.read_groups,
              "kinetics": results.read_kinetics}[kind]
    return reader(data, name=name)


@st.cache_data(show_spinner=False, max_entries=32)
def _time_course_png(data: bytes, name: str, roi: str, component: str, quantity: str) -> bytes:
    from probeplan.report.document import figure_png_bytes
    from probeplan.report.study import group_time_course_figure

    return figure_png_bytes(group_time_course_figure(_table("measurements", data, name), roi=roi, component=component,
                                               quantity=quantity), dpi=FIGURE_DPI)


def _shown(df, columns: dict[str, str]) -> list[dict]:
    return [{label: (fmt(r[c]) if isinstance(r[c], float) else r[c]) for c, label in columns.items() if c in r}
            for r in df.to_dict("records")]


def study_view() -> None:
    """Upload a study's result tables; see each animal over time, the group comparisons and the kinetics."""
    st.header("Study: animals and groups over time")
    st.caption("The result tables of a whole study (one row per animal, time point, region and component): "
               "measurements.csv with animal, group, time_h, roi, component, mean, se, tbr; optionally groups.csv "
               "(group comparisons with their statistics) and kinetics.csv (fits per animal).")
    c = st.columns(3)
    up_m = c[0].file_uploader("measurements (CSV)", type=["csv"], key="up_study_measurements")
    up_g = c[1].file_uploader("group comparisons (CSV, optional)", type=["csv"], key="up_study_groups")
    up_k = c[2].file_uploader("kinetics (CSV, optional)", type=["csv"], key="up_study_kinetics")
    if up_m is None:
        st.info("Upload the study's measurements.csv to see it.")
        return
    with guard("study"):
        data, name = up_m.getvalue(), safe_name(up_m.name or "measurements.csv")
        m = _table("measurements", data, name)
        rois, comps = sorted(m["roi"].unique()), sorted(m["component"].unique())
        ss = st.session_state
        for key, options in (("w_study_roi", rois), ("w_study_component", comps)):
            if ss.get(key) not in options:
                ss[key] = options[0]
        c = st.columns(3)
        roi = c[0].selectbox("region", rois, key="w_study_roi")
        comp = c[1].selectbox("component", comps, key="w_study_component")
        quantity = c[2].radio("quantity", list(_QUANTITIES), format_func=_QUANTITIES.get, key="w_study_quantity",
                              horizontal=True)
        n_animals = m["animal"].nunique()
        groups = sorted(m["group"].unique())
        st.markdown(f"**{n_animals} animals** in {len(groups)} groups ({', '.join(groups)}), "
                    f"{m['time_h'].nunique()} time points.")
        st.image(_time_course_png(data, name, roi, comp, quantity),
                 caption="Thin lines: each animal; squares: the group mean ± standard error of the animals at that "
                         "time (drawn a little to the right).", width="stretch")
    if up_g is not None:
        with guard("group comparisons"):
            g = _table("groups", up_g.getvalue(), safe_name(up_g.name or "groups.csv"))
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
    if up_k is not None:
        with guard("kinetics"):
            k = _table("kinetics", up_k.getvalue(), safe_name(up_k.name or "kinetics.csv"))
            k = k[(k["roi"] == roi) & (k["component"] == comp)]
            st.subheader("Kinetics")
            cols = {"animal": "animal", "model": "model", "half_life_h": "half-life (h)", "t_peak_h": "peak at (h)"}
            cols.update({c_: c_.replace("_", " ") for c_ in k.columns if c_.endswith(("_low", "_high"))})
            st.dataframe(_shown(k, cols), hide_index=True, width="stretch")
