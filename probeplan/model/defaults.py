"""Assumed values the model falls back on when the user gives none (a light module: no numpy).

Kept apart from :mod:`probeplan.model.fluorescence` so that the command line can show them as its
options' defaults without loading the model.
"""

from __future__ import annotations

__all__ = ["DEFAULT_CONCENTRATION_UM"]

#: Probe concentration in the target (µM) assumed when none is given: the one default of the library, the
#: command line and the page.  10 nM is of the order reached in a tumour a day after an intravenous dose of
#: about 1 nmol of dots (a few % of the injected dose per gram; typical, an assumption to replace with the
#: study's own value).
DEFAULT_CONCENTRATION_UM = 0.01
