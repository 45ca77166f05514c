"""The imaging set-up shared by the depth and channels views: widgets, defaults, and the
values they give as a :class:`page_model.Setup`.

Widget keys start with ``w_`` so that ``main.py`` can keep their values while another
view is shown.  Defaults are a three-probe near-infrared-I example (an invented
set-up, not a recommendation).
"""

from __future__ import annotations

import streamlit as st

from app.page_common import fmt
from app.page_model import Setup, camera_names, material_ranges, skin_mpe
from probeplan.model.defaults import DEFAULT_CONCENTRATION_UM

__all__ = ["DEFAULTS", "DEFAULT_PROBES", "MAX_PROBES", "init_state", "setup_sidebar", "probe_table",
           "apply_probe_set", "COMPOSITION_FIELDS", "current_setup"]

#: Default probes: (material, emission peak nm, QY or 0 = material's typical, extinction or 0 = model, filter).
DEFAULT_PROBES = (
    ("CdTe", 700.0, 0.0, 0.0, "700/30"),
    ("CdTeSe", 780.0, 0.0, 1.5e6, "780/40"),
    ("InAs", 880.0, 0.0, 1.0e6, "880/50"),
    ("InAs", 960.0, 0.0, 1.0e6, "LP 1000"),
    ("PbS", 1100.0, 0.0, 0.0, "1100/50"),
    ("Ag2S", 1200.0, 0.0, 0.0, "LP 1300"),
)
MAX_PROBES = len(DEFAULT_PROBES)

#: Composition sliders: field, label, min, max, step.
COMPOSITION_FIELDS = (
    ("blood_fraction", "blood volume fraction", 0.0, 0.2, 0.001),
    ("saturation", "oxygen saturation of the blood", 0.0, 1.0, 0.01),
    ("water_fraction", "water volume fraction", 0.0, 1.0, 0.01),
    ("melanin_fraction", "melanosome volume fraction", 0.0, 0.1, 0.001),
    ("a_per_cm", "scattering μs′ at 500 nm (cm⁻¹)", 1.0, 100.0, 0.5),
    ("b", "scattering power b (μs′ ∝ λ^−b)", 0.0, 4.0, 0.01),
)


def _default_af_yield() -> float:
    from probeplan.model.fluorescence import Autofluorescence

    return float(Autofluorescence().yield_per_cm)


DEFAULTS: dict = {
    "w_tissue_mode": "preset",
    "w_tissue": "soft tissue",
    "w_excitation_nm": 640.0,
    "w_irradiance": 10.0,
    "w_illumination_s": 600.0,
    "w_camera": "si-deep-depletion",
    "w_binning": 2,
    "w_f_number": 4.0,
    "w_magnification": 0.1,
    "w_exposure_s": 0.05,
    "w_target_depth": 2.0,
    "w_target_size": 3.0,
    "w_concentration": DEFAULT_CONCENTRATION_UM,
    "w_uptake_ratio": 5.0,
    "w_af_on": True,
    "w_n_probes": 3,
}


def _probe_defaults(i: int) -> dict:
    mat, peak, qy, eps, filt = DEFAULT_PROBES[i]
    return {f"w_mat_{i}": mat, f"w_peak_{i}": peak, f"w_qy_{i}": qy, f"w_eps_{i}": eps, f"w_filter_{i}": filt}


def init_state() -> None:
    """Put every default into the session state once (widgets then read it from there)."""
    ss = st.session_state
    for key, value in DEFAULTS.items():
        ss.setdefault(key, value)
    ss.setdefault("w_af_yield", _default_af_yield())
    for i in range(MAX_PROBES):
        for key, value in _probe_defaults(i).items():
            ss.setdefault(key, value)
    _load_composition()


def _load_composition(force: bool = False) -> None:
    """Fill the composition sliders from the chosen preset."""
    from probeplan.catalog.resolve import tissue as tissue_preset

    ss = st.session_state
    if not force and all(f"w_comp_{f}" in ss for f, *_ in COMPOSITION_FIELDS):
        return
    try:
        tissue = tissue_preset(ss.get("w_tissue", DEFAULTS["w_tissue"]))
    except ValueError:
        return
    for f, _label, lo, hi, _step in COMPOSITION_FIELDS:
        ss[f"w_comp_{f}"] = float(min(max(getattr(tissue, f), lo), hi))


def _on_preset_change() -> None:
    _load_composition(force=True)


