"""Atomic output writing: a temporary file in the target folder, then a rename.

Nothing half-written is ever left under the final name, and no function here
writes to a path that is also one of the command's inputs (callers pass the
inputs to :func:`refuse_input_paths`).
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import os
import secrets
from collections.abc import Iterable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

from probeplan.errors import input_error

__all__ = [
    "atomic_path",
    "write_bytes_atomic",
    "write_text_atomic",
    "write_json_atomic",
    "write_csv_atomic",
    "refuse_input_paths",
    "table_to_csv_text",
]


#: Mode of written files before the process umask (as ``open()`` would create them).
_FILE_MODE = 0o666


@contextlib.contextmanager
def atomic_path(target: str | Path, *, suffix: str | None = None) -> Iterator[Path]:
    """Yield a temporary path beside ``target``; rename it onto ``target`` on success.

    On any exception (including ``KeyboardInterrupt``) the temporary file is
    removed and ``target`` is left as it was.  The temporary name is chosen
    before the file is created, so an interrupt that lands just after the file
    appears still finds and removes it.
    """
    target = Path(target)
    folder = target.parent if str(target.parent) else Path(".")
    if not folder.is_dir():
        raise input_error(str(target), f"folder {str(folder)!r} does not exist", "create it first or choose another --out")
    tmp_path = folder / f".{target.name}.{secrets.token_hex(6)}{suffix or '.part'}"
    try:
        os.close(os.open(tmp_path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, _FILE_MODE))
        yield tmp_path
        os.replace(tmp_path, target)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp_path.unlink()
        raise


def write_bytes_atomic(target: str | Path, data: bytes) -> Path:
    """Write ``data`` to ``target`` atomically; return ``target``."""
    with atomic_path(target) as tmp:
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
    return Path(target)


def write_text_atomic(target: str | Path, text: str) -> Path:
    """Write UTF-8 ``text`` to ``target`` atomically; return ``target``."""
    return write_bytes_atomic(target, text.encode("utf-8"))


def write_json_atomic(target: str | Path, obj: Any) -> Path:
    """Write ``obj`` as indented JSON to ``target`` atomically; return ``target``."""
    return write_text_atomic(target, json.dumps(obj, indent=2, default=_json_default) + "\n")


def _json_default(obj: Any) -> Any:
    import numpy as np

    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def table_to_csv_text(rows: Sequence[Mapping[str, Any]], columns: Sequence[str] | None = None) -> str:
    """Render a list of row dicts as CSV text (columns from the first row unless given)."""
    cols = list(columns) if columns is not None else (list(rows[0].keys()) if rows else [])
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=cols, extrasaction="ignore", lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow(row)
    return buf.getvalue()


def write_csv_atomic(
    target: str | Path, rows: Sequence[Mapping[str, Any]], columns: Sequence[str] | None = None
) -> Path:
    """Write a list of row dicts as CSV to ``target`` atomically; return ``target``."""
    return write_text_atomic(target, table_to_csv_text(rows, columns))


def refuse_input_paths(outputs: Iterable[str | Path], inputs: Iterable[str | Path], *, option: str = "--out") -> None:
    """Raise if any output path is one of the inputs (compared after resolving links).

    Raises
    ------
    InputError
        Naming the clashing path and the option to change.
    """
    resolved_inputs = {Path(p).resolve() for p in inputs}
    for out in outputs:
        if Path(out).resolve() in resolved_inputs:
            raise input_error(option, f"{str(out)!r} is also an input", "choose an output path that is not an input file")


