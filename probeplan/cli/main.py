"""The ``probeplan`` command line: a thin layer over the library.

Each subcommand lives in :mod:`probeplan.cli.commands` as a module with ``HELP``
(one line), ``add_arguments(parser)`` and ``run(args) -> int``; modules there
are discovered automatically.  Heavy imports stay inside ``run``.

Exit codes: 0 success, 1 a check found a problem, 2 bad input or usage (one
line on stderr naming the file, field and fix; ``--debug`` re-raises).
"""

from __future__ import annotations

import argparse
import importlib
import logging
import pkgutil
import sys
from collections.abc import Sequence

from probeplan import RESEARCH_USE_CAUTION, __version__
from probeplan.errors import InputError

__all__ = ["main", "build_parser", "EXIT_OK", "EXIT_PROBLEM", "EXIT_BAD_INPUT"]

EXIT_OK = 0
EXIT_PROBLEM = 1
EXIT_BAD_INPUT = 2

#: Order in which commands are listed by ``--help``; others follow alphabetically.
_ORDER = ("demo", "depth", "channels", "design", "dots", "unmix", "plan", "check", "library", "app")


class _Parser(argparse.ArgumentParser):
    """An ArgumentParser whose usage errors are one line and exit 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"{self.prog}: {message}; see '{self.prog} --help'\n")
        raise SystemExit(EXIT_BAD_INPUT)


class _HeldRecords(logging.Handler):
    """Keeps log records (warnings and above) instead of printing them."""

    def __init__(self) -> None:
        super().__init__(logging.WARNING)
        self.records: list[logging.LogRecord] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.records.append(record)


def _command_modules() -> list[tuple[str, object]]:
    import probeplan.cli.commands as pkg

    names = [m.name for m in pkgutil.iter_modules(pkg.__path__) if not m.name.startswith("_")]
    names.sort(key=lambda n: (_ORDER.index(n) if n in _ORDER else len(_ORDER), n))
    return [(n, importlib.import_module(f"probeplan.cli.commands.{n}")) for n in names]


def build_parser() -> argparse.ArgumentParser:
    """The full argument parser with every discovered subcommand."""
    parser = _Parser(
        prog="probeplan",
        description="Plan and analyse multiplexed in vivo fluorescence imaging with nanocrystal probes. "
        + RESEARCH_USE_CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"probeplan {__version__}")
    parser.add_argument("--debug", action="store_true", help="show the full traceback on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, module in _command_modules():
        p = sub.add_parser(name, help=module.HELP, description=module.HELP)  # type: ignore[attr-defined]
        module.add_arguments(p)  # type: ignore[attr-defined]
        p.set_defaults(_run=module.run)  # type: ignore[attr-defined]
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit code.

    Examples
    --------
    >>> main(["library", "show", "HbO2", "--json"]) == 0  # doctest: +ELLIPSIS
    {...
    True
    """
    argv = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in argv  # accepted anywhere on the line
    argv = [a for a in argv if a != "--debug"]
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:
        return int(exc.code or 0)
    if not getattr(args, "command", None):
        parser.print_help()
        return EXIT_BAD_INPUT
    # tifffile logs each defect of a damaged file: held back, shown after a success, dropped
    # after a refusal (whose one line says what matters); --debug shows them as they come.
    tiff_log, held = logging.getLogger("tifffile"), _HeldRecords()
    propagate = tiff_log.propagate
    if not debug:
        tiff_log.addHandler(held)
        tiff_log.propagate = False
    try:
        code = int(args._run(args))
        for message in dict.fromkeys(r.getMessage() for r in held.records):
            sys.stderr.write(f"probeplan {args.command}: tifffile: {message}\n")
        return code
    except InputError as exc:
        if debug:
            raise
        sys.stderr.write(f"probeplan {args.command}: error: {exc}\n")
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        if debug:
            raise
        sys.stderr.write(f"probeplan {args.command}: interrupted; no partial output was left\n")
        return 130
    except BrokenPipeError:
        return EXIT_OK
    finally:
        tiff_log.removeHandler(held)
        tiff_log.propagate = propagate
