"""The study view of the page (run by app/main.py's navigation)."""

from app.page_study import study_view

study_view()
