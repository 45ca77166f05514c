"""The study: plans, institutional rules, safety limits, animal numbers and the plan's evaluation.

Holds the plan schema (``plan``), the rules file (``rules``), skin exposure, injection and blood
sampling limits (``safety``), animals per group (``animals``), the evaluation of a plan
against the model and the rules (``evaluate``), the analysis of a whole study: the study
table (``table``), the runner over every acquisition (``runs``), group comparisons
(``stats``), time-course fits (``kinetics``) and the result tables read back with their
columns checked (``results``); the phantom calibration to µM (``calibration``), a phantom for a
plan (``phantom``), the plan's predictions beside the measurements (``closure``) and a target's
depth from its channel ratios (``depth_spectrum``).
It may import :mod:`probeplan.model`, :mod:`probeplan.catalog`, :mod:`probeplan.unmixing`,
:mod:`probeplan.io` and the foundations; never the report or command line.
"""

__all__: list[str] = []
