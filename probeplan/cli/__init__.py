"""The ``probeplan`` command line: a thin layer that parses options, calls the library and prints.

Holds the entry point (:mod:`probeplan.cli.main`), helpers shared by the commands
(:mod:`probeplan.cli.common`) and one module per subcommand in :mod:`probeplan.cli.commands`.
It may import anything in the package; nothing in the package imports it.
"""

from probeplan.cli.main import main

__all__ = ["main"]
