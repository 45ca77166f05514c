"""probeplan's page: plan and analyse multiplexed in vivo fluorescence imaging with nanocrystal probes.

Start it with ``probeplan app``.  Four views: depth (SBR, SNR and blur against
depth), channels (crosstalk, separability, design search), separate (unmixing of
image stacks) and plan (rule checks and report).  The page only calls library
functions; it holds no science of its own.  For research use only.
"""

from __future__ import annotations

import sys
from pathlib import Path

_HERE = str(Path(__file__).resolve().parent)
if _HERE not in sys.path:
    sys.path.insert(0, _HERE)

import matplotlib  # noqa: E402

matplotlib.use("Agg")

import streamlit as st  # noqa: E402

from probeplan import RESEARCH_USE_CAUTION, __version__  # noqa: E402

VIEWS = {
    "depth": "Depth: SBR and SNR against depth",
    "channels": "Channels: crosstalk and design",
    "separate": "Separate: unmix an image stack",
    "plan": "Plan: check against the rules",
}


def _keep_widget_values() -> None:
    """Keep the values of widgets that are not drawn in this run (another view is shown)."""
    for key in list(st.session_state.keys()):
        if isinstance(key, str) and key.startswith("w_"):
            st.session_state[key] = st.session_state[key]


def main() -> None:
    st.set_page_config(page_title="probeplan", page_icon="🔬", layout="wide")
    from page_setup import current_setup, init_state, probe_table, setup_sidebar

    _keep_widget_values()
    init_state()
    st.session_state.setdefault("w_view", "depth")

    st.sidebar.title("probeplan")
    st.sidebar.caption(f"Multiplexed in vivo fluorescence imaging with nanocrystal probes · version {__version__}")
    st.sidebar.radio("view", list(VIEWS), format_func=VIEWS.get, key="w_view")
    st.warning(RESEARCH_USE_CAUTION, icon="⚠️")

    view = st.session_state["w_view"]
    if view in ("depth", "channels"):
        from page_views import channels_view, depth_view

        extra = setup_sidebar()
        if view == "depth":
            st.header("Depth: how deep can each probe be seen?")
            st.caption("Signal-to-background ratio (SBR), signal-to-noise ratio (SNR) per pixel and the blur of a "
                       "target inclusion against its depth below the skin, for each probe in its own emission filter "
                       "(diffusion model of the tissue). Tissue, excitation, camera and target are in the sidebar.")
        else:
            st.header("Channels: crosstalk and separability")
            st.caption("How much of each probe reaches the other probes' channels at the target depth, and what "
                       "separating them (unmixing) costs in noise; then a search for the best probe and filter set. "
                       "One channel per emission filter; excitation, camera, lens and target are in the sidebar.")
        with st.expander("Probes and emission filters (one filter, one channel per probe)", expanded=True):
            probes, filters = probe_table()
        setup = current_setup(extra, probes, filters)
        if view == "depth":
            depth_view(setup, extra["mpe"])
        else:
            channels_view(setup, extra["mpe"])
    elif view == "separate":
        from page_separate import separate_view

        separate_view()
    else:
        from page_plan import plan_view

        plan_view()
    st.divider()
    st.caption(RESEARCH_USE_CAUTION + " Laser light can injure skin and eyes; cadmium- and lead-containing probes are "
               "toxic: follow the institution's animal care committee, laser safety officer and chemical safety office.")


main()
