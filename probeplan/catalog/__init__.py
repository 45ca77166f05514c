"""Names to objects: every lookup of a tissue, chromophore, material, probe, filter, source or camera.

Holds the shipped and user library (``library``) and the one builder of an imaging set-up from a
user's words (``setup``), used alike by the command line, the plan evaluation and the page.
It may import :mod:`probeplan.model` and :mod:`probeplan.io`; model functions never import it.
"""

__all__: list[str] = []