def apply_probe_set(probes: list[tuple[str, float, float, float]], filters: list[str]) -> None:
    """Set the probe and filter widgets (a button callback: runs before the widgets are drawn)."""
    ss = st.session_state
    n = min(len(probes), MAX_PROBES)
    ss["w_n_probes"] = n
    for i in range(n):
        mat, peak, qy, eps = probes[i]
        ss[f"w_mat_{i}"] = mat
        ss[f"w_peak_{i}"] = float(peak)
        ss[f"w_qy_{i}"] = float(qy or 0.0)
        ss[f"w_eps_{i}"] = float(eps or 0.0)
        ss[f"w_filter_{i}"] = filters[i] if i < len(filters) else filters[-1]


def setup_sidebar() -> dict:
    """Tissue, excitation, camera and target widgets in the sidebar; returns their values."""
    from probeplan.model.tissue import preset_names

    sb = st.sidebar
    sb.header("Imaging set-up")
    sb.caption("Shared by the depth and channels views.")

    sb.subheader("Tissue")
    sb.radio("tissue optical properties", ["preset", "composition"],
             persist_state="session", key="w_tissue_mode", horizontal=True,
             format_func=lambda m: "preset" if m == "preset" else "adjust composition",
             help="A preset from the library, or the preset's composition adjusted with sliders.")
    sb.selectbox("tissue preset", preset_names(), persist_state="session", key="w_tissue", on_change=_on_preset_change)
    composition: tuple = ()
    if st.session_state["w_tissue_mode"] == "composition":
        for f, label, lo, hi, step in COMPOSITION_FIELDS:
            sb.slider(label, min_value=lo, max_value=hi, step=step, persist_state="session", key=f"w_comp_{f}")
        composition = tuple((f, float(st.session_state[f"w_comp_{f}"])) for f, *_ in COMPOSITION_FIELDS)

    sb.subheader("Excitation (laser)")
    sb.number_input("wavelength (nm)", min_value=400.0, max_value=2000.0, step=5.0, format="%.1f",
                    persist_state="session", key="w_excitation_nm")
    sb.number_input("irradiance on the skin (mW/cm²)", min_value=0.001, max_value=10000.0, step=1.0,
                    format="%.3f", persist_state="session", key="w_irradiance")
    sb.number_input("continuous illumination of one site (s)", min_value=0.001, max_value=30000.0, step=10.0,
                    persist_state="session", key="w_illumination_s",
                    help="For a source left on between frames, and for the design search at the skin limit. The "
                         "depth and channels views judge one session's exposures, source off between frames.")
    mpe, mpe_notes = None, []
    try:
        mpe, mpe_notes = skin_mpe(float(st.session_state["w_excitation_nm"]), float(st.session_state["w_illumination_s"]))
    except ValueError as exc:
        sb.error(f"skin limit: {exc}")
    if mpe is not None:
        share = 100.0 * float(st.session_state["w_irradiance"]) / mpe
        sb.metric("skin MPE for this long, continuous light", f"{fmt(mpe)} mW/cm²")
        if share <= 100:
            sb.caption(f"The irradiance is {share:.1f} % of the skin MPE (written for human skin; the laser safety "
                       "officer decides).")
        else:
            sb.error(f"The irradiance is {share:.0f} % of the skin MPE: above the limit.")
        for n in mpe_notes:
            sb.caption(n)

    sb.subheader("Camera and lens")
    sb.selectbox("camera", camera_names(), persist_state="session", key="w_camera")
    sb.number_input("binning (pixels per side)", min_value=1, max_value=16, step=1, persist_state="session", key="w_binning")
    sb.number_input("lens f-number", min_value=0.5, max_value=64.0, step=0.1, persist_state="session", key="w_f_number")
    sb.number_input("magnification (image / object)", min_value=0.001, max_value=10.0, step=0.01, format="%.3f",
                    persist_state="session", key="w_magnification")
    sb.number_input("exposure per channel (s)", min_value=0.0001, max_value=600.0, step=0.01, format="%.4f",
                    persist_state="session", key="w_exposure_s")

    sb.subheader("Target")
    sb.number_input("target depth (mm)", min_value=0.0, max_value=50.0, step=0.5, persist_state="session", key="w_target_depth",
                    help="Centre of the target below the skin; marked on the plots, used by the channels view.")
    sb.number_input("target diameter (mm)", min_value=0.05, max_value=50.0, step=0.5,
                    persist_state="session", key="w_target_size")
    sb.number_input("probe concentration in the target (µM)", min_value=1e-6, max_value=1000.0, step=0.05,
                    format="%.3f", persist_state="session", key="w_concentration")
    sb.number_input("target-to-background uptake ratio", min_value=1.0, max_value=1000.0, step=0.5,
                    persist_state="session", key="w_uptake_ratio", help="The surrounding tissue holds concentration / ratio.")
    sb.checkbox("include tissue autofluorescence", persist_state="session", key="w_af_on")
    if st.session_state["w_af_on"]:
        sb.number_input("autofluorescence yield (cm⁻¹ at 650 nm excitation)", min_value=0.0, max_value=1.0,
                        step=1e-4, format="%.2e", persist_state="session", key="w_af_yield",
                        help="A stated assumption: set it from an unlabelled control animal when you have one.")
    return {"composition": composition, "mpe": mpe}


