"""The unmix view of the page (run by app/main.py's navigation)."""

from app.page_unmix import unmix_view

unmix_view()
