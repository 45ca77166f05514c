"""probeplan's page: plan and analyse multiplexed in vivo fluorescence imaging with nanocrystal probes.

Start it with ``probeplan app``.  Five views in Streamlit's own navigation, in the order
of the work: depth (SBR, SNR and blur against depth), channels (crosstalk,
separability, design search), unmix (image stacks to abundance maps, ROIs drawn on
the map), study (animals and groups over time) and plan (rule checks and the
protocol report).  The page only calls library functions; it holds no science of its
own.  For research use only.
"""

from __future__ import annotations

import sys
from pathlib import Path

# The views import ``app.<module>``: put the folder holding this package first on the path.
_ROOT = str(Path(__file__).resolve().parents[1])
if _ROOT not in sys.path:
    sys.path.insert(0, _ROOT)

import matplotlib  # noqa: E402

matplotlib.use("Agg")

import streamlit as st  # noqa: E402

from probeplan import RESEARCH_USE_CAUTION, __version__  # noqa: E402

#: The views in navigation order: (script beside this file, title, URL path).
VIEWS = (
    ("view_depth.py", "Depth: SBR and SNR against depth", "depth"),
    ("view_channels.py", "Channels: crosstalk and design", "channels"),
    ("view_unmix.py", "Unmix: abundance maps and regions", "unmix"),
    ("view_study.py", "Study: animals and groups over time", "study"),
    ("view_plan.py", "Plan: rules and the protocol report", "plan"),
)

#: Views that share the imaging set-up (sidebar and probe table), drawn by this entry script.
SHARED_SETUP_VIEWS = ("depth", "channels")

#: Said at the foot of every view.
FOOT_CAUTION = (RESEARCH_USE_CAUTION + " Laser light can injure skin and eyes; cadmium- and lead-containing probes are "
                "toxic: follow the institution's animal care committee, laser safety officer and chemical safety "
                "office.")


def main() -> None:
    st.set_page_config(page_title="probeplan", page_icon="🔬", layout="wide")
    here = Path(__file__).resolve().parent
    pages = [st.Page(str(here / script), title=title, url_path=url, default=(i == 0))
             for i, (script, title, url) in enumerate(VIEWS)]
    page = st.navigation(pages, position="sidebar")
    st.sidebar.caption(f"probeplan {__version__} · multiplexed in vivo fluorescence imaging with nanocrystal probes")
    st.warning(RESEARCH_USE_CAUTION, icon="⚠️")
    view = next(url for _, title, url in VIEWS if title == page.title)  # the default page's url_path is ""
    if view in SHARED_SETUP_VIEWS:
        # Drawn here, not in the view scripts: Streamlit ties a widget to the script that draws it, and
        # this one set-up must keep its values (persist_state="session") from the depth to the channels view.
        from app.page_views import shared_setup

        shared_setup(view)
    page.run()
    st.divider()
    st.caption(FOOT_CAUTION)
    from app.page_common import freeze_startup_objects

    freeze_startup_objects()  # once per process: later garbage collections skip the start-up heap



# Streamlit runs this file as "__main__"; a process spawned by multiprocessing re-imports its parent's main
# script as "__mp_main__" and must not draw the page (a dask worker started from a test or a notebook).
if __name__ == "__main__":
    main()
