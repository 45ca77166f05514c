"""Choosing probes, filters and source: the exhaustive search with exact branch-and-bound pruning.

Holds the search over candidate sets (``search``) and its compiled engine (``branch_bound``).
It may import :mod:`probeplan.model`, :mod:`probeplan.catalog` and :mod:`probeplan.study.safety`
for the skin limit; never the report or command line.
"""

__all__: list[str] = []
