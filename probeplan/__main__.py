"""``python -m probeplan``."""

from probeplan.cli.main import console

console()
