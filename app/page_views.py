"""The depth and channels views."""

from __future__ import annotations

import math

import streamlit as st
from app.page_common import captured_warnings, fmt, guard, show_notes
from app.page_model import Setup, build_probes, channel_results, channels_png, depth_png, depth_profiles, skin_exposure

__all__ = ["depth_page", "channels_page", "depth_view", "channels_view", "irradiance_check"]


#: Header and caption of each view that shares the imaging set-up.
_HEADERS = {
    "depth": ("Depth: how deep can each probe be seen?",
              "Signal-to-background ratio (SBR), signal-to-noise ratio (SNR) per pixel and the blur of a "
              "target inclusion against its depth below the skin, for each probe in its own emission filter "
              "(light transport: diffusion theory corrected by Monte Carlo tables). Tissue, excitation, camera and target are in the sidebar."),
    "channels": ("Channels: crosstalk and separability",
                 "How much of each probe reaches the other probes' channels at the target depth, and what "
                 "separating them (unmixing) costs in noise; then a search for the best probe and filter set. "
                 "One channel per emission filter; excitation, camera, lens and target are in the sidebar."),
}


def shared_setup(view: str) -> None:
    """Header, sidebar set-up and probe table of the depth or channels view (drawn by the entry script).

    The set-up is left in ``st.session_state["page_setup"]`` as ``(Setup, skin MPE or None)``.
    """
    from app.page_setup import current_setup, init_state, probe_table, setup_sidebar

    title, caption = _HEADERS[view]
    st.header(title)
    st.caption(caption)
    init_state()
    extra = setup_sidebar()
    with st.expander("Probes and emission filters (one filter, one channel per probe)", expanded=True):
        probes, filters = probe_table()
    st.session_state["page_setup"] = (current_setup(extra, probes, filters), extra["mpe"])


def depth_page() -> None:
    """The depth view, below the shared set-up."""
    depth_view(*st.session_state["page_setup"])


def channels_page() -> None:
    """The channels view, below the shared set-up."""
    channels_view(*st.session_state["page_setup"])


def irradiance_check(setup: Setup, mpe: float | None) -> None:
    """The skin check of one session (the library's one rule), and a clear error above the plots when it fails.

    ``mpe`` is the sidebar's limit for a site lit continuously (a source left on): exceeding it is
    shown as a warning beside the session check.
    """
    try:
        skin, _ = skin_exposure(setup)
    except ValueError:
        return
    share = skin["share_of_mpe"]
    if share > skin["allowed_fraction"]:
        st.error(
            f"One session ({skin['on_time_s']:g} s of light on one site, {skin['governing_rule']} rule) uses "
            f"{fmt(100 * share)} % of the skin maximum permissible exposure: ABOVE the allowed "
            f"{fmt(100 * skin['allowed_fraction'])} %. Lower the irradiance or shorten the exposures; the laser "
            "safety officer decides.",
            icon="⚠️",
        )
    else:
        st.caption(f"Skin: one session ({skin['on_time_s']:g} s of light on one site, source off between frames) "
                   f"uses {fmt(100 * share)} % of the skin MPE ({skin['governing_rule']} rule).")
    if mpe is not None and setup.irradiance_mw_per_cm2 > mpe:
        st.warning(
            f"If the source stays on, {setup.irradiance_mw_per_cm2:g} mW/cm² is above the skin MPE "
            f"{fmt(mpe)} mW/cm² for {st.session_state['w_illumination_s']:g} s of continuous light: shutter the "
            "source between frames.",
            icon="⚠️",
        )


def _probe_cautions(setup: Setup) -> None:
    notes: list[str] = []
    with captured_warnings(notes):
        probes = build_probes(setup)
    metals = sorted({p.caution for p in probes if p.heavy_metal})
    for text in metals:
        st.warning(f"Probe material caution: {text}. The chemical safety office and the animal care committee set "
                   "dose, handling and disposal.", icon="☣️")


def _lost_depth_text(depth_mm: float, deepest_mm: float) -> str:
    if math.isinf(depth_mm):
        return f"> {deepest_mm:g} (not lost within the plotted range)"
    if depth_mm == 0.0:
        return "0 (below the threshold even at the surface)"
    return fmt(depth_mm)


