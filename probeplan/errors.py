"""The package's one error class and its warnings.

Every refusal of bad input raises :class:`InputError`, a :class:`ValueError`
subclass whose message names where the problem is (file and line, or the
parameter or key path), what was found, and how to fix it.  Valid but doubtful
requests (outside a model's validity range) emit a :class:`ProbeplanWarning`
subclass instead.
"""

from __future__ import annotations

__all__ = [
    "InputError",
    "ProbeplanWarning",
    "ModelValidityWarning",
    "AssumptionWarning",
    "input_error",
]


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
