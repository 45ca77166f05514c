"""Folders shipped with the package: the demo study (``demo_tissue/``) and the page (``app/``).

In the source tree both sit at the top level, beside ``probeplan/``; a wheel carries them as the
data packages ``probeplan.demo_tissue`` and ``probeplan.app`` (see ``setup.py``).  They are found
through :mod:`importlib.resources` either way, so ``probeplan demo`` and ``probeplan app`` work
installed from a wheel as well as from a checkout.
"""

from __future__ import annotations

import importlib.util
from importlib import resources
from pathlib import Path

from probeplan.errors import input_error

__all__ = ["shipped_folder", "SHIPPED_FOLDERS"]

#: Folder name in the source tree → package that carries it in a wheel.
SHIPPED_FOLDERS = {"demo_tissue": "probeplan.demo_tissue", "app": "probeplan.app"}


def shipped_folder(name: str) -> Path:
    """The shipped folder ``name`` (``"demo_tissue"`` or ``"app"``), installed or in the source tree.

    Raises
    ------
    InputError
        An unknown name, or a folder missing from this installation.

    Examples
    --------
    >>> (shipped_folder("demo_tissue") / "plan.toml").is_file()
    True
    """
    if name not in SHIPPED_FOLDERS:
        raise input_error("name", f"got {name!r}", f"use one of {', '.join(SHIPPED_FOLDERS)}")
    try:
        spec = importlib.util.find_spec(SHIPPED_FOLDERS[name])
    except ModuleNotFoundError:
        spec = None
    if spec is not None and spec.submodule_search_locations:
        # a data package without __init__.py: importlib gives its folder as the search location
        folder = Path(next(iter(spec.submodule_search_locations)))
    else:  # a source checkout used without installing: the folder beside the package
        folder = Path(str(resources.files("probeplan"))).parent / name
    if not folder.is_dir():
        raise input_error(name, f"not found at {folder}", "reinstall probeplan (pip install probeplan)")
    return folder
