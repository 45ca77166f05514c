"""The design search on the channels view: candidate probes and filters in, ranked sets out,
each of which can be applied to the set-up in one click.
"""

from __future__ import annotations

import streamlit as st

from app.page_common import captured_warnings, fmt, guard, show_notes
from app.page_model import Setup, autofluorescence, build_tissue
from app.page_setup import MAX_PROBES, apply_probe_set

__all__ = ["design_section", "DESIGN_DEFAULTS"]

#: Candidate probe series: (material, first peak nm, last peak nm, step nm, extinction or 0 = model).
_SERIES_DEFAULTS = (
    ("CdTe", 660.0, 720.0, 20.0, 0.0),
    ("CdTeSe", 700.0, 840.0, 20.0, 1.5e6),
    ("InAs", 800.0, 950.0, 25.0, 1.0e6),
)
DESIGN_DEFAULTS = {
    "w_ds_centre_from": 680.0,
    "w_ds_centre_to": 920.0,
    "w_ds_centre_step": 20.0,
    "w_ds_widths": "30, 50",
    "w_ds_top": 5,
    "w_ds_use_mpe": False,
}


def _init() -> None:
    ss = st.session_state
    for key, value in DESIGN_DEFAULTS.items():
        ss.setdefault(key, value)
    ss.setdefault("w_ds_k", int(ss.get("w_n_probes", 3)))
    for i, (mat, a, b, step, eps) in enumerate(_SERIES_DEFAULTS):
        for name, value in (("mat", mat), ("from", a), ("to", b), ("step", step), ("eps", eps), ("on", True)):
            ss.setdefault(f"w_ds_{name}_{i}", value)


def _widths(text: str) -> list[float]:
    from probeplan.errors import input_error

    try:
        values = [float(v) for v in text.replace(";", ",").split(",") if v.strip()]
    except ValueError:
        raise input_error("filter widths", f"cannot read {text!r}",
                          "give widths in nm separated by commas, e.g. 30, 50") from None
    if not values:
        raise input_error("filter widths", "none given", "give at least one width in nm, e.g. 40")
    return values


def _run_search(setup: Setup, materials: list[str]) -> None:
    """Build the candidates, run probeplan.design.search.design with a progress bar, keep the result."""

    from probeplan.catalog import resolve
    from probeplan.design import search as design_mod
    from probeplan.model import optics
    from probeplan.model.spectra import grid_nm

    ss = st.session_state
    notes: list[str] = []
    specs: dict[str, tuple] = {}
    with captured_warnings(notes):
        probes = []
        for i in range(len(_SERIES_DEFAULTS)):
            if not ss[f"w_ds_on_{i}"]:
                continue
            eps = float(ss[f"w_ds_eps_{i}"]) or None
            overrides = {} if eps is None else {"extinction_at_excitation_per_M_cm": eps}
            series = design_mod.probe_series(ss[f"w_ds_mat_{i}"], ss[f"w_ds_from_{i}"], ss[f"w_ds_to_{i}"],
                                             ss[f"w_ds_step_{i}"], **overrides)
            for p in series:
                specs[p.name] = (p.material, p.emission_peak_nm, None, eps)
            probes += series
        centres = grid_nm(float(ss["w_ds_centre_from"]), float(ss["w_ds_centre_to"]),
                          max(float(ss["w_ds_centre_step"]), 1e-3))
        filters = design_mod.filter_grid(centres, _widths(str(ss["w_ds_widths"])))
        bar = st.progress(0.0, text="searching…")

        def progress(done: int, total: int) -> None:
            bar.progress(min(1.0, done / max(total, 1)), text=f"searching… {done:,} of {total:,} filter sets")

        result = design_mod.design(
            build_tissue(setup), probes, filters, sources=optics.Laser(setup.excitation_nm),
            camera=resolve.camera(setup.camera, setup.binning),
            lens=optics.Lens(setup.f_number, setup.magnification), k=int(ss["w_ds_k"]),
            depth_mm=setup.target_depth_mm, exposure_s=setup.exposure_s,
            irradiance_mw_per_cm2=None if ss["w_ds_use_mpe"] else setup.irradiance_mw_per_cm2,
            illumination_s=float(ss["w_illumination_s"]), target_size_mm=setup.target_size_mm,
            concentration_uM=setup.concentration_uM, uptake_ratio=setup.uptake_ratio,
            autofluorescence=autofluorescence(setup), top=int(ss["w_ds_top"]), progress=progress,
        )
        bar.empty()
    ss["design_result"] = (result, specs, [n for n in notes if n not in result.notes] + result.notes)


