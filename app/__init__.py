"""probeplan's Streamlit page (``probeplan app``): thin views over the library, no science inside.

``main.py`` is the entry point: it sets up the page and Streamlit's own multipage
navigation (``st.navigation``), whose pages are the small ``view_*.py`` scripts, in the
order of the work: Depth, Channels, Unmix, Study, Plan.  The views themselves live in
the ``page_*.py`` modules.
"""