def depth_view(setup: Setup, mpe: float | None) -> None:
    """SBR, SNR and blur against depth, and the depth at which each probe is lost."""
    from probeplan.model.fluorescence import DEFAULT_SBR_THRESHOLD, depth_at_threshold

    st.subheader("SBR, SNR and blur against depth")
    ss = st.session_state
    ss.setdefault("w_sbr_threshold", float(DEFAULT_SBR_THRESHOLD))
    ss.setdefault("w_depth_max", 10.0)
    ss.setdefault("w_depth_step", 0.25)
    c = st.columns(3)
    c[0].slider("SBR threshold (a target is lost below it; common practice 2)", min_value=1.1, max_value=10.0,
                step=0.1, persist_state="session", key="w_sbr_threshold")
    c[1].number_input("deepest depth plotted (mm)", min_value=0.5, max_value=50.0, step=1.0,
                      persist_state="session", key="w_depth_max")
    c[2].number_input("depth step (mm)", min_value=0.01, max_value=5.0, step=0.05, persist_state="session",
                      key="w_depth_step")
    ss.setdefault("w_skin_mm", 0.0)
    ss.setdefault("w_fat_mm", 0.0)
    c = st.columns(2)
    c[0].number_input("skin layer over the tissue (mm; 0: none)", min_value=0.0, max_value=5.0, step=0.1,
                      persist_state="session", key="w_skin_mm")
    c[1].number_input("subcutaneous fat layer under the skin (mm; 0: none)", min_value=0.0, max_value=10.0,
                      step=0.1, persist_state="session", key="w_fat_mm")
    layers = tuple((name, float(ss[key])) for name, key in (("skin", "w_skin_mm"), ("subcutaneous fat", "w_fat_mm"))
                   if float(ss[key]) > 0)
    threshold = float(ss["w_sbr_threshold"])
    depth_max, depth_step = float(ss["w_depth_max"]), float(ss["w_depth_step"])
    irradiance_check(setup, mpe)
    with guard("depth"):
        profiles, notes = depth_profiles(setup, depth_max, depth_step, layers)
        png = depth_png(setup, depth_max, depth_step, threshold, layers)
        st.image(png, caption=f"Dashed line: SBR {threshold:g}; dotted line: target depth "
                              f"{setup.target_depth_mm:g} mm; dots: depths where the light-transport model is unreliable. Light "
                              f"transport: {profiles[0].transport_model if profiles else 'auto'}.",
                 width="stretch")
        d = setup.target_depth_mm
        rows = []
        for p, filt in zip(profiles, setup.filters, strict=True):
            i = int(abs(p.depth_mm - d).argmin())
            rows.append({
                "probe": p.probe,
                "filter": filt,
                f"depth where SBR < {threshold:g} (mm)": _lost_depth_text(depth_at_threshold(p, threshold), depth_max),
                f"SBR at {d:g} mm": fmt(float(p.sbr[i])),
                f"SNR at {d:g} mm": fmt(float(p.snr[i])),
                f"blur FWHM at {d:g} mm (mm)": fmt(float(p.blur_fwhm_mm[i])),
                f"signal at {d:g} mm (e⁻/pixel)": fmt(float(p.signal_e[i])),
                "background (e⁻/pixel)": fmt(p.background_e),
                "pixel saturates": "yes" if bool(p.saturated.any()) else "no",
            })
        st.subheader("Depth at which each probe is lost")
        st.dataframe(rows, hide_index=True, width="stretch")
        st.caption("Electron counts are per binned pixel in one exposure. SBR = (S + B)/B. The threshold of 2 is "
                   "common practice for 'visible above background', not a standard.")
        _probe_cautions(setup)
        show_notes(notes)


def channels_view(setup: Setup, mpe: float | None) -> None:
    """Spectra with filter bands, crosstalk, separability; then the design search."""
    from app.page_design import design_section

    from probeplan.model.channels import SEPARABLE_CONDITION_LIMIT

    st.subheader(f"Separability at the target depth ({setup.target_depth_mm:g} mm)")
    irradiance_check(setup, mpe)
    with guard("channels"):
        rep, notes = channel_results(setup)
        cond = float(rep.condition_number[0])
        separable = bool(rep.separable[0])
        c = st.columns(3)
        c[0].metric("condition number", fmt(cond), help="1 for channels without crosstalk; large values mean the "
                    "probes look alike in these channels.")
        c[1].metric("separable", "yes" if separable else "NO",
                    help=f"Condition number below {SEPARABLE_CONDITION_LIMIT:g} (common practice).")
        c[2].metric("worst unmixed SNR", fmt(float(rep.unmixed_snr[0].min())))
        if not separable:
            st.error("These probes cannot be separated reliably in these channels: change peaks or filters.")
        st.image(channels_png(setup), caption="Left: probe emission (peak = 1) and filter transmission; right: "
                 "crosstalk, each probe's response in every channel relative to its own channel.", width="stretch")
        rows = []
        for k, name in enumerate(rep.probe_names):
            col = rep.response_e_per_s_per_uM[0, :, k]
            own = int(col.argmax())
            rows.append({
                "probe": name,
                "own channel": rep.channel_names[own],
                "response in own channel (e⁻/s per µM)": fmt(float(col[own])),
                "noise amplification by unmixing": fmt(float(rep.noise_amplification[0, k])),
                "unmixed SNR": fmt(float(rep.unmixed_snr[0, k])),
            })
        st.subheader("Noise amplification")
        st.dataframe(rows, hide_index=True, width="stretch")
        st.caption("Noise amplification: the standard deviation of a probe's unmixed estimate divided by that of the "
                   "best single-channel estimate of the probe imaged alone (1 = no cost).")
        xt = [{"channel": ch, **{p: fmt(float(rep.crosstalk[0, c_i, k])) for k, p in enumerate(rep.probe_names)},
               "excitation leakage (e⁻/s)": fmt(float(rep.leakage_e_per_s[c_i]))}
              for c_i, ch in enumerate(rep.channel_names)]
        with st.expander("Crosstalk table"):
            st.dataframe(xt, hide_index=True, width="stretch")
        show_notes(notes)
    st.divider()
    design_section(setup)
