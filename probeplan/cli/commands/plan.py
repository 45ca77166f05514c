"""``probeplan plan``: evaluate a study plan and write its report (HTML, CSV of every table, JSON, optional PDF)."""

from __future__ import annotations

import argparse

HELP = "evaluate a study plan against the rules and write the report folder (HTML, CSV, JSON)"

_EPILOG = (
    "Writes OUT/report.html (self-contained: figures embedded, nothing fetched from a network), one CSV per table, "
    "OUT/report.json and, with --pdf, OUT/report.pdf. Exit status 0 when the report is written, EVEN WHEN RULES FAIL "
    "(the report shows each failure; use 'probeplan check' for an exit status that fails with the rules); 2 when the "
    "plan or rules file cannot be used, and then nothing is written (a folder that did not exist is not created). "
    "For research use only: the animal care committee, laser safety officer and local regulations decide."
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    from probeplan.cli.common import add_output_options

    parser.epilog = _EPILOG
    parser.add_argument("plan", metavar="PLAN", help="study plan (TOML), e.g. demo_tissue/plan.toml")
    parser.add_argument("--out", required=True, metavar="DIR", help="folder for the report (created if missing)")
    parser.add_argument("--rules", metavar="RULES",
                        help="the institution's rules file (TOML); without it probeplan's defaults are used")
    parser.add_argument("--pdf", action="store_true", help="also write report.pdf (tables as text, figures)")
    parser.add_argument("--json", action="store_true", help="print the result and the files written as JSON")
    add_output_options(parser)


def run(args: argparse.Namespace) -> int:
    import shutil
    from pathlib import Path

    from probeplan import RESEARCH_USE_CAUTION
    from probeplan.cli.common import print_json
    from probeplan.errors import input_error
    from probeplan.io.atomic import check_outputs, refuse_input_paths
    from probeplan.report.document import plan_report, report_pdf_bytes, write_report
    from probeplan.study.evaluate import evaluate_plan
    from probeplan.study.plan import load_plan
    from probeplan.study.rules import load_rules

    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise input_error("--out", f"{str(out)!r} is a file", "give a folder for the report")
    plan = load_plan(args.plan)
    rules = load_rules(args.rules)
    # Evaluate and render everything before the first byte is written.
    ev = evaluate_plan(plan, rules)
    report = plan_report(ev)
    if args.pdf:
        report.extra_files["report.pdf"] = report_pdf_bytes(report)
    targets = [out / f"{t.name}.csv" for t in report.tables] + [out / n for n in report.extra_files]
    targets += [out / "report.json", out / "report.html"]
    refuse_input_paths(targets, [p for p in (args.plan, args.rules) if p])
    if out.is_dir():
        check_outputs(targets)
    # The outermost folder this command creates, removed again if writing fails.
    created = None
    for folder in (out, *out.absolute().parents):
        if folder.exists():
            break
        created = folder
    try:
        written = write_report(report, out)
    except BaseException:
        if created is not None:
            shutil.rmtree(created, ignore_errors=True)
        raise
    if args.json:
        print_json({"caution": RESEARCH_USE_CAUTION, "report": str(written["html"]), "passed": ev.passed,
                    "failed": [c.rule_id for c in ev.failed], "warnings": ev.warnings,
                    "files": sorted(str(p) for p in written.values())})
        return 0
    print(RESEARCH_USE_CAUTION)
    if ev.passed:
        print(f"all {len(ev.checks)} rule checks pass")
    else:
        print(f"{len(ev.failed)} of {len(ev.checks)} rule checks FAIL (shown in the report): "
              f"{', '.join(dict.fromkeys(c.rule_id for c in ev.failed))}")
    for w in ev.warnings:
        print(f"warning: {w}")
    print(f"report: {written['html']}  ({len(written)} files in {out})")
    return 0
