"""The plan view of the page (run by app/main.py's navigation)."""

from app.page_plan import plan_view

plan_view()
