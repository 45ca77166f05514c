"""``probeplan demo``: the whole job on the invented demo study."""

from __future__ import annotations

import argparse

HELP = "run the whole job on the invented demo study and write a report folder"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    from probeplan.cli.common import add_output_options
    from probeplan.demo import DEFAULT_DEMO_OUT

    parser.add_argument("--out", default=DEFAULT_DEMO_OUT, help=f"output folder (default: ./{DEFAULT_DEMO_OUT})")
    parser.add_argument("--json", action="store_true", help="print what was written as JSON")
    add_output_options(parser)


def run(args: argparse.Namespace) -> int:
    from probeplan import RESEARCH_USE_CAUTION
    from probeplan.cli.common import print_json
    from probeplan.demo import run_demo

    result = run_demo(args.out)
    if args.json:
        print_json({"out_dir": str(result.out_dir), "report": str(result.report),
                    "files": [str(f) for f in result.files]})
    else:
        print(RESEARCH_USE_CAUTION)
        summary = result.summary
        qc = summary.get("qc", {})
        verdict = "every rule passes" if result.rules_passed else "some rules FAIL (see the report)"
        print(f"1. plan checked against the demo institution's rules: {verdict}")
        recovery = "; ".join(f"{r['component']} {100 * r['within_2_sigma']:.1f} %" for r in summary.get("recovery", []))
        print(f"2. stack unmixed ({qc.get('method', '')}, {qc.get('n_pixels', 0)} pixels, condition number "
              f"{qc.get('condition_number', float('nan')):.3g}); pixels within ±2σ of the known truth: {recovery}")
        print(f"3. ROI statistics and the overlay written under {result.out_dir / 'unmix'}")
        study = summary.get("study", {})
        if study:
            worst = max((abs(r["ratio"] - 1) for r in study["tbr_check"]), default=float("nan"))
            print(f"4. demo study: {study['acquisitions']} acquisitions (two groups, several animals and time points) "
                  f"unmixed, compared and fitted; tumour TBR within {100 * worst:.1f} % of the known truth; "
                  f"study report: {study['report']}")
        print(f"5. {len(result.files)} files written in {result.out_dir}")
        print(f"demo finished; report: {result.report.resolve()}")
    return 0
