"""``probeplan demo``: the whole job on the invented demo study."""

from __future__ import annotations

import argparse

HELP = "run the whole job on the invented demo study and write a report folder"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    from probeplan.demo import DEFAULT_DEMO_OUT

    parser.add_argument("--out", default=DEFAULT_DEMO_OUT, help=f"output folder (default: ./{DEFAULT_DEMO_OUT})")
    parser.add_argument("--json", action="store_true", help="print what was written as JSON")


def run(args: argparse.Namespace) -> int:
    from probeplan import RESEARCH_USE_CAUTION
    from probeplan.commands._common import print_json
    from probeplan.demo import run_demo

    result = run_demo(args.out)
    if args.json:
        print_json({"out_dir": str(result.out_dir), "report": str(result.report),
                    "files": [str(f) for f in result.files]})
    else:
        print(RESEARCH_USE_CAUTION)
        for f in result.files:
            print(f"wrote {f}")
        print(f"demo finished; report: {result.report.resolve()}")
    return 0
