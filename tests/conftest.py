"""Shared test configuration.

Benchmarks (``@pytest.mark.benchmark``) are deselected by default (pyproject
``-m "not benchmark"``); run them with ``pytest tests/benchmarks -m benchmark -s``.
"""

from __future__ import annotations

import os

import matplotlib

matplotlib.use("Agg")

import pytest  # noqa: E402


@pytest.fixture(autouse=True)
def _isolated_user_library(tmp_path_factory, monkeypatch):
    """Point the user library folder at an empty temporary folder for every test.

    Model functions take objects and never read it; the catalog, the command line and the page
    resolve names through it, and a developer's own folder must not change what those tests see.
    """
    folder = tmp_path_factory.mktemp("user_library")
    monkeypatch.setenv("PROBEPLAN_LIBRARY", str(folder))
    yield folder


def pytest_report_header(config):
    return f"probeplan tests; OPENBLAS_CORETYPE={os.environ.get('OPENBLAS_CORETYPE', '')}"
