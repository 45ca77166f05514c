"""``probeplan app``: start the Streamlit page (loopback only unless asked otherwise)."""

from __future__ import annotations

import argparse

__all__ = ["HELP", "add_arguments", "run", "app_script", "streamlit_command", "LOOPBACK_HOSTS",
           "DEFAULT_PORT", "DEFAULT_MAX_UPLOAD_MB"]

HELP = "start the Streamlit page in a browser (bound to 127.0.0.1 unless --host says otherwise)"

#: Addresses that only this machine can reach.
LOOPBACK_HOSTS = ("127.0.0.1", "localhost", "::1")
DEFAULT_PORT = 8501
#: Largest upload the page accepts, MB (Streamlit's server.maxUploadSize).
DEFAULT_MAX_UPLOAD_MB = 500


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--port", type=int, default=DEFAULT_PORT, help=f"port to listen on (default {DEFAULT_PORT})")
    parser.add_argument("--host", default="127.0.0.1",
                        help="address to listen on (default 127.0.0.1: this machine only; the page has no "
                             "authentication, so think twice before opening it to a network)")
    parser.add_argument("--max-upload-mb", type=int, default=DEFAULT_MAX_UPLOAD_MB,
                        help=f"largest file the page accepts, in MB (default {DEFAULT_MAX_UPLOAD_MB})")


def app_script():
    """Path of ``app/main.py`` (next to the package in a source checkout).

    Raises
    ------
    InputError
        When the page is not there (a damaged installation).
    """
    from probeplan.errors import input_error
    from probeplan.io.shipped import shipped_folder

    path = shipped_folder("app") / "main.py"
    if not path.is_file():
        raise input_error("probeplan app", f"the page {path} is missing", "reinstall probeplan (pip install probeplan)")
    return path


def streamlit_command(script, *, host: str, port: int, max_upload_mb: int) -> list[str]:
    """The command line that starts Streamlit on ``script``."""
    import sys

    return [
        sys.executable, "-m", "streamlit", "run", str(script),
        "--server.headless", "true",
        "--browser.gatherUsageStats", "false",
        "--server.address", host,
        "--server.port", str(port),
        "--server.maxUploadSize", str(max_upload_mb),
        "--client.toolbarMode", "viewer",
    ]


def run(args: argparse.Namespace) -> int:
    import sys

    from probeplan import RESEARCH_USE_CAUTION
    from probeplan.errors import input_error

    if not 1 <= args.port <= 65535:
        raise input_error("--port", f"got {args.port}", "give a port number 1-65535 (e.g. 8501)")
    if args.max_upload_mb < 1:
        raise input_error("--max-upload-mb", f"got {args.max_upload_mb}", "give a size in MB of at least 1")
    host = str(args.host).strip()
    if not host:
        raise input_error("--host", "empty", "give an address such as 127.0.0.1")
    script = app_script()
    print(RESEARCH_USE_CAUTION)
    if host not in LOOPBACK_HOSTS:
        print(f"warning: the page will listen on {host}, reachable from other machines, and it has NO "
              "authentication: anyone who can reach it can use it and upload files. Use 127.0.0.1 unless the "
              "network is trusted.", file=sys.stderr)
    shown = f"[{host}]" if ":" in host else host
    print(f"starting the page at http://{shown}:{args.port}  (Ctrl+C stops it)", flush=True)
    return _launch(streamlit_command(script, host=host, port=args.port, max_upload_mb=args.max_upload_mb))


def _launch(command: list[str]) -> int:
    """Replace this process with Streamlit (POSIX: one process, one PID to stop), else wait for it."""
    import os
    import subprocess
    import sys

    sys.stdout.flush()
    sys.stderr.flush()
    if os.name == "posix":
        os.execv(command[0], command)  # does not return
    try:
        return subprocess.call(command)
    except KeyboardInterrupt:
        return 0