def design_section(setup: Setup) -> None:
    """Candidate inputs, the search button and the ranked sets with their 'use this set' buttons."""
    from probeplan.model.dots import material_names

    _init()
    ss = st.session_state
    materials = list(material_names())
    st.subheader("Design search: the best probe and filter set")
    st.caption("Searches every combination of the candidate probes and filters below (one filter per probe) for the "
               "set whose worst probe has the highest unmixed SNR at the target depth, with the excitation, camera, "
               "lens, exposure and target of the set-up.")
    with st.form("design_form", border=True):
        st.markdown("**Candidate probes** (emission peaks from first to last in steps)")
        widths = [0.5, 1.2, 1.0, 1.0, 0.9, 1.4]
        head = st.columns(widths)
        for col, text in zip(head, ["use", "material", "first peak (nm)", "last peak (nm)", "step (nm)",
                                    "extinction at excitation (M⁻¹ cm⁻¹, 0 = model)"], strict=True):
            col.caption(text)
        for i in range(len(_SERIES_DEFAULTS)):
            c = st.columns(widths)
            c[0].checkbox(f"use series {i + 1}", persist_state="session", key=f"w_ds_on_{i}", label_visibility="collapsed")
            c[1].selectbox(f"series {i + 1} material", materials,
                           persist_state="session", key=f"w_ds_mat_{i}", label_visibility="collapsed")
            c[2].number_input(f"series {i + 1} first peak (nm)", min_value=300.0, max_value=2500.0, step=10.0,
                              persist_state="session", key=f"w_ds_from_{i}", label_visibility="collapsed")
            c[3].number_input(f"series {i + 1} last peak (nm)", min_value=300.0, max_value=2500.0, step=10.0,
                              persist_state="session", key=f"w_ds_to_{i}", label_visibility="collapsed")
            c[4].number_input(f"series {i + 1} step (nm)", min_value=1.0, max_value=500.0, step=5.0,
                              persist_state="session", key=f"w_ds_step_{i}", label_visibility="collapsed")
            c[5].number_input(f"series {i + 1} extinction (M⁻¹ cm⁻¹)", min_value=0.0, max_value=1e9, step=1e5,
                              format="%.3e", persist_state="session", key=f"w_ds_eps_{i}", label_visibility="collapsed")
        st.markdown("**Candidate bandpass filters** (every centre × every width)")
        c = st.columns(4)
        c[0].number_input("first centre (nm)", min_value=300.0, max_value=2500.0, step=10.0,
                          persist_state="session", key="w_ds_centre_from")
        c[1].number_input("last centre (nm)", min_value=300.0, max_value=2500.0, step=10.0,
                          persist_state="session", key="w_ds_centre_to")
        c[2].number_input("centre step (nm)", min_value=1.0, max_value=500.0, step=5.0,
                          persist_state="session", key="w_ds_centre_step")
        c[3].text_input("widths, FWHM (nm, comma-separated)", persist_state="session", key="w_ds_widths")
        c = st.columns(3)
        c[0].number_input("probes to multiplex", min_value=1, max_value=MAX_PROBES, step=1, persist_state="session", key="w_ds_k")
        c[1].number_input("best sets to list", min_value=1, max_value=20, step=1, persist_state="session", key="w_ds_top")
        c[2].checkbox("irradiance at the skin MPE (instead of the set-up's)", persist_state="session", key="w_ds_use_mpe")
        submitted = st.form_submit_button("Search", type="primary")
    if submitted:
        with guard("design search"):
            _run_search(setup, materials)
    stored = ss.get("design_result")
    if stored is None:
        return
    result, specs, notes = stored
    if not result.candidates:
        st.info("The search found no combination to rank.")
        return
    rows = []
    for cand in result.candidates:
        rows.append({
            "rank": cand.rank,
            "probes": ", ".join(cand.probes),
            "filters": ", ".join(cand.filters),
            "worst unmixed SNR": fmt(cand.worst_snr),
            "limited by": cand.limiting_probe,
            "condition number": fmt(cand.condition_number),
            "noise amplification": ", ".join(fmt(v) for v in cand.noise_amplification),
            "separable": "yes" if cand.separable else "no",
            "saturates": "yes" if cand.saturated else "no",
        })
    st.markdown(f"**Best sets** at {result.depth_mm:g} mm "
                f"({result.total_combinations:,} combinations, {result.evaluated:,} evaluated exactly)")
    st.dataframe(rows, hide_index=True, width="stretch")
    cols = st.columns(min(len(result.candidates), 5))
    for j, cand in enumerate(result.candidates[: len(cols)]):
        probes = [specs[name] for name in cand.probes]
        cols[j].button(f"Use set #{cand.rank}", key=f"apply_design_{cand.rank}", on_click=apply_probe_set,
                       args=(probes, list(cand.filters)),
                       help="Puts these probes and filters into the set-up of the depth and channels views.")
    with st.expander("Why the best set wins"):
        st.text(result.explanation())
    show_notes(notes, title="Search notes")
