"""Separating probes in image stacks: exact NNLS, least squares, references, ROIs and overlays.

Holds the batched NNLS and least-squares kernels (``nnls``), the stack and file pipeline with
dark/flat correction, standard errors and outputs (``pipeline``), reference spectra from CSV or
control stacks (``references``), regions of interest (``roi``: statistics and the one pixel rule;
``shapes``: drawn rectangles, ellipses and polygons; ``roifile``: the one ROI file format), overlay
images (``overlay``) and seeded synthetic stacks from the forward model (``synthetic``).
It may import :mod:`probeplan.model`, :mod:`probeplan.io` and the foundations; never the study,
report or command line.
"""

__all__: list[str] = []
