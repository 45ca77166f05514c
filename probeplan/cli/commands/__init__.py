"""Subcommands of the ``probeplan`` command line, one module each (see :mod:`probeplan.cli.main`)."""
