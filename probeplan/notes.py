"""The one way the package's warnings become notes: collected while a block runs, kept as text.

The library warns (:class:`~probeplan.errors.ProbeplanWarning` and its subclasses) where a model is
used near the edge of its validity or rests on an assumption.  The command line, the plan
evaluation, the report and the page show those warnings as note lines instead; they all collect
them with :func:`collect_notes`.  Warnings of other kinds pass through unchanged, with their
original file and line.
"""

from __future__ import annotations

import contextlib
import warnings
from collections.abc import Iterator

from probeplan.errors import ProbeplanWarning

__all__ = ["collect_notes"]


@contextlib.contextmanager
def collect_notes(notes: list[str] | None = None, *, with_category: bool = False) -> Iterator[list[str]]:
    """Collect the package's warnings raised inside the block into a list of unique note lines.

    Parameters
    ----------
    notes : list of str, optional
        Append to this list (default: a new one); lines already in it are not repeated.
    with_category : bool
        Prefix each line with the warning's class (``"AssumptionWarning: ..."``).

    Yields
    ------
    list of str
        Filled, in the order the warnings came, when the block ends.

    Examples
    --------
    >>> import warnings
    >>> from probeplan.errors import AssumptionWarning
    >>> with collect_notes() as notes:
    ...     warnings.warn("held at the 1000 nm value", AssumptionWarning)
    ...     warnings.warn("held at the 1000 nm value", AssumptionWarning)
    >>> notes
    ['held at the 1000 nm value']
    """
    out: list[str] = [] if notes is None else notes
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ProbeplanWarning)
        yield out
    for w in caught:
        if issubclass(w.category, ProbeplanWarning):
            text = f"{w.category.__name__}: {w.message}" if with_category else str(w.message)
            if text not in out:
                out.append(text)
        else:
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
