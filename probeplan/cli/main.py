"""The ``probeplan`` command line: a thin layer over the library.

Each subcommand lives in :mod:`probeplan.cli.commands` as a module with ``HELP``
(one line), ``add_arguments(parser)`` and ``run(args) -> int``; modules there
are discovered automatically.  Heavy imports stay inside ``run``.

Exit codes: 0 success, 1 a check found a problem, 2 bad input or usage (one
line on stderr naming the file, field and fix; ``--debug`` re-raises).

Around every command :func:`main` puts the same guards, so that a command gets them
by using the package's helpers:

* numeric options are checked against :data:`probeplan.cli.common.OPTION_RANGES`
  before the command starts;
* an output policy: no existing file is replaced unless this run wrote it or the
  command's ``--overwrite`` (:func:`probeplan.cli.common.add_output_options`) is given;
* an output batch: the files the run writes appear together when it ends without an
  error, none when it fails or is interrupted (:mod:`probeplan.io.atomic`);
* an error while writing (read-only or missing folder, full disk, a folder in the way)
  or running out of memory is one line and exit status 2, like bad input;
* what third-party libraries print on stderr (log records, warnings, thread and
  event-loop messages) is held back; ``--debug`` shows all of it and the traceback.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import io
import logging
import os
import pkgutil
import re
import sys
import warnings
from collections.abc import Iterator, Sequence

from probeplan import RESEARCH_USE_CAUTION, __version__
from probeplan.errors import InputError

__all__ = ["main", "console", "build_parser", "as_flags", "EXIT_OK", "EXIT_PROBLEM", "EXIT_BAD_INPUT"]

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


#: Modules whose writes to stderr reach the user (the package's own messages and its progress bars).
_OWN_MODULES = ("probeplan", "tqdm", "app", "__main__")
#: Modules that only pass a write on (their callers decide).
_PASS_THROUGH = ("io", "_io", "codecs", "encodings", "contextlib")


def _from_own_code(frame) -> bool:
    while frame is not None:
        name = frame.f_globals.get("__name__", "") or ""
        if name.split(".")[0] not in _PASS_THROUGH:
            return name.split(".")[0] in _OWN_MODULES
        frame = frame.f_back
    return False


class _QuietStderr(io.TextIOBase):
    """Stands in for ``sys.stderr`` while a command runs: what the package writes reaches the
    user; what other libraries write (log handlers, ``warnings``, thread and event-loop
    messages) is dropped.  ``drop_all`` silences everything (after the command has ended)."""

    def __init__(self, real) -> None:
        super().__init__()
        self.real = real
        self.drop_all = False

    def write(self, text: str) -> int:  # type: ignore[override]
        if not self.drop_all and _from_own_code(sys._getframe(1)):
            return self.real.write(text)
        return len(text)

    def flush(self) -> None:
        with contextlib.suppress(Exception):
            self.real.flush()

    def isatty(self) -> bool:
        return bool(getattr(self.real, "isatty", lambda: False)())

    def fileno(self) -> int:
        return self.real.fileno()

    @property
    def encoding(self) -> str:  # type: ignore[override]
        return getattr(self.real, "encoding", "utf-8")

    def writable(self) -> bool:
        return True


@contextlib.contextmanager
def _quiet_third_party(debug: bool) -> Iterator[None]:
    """Hold back what other libraries print while a command runs (nothing held with ``--debug``)."""
    if debug:
        yield
        return
    real = sys.stderr
    quiet = _QuietStderr(real)
    thread_hook, unraisable_hook = None, sys.unraisablehook
    import threading

    thread_hook = threading.excepthook
    sys.stderr = quiet
    threading.excepthook = lambda args: None
    sys.unraisablehook = lambda args: None
    # log handlers a library set up before the command (bound to the terminal) write through the filter too
    swapped = []
    for logger in [logging.getLogger(), *logging.root.manager.loggerDict.values()]:
        for handler in getattr(logger, "handlers", []):
            if isinstance(handler, logging.StreamHandler) and handler.stream in (real, sys.__stderr__):
                swapped.append((handler, handler.setStream(quiet)))
    try:
        with warnings.catch_warnings():
            # the package's own warnings are shown as one line; other libraries' are dropped
            from probeplan.errors import ProbeplanWarning

            def show(message, category, filename, lineno, file=None, line=None):
                if issubclass(category, ProbeplanWarning):
                    real.write(f"warning: {_one_line(str(message))}\n")

            warnings.showwarning = show
            yield
    finally:
        for handler, stream in swapped:
            handler.setStream(stream)
        sys.stderr = real
        threading.excepthook = thread_hook
        sys.unraisablehook = unraisable_hook


def _command_modules() -> list[tuple[str, object]]:
    import probeplan.cli.commands as pkg

    names = [m.name for m in pkgutil.iter_modules(pkg.__path__) if not m.name.startswith("_")]
    names.sort(key=lambda n: (_ORDER.index(n) if n in _ORDER else len(_ORDER), n))
    # a module name's underscores become hyphens on the command line (depth_from_spectrum -> depth-from-spectrum)
    return [(n.replace("_", "-"), importlib.import_module(f"probeplan.cli.commands.{n}")) for n in names]


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
        flags = frozenset(opt for action in p._actions for opt in action.option_strings)
        p.set_defaults(_run=module.run, _flags=flags)  # type: ignore[attr-defined]
    return parser


def as_flags(exc: InputError, flags: frozenset[str] = frozenset()) -> str:
    """The error's message with the parameter it names replaced by the command's flag for it.

    The library names parameters (``roi``, ``out``, ``probes[1]``); the command line
    says which of its options to change.  Names the command has no flag for stay.

    Examples
    --------
    >>> from probeplan.errors import input_error
    >>> as_flags(input_error("roi", "'x' is not 'name:x0,y0,x1,y1'", "give e.g. 'a:0,0,5,5'"), frozenset({"--roi"}))
    "--roi: 'x' is not 'name:x0,y0,x1,y1'; give e.g. 'a:0,0,5,5'"
    """
    from probeplan.cli.model_options import FLAGS

    text = str(exc)
    key = getattr(exc, "key", None)
    if key:
        flag = FLAGS.get(str(key[0]))
        if flag in flags:
            text = f"{flag}: {exc.detail}"  # type: ignore[attr-defined]
    else:
        match = re.match(r"^([A-Za-z_][A-Za-z0-9_]*): ", text)
        if match and FLAGS.get(match.group(1)) in flags:
            text = FLAGS[match.group(1)] + text[len(match.group(1)):]
    # a fix that says "give channel_axis=2" becomes "give --channel-axis 2"
    return re.sub(r"\b([a-z_]+)=(\S+)",
                  lambda m: f"{FLAGS[m.group(1)]} {m.group(2)}" if FLAGS.get(m.group(1)) in flags else m.group(0), text)


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
    from probeplan.cli.common import check_option_ranges
    from probeplan.io.atomic import output_batch, output_policy

    # tifffile logs each defect of a damaged file: held back, shown after a success, dropped
    # after a refusal (whose one line says what matters); --debug shows them as they come.
    tiff_log, held = logging.getLogger("tifffile"), _HeldRecords()
    propagate = tiff_log.propagate
    if not debug:
        tiff_log.addHandler(held)
        tiff_log.propagate = False
    prefix = f"probeplan {args.command}"
    try:
        with _quiet_third_party(debug):
            check_option_ranges(args, _subparser(parser, args.command))
            with output_policy(overwrite=bool(getattr(args, "overwrite", False)), option="--overwrite"), output_batch():
                code = int(args._run(args))
        for message in dict.fromkeys(r.getMessage() for r in held.records):
            sys.stderr.write(f"{prefix}: tifffile: {message}\n")
        return code
    except InputError as exc:
        if debug:
            raise
        sys.stderr.write(f"{prefix}: error: {_one_line(as_flags(exc, getattr(args, '_flags', frozenset())))}\n")
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        if debug:
            raise
        sys.stderr.write(f"{prefix}: interrupted; no partial output was left\n")
        return 130
    except BrokenPipeError:
        return EXIT_OK
    except MemoryError:
        if debug:
            raise
        sys.stderr.write(f"{prefix}: error: not enough memory for this input; "
                         "give smaller inputs or a lower --memory-mb where the command has it\n")
        return EXIT_BAD_INPUT
    except OSError as exc:  # a disk or file error no helper turned into an InputError
        if debug:
            raise
        where = exc.filename or "a file"
        reason = (exc.strerror or type(exc).__name__).rstrip(".").lower()
        sys.stderr.write(f"{prefix}: error: {where}: {reason}; check the path, its folder and the free disk space\n")
        return EXIT_BAD_INPUT
    finally:
        tiff_log.removeHandler(held)
        tiff_log.propagate = propagate


def _subparser(parser: argparse.ArgumentParser, command: str) -> argparse.ArgumentParser:
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            return action.choices[command]
    raise KeyError(command)  # pragma: no cover


def _one_line(message: str) -> str:
    """A refusal on one line (a file name or a library's message can hold line breaks)."""
    return " ".join(message.split())


def console() -> None:  # pragma: no cover - the installed ``probeplan`` script and ``python -m probeplan``
    """Entry point of the ``probeplan`` script: run :func:`main`, then exit quietly.

    After the command has ended, what other libraries print while the interpreter shuts
    down (event loops and threads closing) is dropped too, unless ``--debug`` is given.
    """
    code = main()
    sys.stdout.flush()
    sys.stderr.flush()
    if "--debug" not in sys.argv[1:]:
        quiet = _QuietStderr(sys.stderr)
        quiet.drop_all = True
        sys.stderr = quiet
        with contextlib.suppress(OSError):
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, 2)
    sys.exit(code)
