"""Reading TOML with line numbers for error messages.

:func:`load_toml` parses a file with the standard library's :mod:`tomllib`
and refuses unreadable or invalid files with the file and line.
:func:`line_of` finds the line where a key path such as
``("probes", 2, "dose_nmol_per_kg")`` is written, following ``[table]`` and
``[[array]]`` headers, so that validation messages can point at it.
"""

from __future__ import annotations

import re
import tomllib
from pathlib import Path
from typing import Any

from probeplan.errors import input_error

__all__ = ["load_toml", "parse_toml_text", "line_of", "format_path", "MAX_TOML_BYTES"]

#: Largest TOML file read (bytes): a plan or rules file is a few kB.
MAX_TOML_BYTES = 4 * 1024 * 1024

_HEADER_RE = re.compile(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")
_KEY_RE = re.compile(r"^\s*([A-Za-z0-9_\-\"'. ]+?)\s*=")
_PART_RE = re.compile(r"\s*(\"[^\"]*\"|'[^']*'|[A-Za-z0-9_\-]+)\s*\.?")


def _split(raw: str) -> tuple[str, ...]:
    parts, pos = [], 0
    raw = raw.strip()
    while pos < len(raw):
        m = _PART_RE.match(raw, pos)
        if m is None or m.end() == pos:
            return ()
        part = m.group(1)
        parts.append(part[1:-1] if part[0] in "\"'" else part)
        pos = m.end()
    return tuple(parts)


def format_path(path: tuple[Any, ...]) -> str:
    """``("probes", 2, "dose")`` → ``"probes[2].dose"``.

    Examples
    --------
    >>> format_path(("probes", 2, "dose_nmol_per_kg"))
    'probes[2].dose_nmol_per_kg'
    """
    out = ""
    for part in path:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out


def line_of(text: str, path: tuple[Any, ...]) -> int | None:
    """1-based line where ``path`` is written, or of the nearest enclosing table; None if not found.

    Examples
    --------
    >>> text = "[[probes]]\\nname = 'a'\\n[[probes]]\\nname = 'b'\\ndose = 1\\n"
    >>> line_of(text, ("probes", 1, "dose"))
    5
    """
    counts: dict[tuple[str, ...], int] = {}
    table: tuple[Any, ...] = ()
    best, best_len = None, 0
    target = tuple(path)
    for number, line in enumerate(text.splitlines(), start=1):
        header = _HEADER_RE.match(line)
        if header:
            names = _split(header.group(2))
            if not names:
                continue
            resolved: list[Any] = []
            for i, name in enumerate(names):
                resolved.append(name)
                prefix = tuple(p for p in resolved if not isinstance(p, int))
                if header.group(1) == "[[" and i == len(names) - 1:
                    counts[prefix] = counts.get(prefix, -1) + 1
                    resolved.append(counts[prefix])
                elif prefix in counts and i < len(names) - 1:
                    resolved.append(counts[prefix])
            table = tuple(resolved)
            here = table
        else:
            key = _KEY_RE.match(line)
            if not key:
                continue
            parts = _split(key.group(1))
            if not parts:
                continue
            here = table + parts
        if here and target[: len(here)] == here and len(here) > best_len:
            best, best_len = number, len(here)
            if here == target:
                return number
    return best


def parse_toml_text(text: str, *, source: str) -> dict[str, Any]:
    """Parse TOML text; syntax errors become an InputError naming ``source`` and the line."""
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        message = str(exc)
        m = re.search(r"line (\d+)", message)
        where = f"{source}:{m.group(1)}" if m else source
        raise input_error(where, f"is not valid TOML ({message})", "fix the syntax there") from None
    except ValueError as exc:  # e.g. an integer of more digits than Python converts
        raise input_error(source, f"is not usable TOML ({exc})", "write numbers of a sensible size") from None


def load_toml(path: str | Path, *, what: str = "TOML file") -> tuple[dict[str, Any], str]:
    """Read and parse a TOML file; return (data, text).

    Raises
    ------
    InputError
        Missing, unreadable, too large, not UTF-8, empty, or invalid TOML.
    """
    from probeplan.io.text import read_text_input

    p = Path(path)
    text = read_text_input(p, what=what, max_bytes=MAX_TOML_BYTES)
    if not text.strip():
        raise input_error(str(p), "is empty", "write the plan's tables, starting from the demo plan")
    return parse_toml_text(text, source=str(p)), text
