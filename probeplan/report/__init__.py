"""What the user reads: the self-contained HTML/PDF report, its tables and the shared figures.

Holds the report document with its tables and cautions (``document``), the study report
(``study``) and the figures used by the report, the command line and the page (``figures``).
It may import everything below it (model, catalog, unmixing, design, study); never the command line.
"""

__all__: list[str] = []