def probe_table() -> tuple[tuple, tuple]:
    """The probe rows (material, peak, QY, extinction, filter); returns (probes, filters) as plain values."""
    ranges = material_ranges()
    materials = list(ranges)
    st.number_input("number of probes", min_value=1, max_value=MAX_PROBES, step=1, persist_state="session", key="w_n_probes")
    n = int(st.session_state["w_n_probes"])
    widths = [1.2, 1.0, 0.9, 1.4, 1.1]
    head = st.columns(widths)
    labels = ["**material**", "**emission peak (nm)**", "**quantum yield** (0 = typical)",
              "**extinction at excitation** (M⁻¹ cm⁻¹, 0 = model)", "**emission filter** (e.g. 700/30, LP 1000)"]
    for col, text in zip(head, labels, strict=True):
        col.markdown(text)
    probes, filters = [], []
    for i in range(n):
        c = st.columns(widths)
        if st.session_state.get(f"w_mat_{i}") not in materials:
            st.session_state[f"w_mat_{i}"] = materials[0]
        mat = c[0].selectbox(f"probe {i + 1} material", materials,
                             persist_state="session", key=f"w_mat_{i}", label_visibility="collapsed")
        lo, hi = ranges[mat]
        c[1].number_input(f"probe {i + 1} emission peak (nm)", min_value=300.0, max_value=2500.0, step=5.0, format="%.1f",

                          persist_state="session", key=f"w_peak_{i}", label_visibility="collapsed", help=f"{mat} emits in {lo:.0f}–{hi:.0f} nm")
        c[2].number_input(f"probe {i + 1} quantum yield", min_value=0.0, max_value=1.0, step=0.05,
                          persist_state="session", key=f"w_qy_{i}", label_visibility="collapsed")
        c[3].number_input(f"probe {i + 1} extinction at excitation (M⁻¹ cm⁻¹)", min_value=0.0, max_value=1e9,
                          step=1e5, format="%.3e", persist_state="session", key=f"w_eps_{i}", label_visibility="collapsed")
        c[4].text_input(f"probe {i + 1} emission filter",
                        persist_state="session", key=f"w_filter_{i}", label_visibility="collapsed")
        ss = st.session_state
        qy = float(ss[f"w_qy_{i}"]) or None
        eps = float(ss[f"w_eps_{i}"]) or None
        probes.append((mat, float(ss[f"w_peak_{i}"]), qy, eps))
        filters.append(str(ss[f"w_filter_{i}"]).strip())
    st.caption("Emission ranges: " + "; ".join(f"{m} {lo:.0f}–{hi:.0f} nm" for m, (lo, hi) in ranges.items())
               + ". Materials without a published sizing curve use typical values; give the measured extinction "
               "of your probe at the excitation wavelength when you have it.")
    return tuple(probes), tuple(filters)


def current_setup(extra: dict, probes: tuple, filters: tuple) -> Setup:
    """The set-up from the session state."""
    ss = st.session_state
    return Setup(
        tissue=str(ss["w_tissue"]),
        composition=extra["composition"],
        probes=probes,
        filters=filters,
        excitation_nm=float(ss["w_excitation_nm"]),
        irradiance_mw_per_cm2=float(ss["w_irradiance"]),
        camera=str(ss["w_camera"]),
        binning=int(ss["w_binning"]),
        f_number=float(ss["w_f_number"]),
        magnification=float(ss["w_magnification"]),
        exposure_s=float(ss["w_exposure_s"]),
        target_depth_mm=float(ss["w_target_depth"]),
        target_size_mm=float(ss["w_target_size"]),
        concentration_uM=float(ss["w_concentration"]),
        uptake_ratio=float(ss["w_uptake_ratio"]),
        autofluorescence_yield_per_cm=float(ss["w_af_yield"]) if ss["w_af_on"] else 0.0,
    )
