"""Packaging: the ``probeplan`` packages, plus the demo study and the page carried inside the wheel.

``demo_tissue/`` and ``app/`` stay at the top of the source tree; in a wheel they become the data
packages ``probeplan.demo_tissue`` and ``probeplan.app`` (found with importlib.resources by
``probeplan.io.shipped``).  Everything else is in ``pyproject.toml``.
"""

from setuptools import find_packages, setup

setup(
    packages=[*find_packages(include=["probeplan", "probeplan.*"]), "probeplan.demo_tissue", "probeplan.app"],
    package_dir={"probeplan.demo_tissue": "demo_tissue", "probeplan.app": "app"},
    package_data={
        "probeplan": ["data/*.tsv", "data/*.toml", "data/*.csv", "data/*.npz"],
        "probeplan.demo_tissue": ["*.tif", "*.toml", "*.csv"],
        "probeplan.app": ["*.py", "**/*.py", "**/*.toml", "**/*.css"],
    },
)
