"""Choosing probes, filters and source: the exhaustive search with exact branch-and-bound pruning.

Holds the search over candidate sets (``search``) and its compiled engine (``branch_bound``).
It may import :mod:`probeplan.model` (the skin limit is :mod:`probeplan.model.skin_limit`),
:mod:`probeplan.catalog`, :mod:`probeplan.io` and the foundations; never the study, report or
command line.
"""

__all__: list[str] = []
