"""Names to objects: every lookup of a tissue, chromophore, material, probe, filter, source or camera.

Holds the shipped and user library (``library``), the resolvers of written names
(``resolve``: ``"skin"``, ``"CdTe:700@em.csv"``, ``"700/30"``, camera names), the one builder of an
imaging set-up from plain values (``setup``), used alike by the command line, the plan evaluation
and the page, and the model's entry points with names accepted (``api``, re-exported by
``import probeplan``).
It may import :mod:`probeplan.model` and :mod:`probeplan.io`; model functions never import it.
"""

__all__: list[str] = []
