"""The study: plans, institutional rules, safety limits, animal numbers and the plan's evaluation.

Holds the plan schema (``plan``), the rules file (``rules``), skin exposure, injection and blood
sampling limits (``safety``), animals per group (``animals``) and the evaluation of a plan
against the model and the rules (``evaluate``).
It may import :mod:`probeplan.model`, :mod:`probeplan.catalog`, :mod:`probeplan.unmixing`,
:mod:`probeplan.io` and the foundations; never the report or command line.
"""

__all__: list[str] = []
