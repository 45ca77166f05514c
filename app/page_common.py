"""Shared pieces of the probeplan page: session files, error display, cached model runs.

Nothing here computes science: every number comes from a probeplan library call.
The cached functions take only plain hashable values (strings, numbers, tuples)
so that ``st.cache_data`` can key on them; each returns its result together with
the notes and warnings the library gave, so that a cached answer shows the same
notes as a fresh one.
"""

from __future__ import annotations

import contextlib
import gc
import re
import shutil
import tempfile
import weakref
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import streamlit as st

from probeplan.io.shipped import shipped_folder
from probeplan.errors import InputError

__all__ = [
    "freeze_startup_objects",
    "REPO_ROOT",
    "DEMO_DIR",
    "FIGURE_DPI",
    "session_folder",
    "safe_name",
    "save_upload",
    "upload_limit_mb",
    "guard",
    "captured_warnings",
    "show_notes",
    "fmt",
    "ProbeSpec",
]

#: The folder holding the page (``app/`` in the source tree, ``probeplan/app`` when installed).
REPO_ROOT = Path(__file__).resolve().parents[1]
#: The invented demo study shipped with the package (found through importlib.resources).
DEMO_DIR = shipped_folder("demo_tissue")
#: Resolution of the figures shown on the page (dots per inch).
FIGURE_DPI = 100

_SAFE_CHARS = re.compile(r"[^A-Za-z0-9._-]+")
_MAX_NAME = 80


class _SessionFolder:
    """A private temporary folder removed when the browser session ends (or the server exits).

    The object lives in the session state; when the session is dropped the object is
    garbage-collected and :func:`weakref.finalize` removes the folder.  ``finalize``
    also runs at interpreter exit.
    """

    def __init__(self) -> None:
        self.path = Path(tempfile.mkdtemp(prefix="probeplan-page-"))
        self._finalizer = weakref.finalize(self, shutil.rmtree, str(self.path), True)

    def remove(self) -> None:
        """Remove the folder now."""
        self._finalizer()


def session_folder() -> Path:
    """This browser session's private temporary folder (created on first use)."""
    holder = st.session_state.get("_session_folder")
    if holder is None or not holder.path.is_dir():
        holder = _SessionFolder()
        st.session_state["_session_folder"] = holder
    return holder.path


def safe_name(name: str, default: str = "upload") -> str:
    """A file name reduced to a basename of letters, digits, ``.``, ``_`` and ``-``.

    Examples
    --------
    >>> safe_name("../../etc/passwd")
    'passwd'
    >>> safe_name("my stack (1).tif")
    'my_stack_1_.tif'
    >>> safe_name("..")
    'upload'
    """
    base = str(name).replace("\\", "/").rsplit("/", 1)[-1]
    base = _SAFE_CHARS.sub("_", base).lstrip(".")[:_MAX_NAME]
    return base or default


def upload_limit_mb() -> float:
    """Largest upload the page accepts, in MB (``probeplan app --max-upload-mb``, Streamlit's ``server.maxUploadSize``)."""
    try:
        return float(st.get_option("server.maxUploadSize"))
    except Exception:  # noqa: BLE001 - outside a Streamlit server: Streamlit's own default
        return 200.0


def save_upload(data: bytes, name: str, *, sub: str) -> Path:
    """Write uploaded bytes into ``<session folder>/<sub>/<safe name>`` and return the path.

    ``sub`` is one of the page's own fixed words, never user text.  The file always lands
    inside the session's folder (the name is reduced to a safe basename first); an upload
    larger than the page's limit is refused with one line.

    Raises
    ------
    InputError
        The upload is larger than :func:`upload_limit_mb`.
    """
    from probeplan.errors import input_error

    safe = safe_name(name)
    limit = upload_limit_mb()
    if len(data) > limit * 1e6:
        raise input_error(safe, f"{len(data) / 1e6:.1f} MB is more than the page accepts ({limit:g} MB)",
                          "unmix large stacks with the command line (probeplan unmix), or start the page with a "
                          "larger --max-upload-mb")
    root = session_folder().resolve()
    folder = root / sub
    folder.mkdir(parents=True, exist_ok=True)
    path = (folder / safe).resolve()
    if path.parent != folder.resolve() or root not in path.parents:  # pragma: no cover - safe_name prevents it
        raise input_error(safe, "would be saved outside this session's folder", "rename the file")
    path.write_bytes(data)
    return path


@contextlib.contextmanager
def guard(what: str) -> Iterator[None]:
    """Show bad input as one ``st.error`` line (never a traceback) and stop that part of the view."""
    try:
        yield
    except InputError as exc:
        st.error(f"{what}: {_one_line(str(exc))}")
    except Exception as exc:  # noqa: BLE001 - the page shows one line, never an exception box
        st.error(f"{what}: could not be done ({type(exc).__name__}: {_one_line(str(exc))[:300]})")


def _one_line(text: str) -> str:
    return " ".join(text.split())


@contextlib.contextmanager
def captured_warnings(notes: list[str]) -> Iterator[None]:
    """Collect probeplan's warnings into ``notes`` (shown as notes instead of raised): probeplan.notes.collect_notes."""
    from probeplan.notes import collect_notes

    with collect_notes(notes):
        yield


def show_notes(notes: list[str], *, title: str = "Model notes and assumptions") -> None:
    """The library's notes and warnings in a folded box."""
    if not notes:
        return
    with st.expander(f"{title} ({len(notes)})"):
        for n in notes:
            st.markdown(f"- {n}")


def fmt(value: Any, digits: int = 3) -> str:
    """A number as short text for tables (∞ and – for infinite and missing values)."""
    from probeplan.format import format_value

    return format_value(float(value) if isinstance(value, int) and not isinstance(value, bool) else value, digits)


#: One probe as plain values: (material, emission peak nm, QY or None, extinction M^-1 cm^-1 or None).
ProbeSpec = tuple[str, float, float | None, float | None]


_FROZEN = False


def freeze_startup_objects() -> None:
    """Once per process, after the first page is drawn: keep what is alive then out of later garbage collections.

    The page holds a large, long-lived heap (Streamlit, matplotlib, numpy, the model's caches and
    compiled loops).  Python's full (oldest-generation) collections walk all of it and paused a
    re-render by up to half a second.  :func:`gc.freeze` moves every object alive at this point
    (after a collection) into a permanent generation that later collections skip; objects made
    afterwards are collected as usual.
    """
    global _FROZEN
    if _FROZEN:
        return
    _FROZEN = True
    gc.collect()
    gc.freeze()
