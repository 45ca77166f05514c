"""The channels view of the page (run by app/main.py's navigation)."""

from app.page_views import channels_page

channels_page()
