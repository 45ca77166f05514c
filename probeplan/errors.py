"""The package's one error class and its warnings.

Every refusal of bad input raises :class:`InputError`, a :class:`ValueError`
subclass whose message names where the problem is (file and line, or the
parameter or key path), what was found, and how to fix it.  Valid but doubtful
requests (outside a model's validity range) emit a :class:`ProbeplanWarning`
subclass instead.
"""

from __future__ import annotations

import difflib
import functools
import math
import sys
import warnings
from collections.abc import Iterable
from pathlib import Path
from typing import Any

__all__ = [
    "InputError",
    "ProbeplanWarning",
    "ModelValidityWarning",
    "AssumptionWarning",
    "ScatteringRangeWarning",
    "ProbeAbsorptionWarning",
    "input_error",
    "did_you_mean",
    "positive_number",
    "warn_at_caller",
]

#: The package's own folder: frames inside it are skipped when a warning is attributed.
_PACKAGE_DIR = str(Path(__file__).resolve().parent)


class InputError(ValueError):
    """Bad input: a value, shape, file or key the package cannot use.

    The message is one line: ``<where>: <problem>; <fix>``.
    """


class ProbeplanWarning(UserWarning):
    """Base class of the package's warnings."""


class ModelValidityWarning(ProbeplanWarning):
    """A model is used outside the range where it is known to be accurate."""


class AssumptionWarning(ProbeplanWarning):
    """A result rests on a stated approximation (e.g. an extrapolated table)."""


class ScatteringRangeWarning(ModelValidityWarning):
    """A tissue's scattering law is used outside the wavelength range its source measured."""


class ProbeAbsorptionWarning(AssumptionWarning):
    """The probe's own absorption raises the tissue's absorption noticeably (more than 10 %)."""


def input_error(where: str, problem: str, fix: str) -> InputError:
    """Build an :class:`InputError` with the package's one-line message format.

    Parameters
    ----------
    where : str
        The file and line (``"plan.toml:12"``), the parameter name, or the key path.
    problem : str
        What was found, showing the offending value.
    fix : str
        What the user should do.

    Examples
    --------
    >>> str(input_error("depth_mm", "got -1.0, expected >= 0", "give a depth below the surface"))
    'depth_mm: got -1.0, expected >= 0; give a depth below the surface'
    """
    return InputError(f"{where}: {problem}; {fix}")


def positive_number(name: str, value: Any, *, allow_zero: bool = False) -> float:
    """``value`` as a finite float > 0 (or >= 0 with ``allow_zero``), else an error naming ``name``.

    Raises
    ------
    TypeError
        For a bool or something that is not a number.
    InputError
        For NaN, inf, a negative value, or zero when not allowed.

    Examples
    --------
    >>> positive_number("exposure_s", 0.5)
    0.5
    >>> positive_number("exposure_s", -1)
    Traceback (most recent call last):
    ...
    probeplan.errors.InputError: exposure_s: got -1; give a finite number > 0
    """
    if isinstance(value, bool):
        raise TypeError(f"{name}: expected a number, got {value!r}")
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise TypeError(f"{name}: expected a number, got {value!r}") from None
    if not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        raise input_error(name, f"got {value!r}", "give a finite number " + (">= 0" if allow_zero else "> 0"))
    return v


def did_you_mean(name: Any, choices: Iterable[Any], *, cutoff: float = 0.5, listing: str | None = None) -> str:
    """The fix part of an unknown-name message: the closest choice, then the valid ones.

    The package's one "did you mean" helper: every lookup by name (tissues,
    materials, cameras, filters, rules, plan keys, options) words its refusal
    with it.

    Parameters
    ----------
    name : str
        What was asked for.
    choices : iterable of str
        The valid names.
    cutoff : float
        Similarity (0-1) a choice needs to be suggested (:func:`difflib.get_close_matches`).
    listing : str, optional
        Said instead of the list of valid names (for long lists kept in a file).

    Examples
    --------
    >>> did_you_mean("skn", ["skin", "brain"])
    "did you mean 'skin'? valid: 'skin', 'brain'"
    >>> did_you_mean("zebrafish", ["mouse", "rat"])
    "valid: 'mouse', 'rat'"
    """
    choices = [str(c) for c in choices]
    name = str(name)
    close = difflib.get_close_matches(name, choices, n=1, cutoff=cutoff)
    if not close:
        lowered = {str(c).lower(): c for c in choices}
        if str(name).lower() in lowered:
            close = [lowered[str(name).lower()]]
    hint = f"did you mean {close[0]!r}? " if close else ""
    if listing is not None:
        return f"{hint}{listing}"
    shown = ", ".join(repr(c) for c in choices[:30]) + (", ..." if len(choices) > 30 else "")
    return f"{hint}valid: {shown}"


@functools.lru_cache(maxsize=1024)
def _inside_package(filename: str) -> bool:
    """True when the code file lies inside the package (resolved once per file: the model warns often)."""
    return str(Path(filename).resolve()).startswith(_PACKAGE_DIR)


def warn_at_caller(message: str | Warning, category: type[Warning] = ProbeplanWarning) -> None:
    """Warn, attributing the warning to the first line outside the package (the caller's own code).

    A fixed ``stacklevel`` points at the right line only for one call depth; the package's
    functions call each other, so the level is counted here: every frame whose file lies inside
    the package is skipped.  (Python 3.12's ``skip_file_prefixes`` does the same; the package
    supports 3.11.)

    Examples
    --------
    >>> import warnings
    >>> with warnings.catch_warnings(record=True) as caught:
    ...     warnings.simplefilter("always")
    ...     warn_at_caller("held at the 1000 nm value", AssumptionWarning)
    >>> caught[0].category.__name__, caught[0].filename.startswith("<doctest")  # this example's own line
    ('AssumptionWarning', True)
    """
    level = 2  # 1 is this function, 2 its caller; then one more per frame inside the package
    frame = sys._getframe(1)
    while frame is not None and _inside_package(frame.f_code.co_filename):
        frame = frame.f_back
        level += 1
    warnings.warn(message, category, stacklevel=level)
