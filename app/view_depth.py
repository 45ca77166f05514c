"""The depth view of the page (run by app/main.py's navigation)."""

from app.page_views import depth_page

depth_page()
