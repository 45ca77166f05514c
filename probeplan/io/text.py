"""Reading user input files: one helper so every command refuses the same problems the same way.

Input files are only ever read, never modified.
"""

from __future__ import annotations

from pathlib import Path

from probeplan.errors import input_error

__all__ = ["read_text_input", "MAX_TEXT_INPUT_BYTES"]

#: Largest text input read (bytes): tables and plans are far smaller.
MAX_TEXT_INPUT_BYTES = 64 * 1024 * 1024


def read_text_input(path, *, what: str = "file", max_bytes: int = MAX_TEXT_INPUT_BYTES) -> str:
    """The UTF-8 text of an input file (a leading byte-order mark is dropped).

    Parameters
    ----------
    path : str or Path
        The file.
    what : str
        What the file is, for messages (``"rules file"``, ``"spectra table"``).
    max_bytes : int
        Largest size accepted.

    Raises
    ------
    InputError
        ``<path>: <what> not found``, a folder instead of a file, unreadable,
        larger than ``max_bytes``, or not UTF-8 text — each with the fix.
    TypeError
        When ``path`` is not a path.
    """
    if not isinstance(path, (str, Path)):
        raise TypeError(f"path: expected a file path, got {type(path).__name__}")
    p = Path(path)
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        raise input_error(str(p), f"{what} not found", "check the path") from None
    except IsADirectoryError:
        raise input_error(str(p), f"cannot read it: it is a folder, not a {what}", f"give the {what} itself") from None
    except OSError as exc:
        raise input_error(str(p), f"cannot read the {what} ({exc.strerror})", "check the path and permissions") from None
    if len(raw) > max_bytes:
        raise input_error(str(p), f"is {len(raw)} bytes", f"a {what} should be under {max_bytes} bytes")
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise input_error(str(p), f"not UTF-8 text (byte {exc.start})", "save it as UTF-8") from None
