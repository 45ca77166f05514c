"""``probeplan check``: check a study plan against the institution's rules; the exit code says whether it passes."""

from __future__ import annotations

import argparse

HELP = "check a study plan against the institution's rules (exit 0 all pass, 1 a rule fails, 2 bad input)"

_EPILOG = (
    "Every rule the plan touches is listed with its value, limit, unit, result and source; limits that are "
    "probeplan's example values (not set by the institution) are marked 'example only'. Exit status: 0 every rule "
    "passes, 1 at least one fails, 2 the plan or rules file cannot be used (one line naming the file, line, key and "
    "fix). For research use only: the animal care committee, laser safety officer and local regulations decide."
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = _EPILOG
    parser.add_argument("plan", metavar="PLAN", help="study plan (TOML), e.g. demo_tissue/plan.toml")
    parser.add_argument("--rules", metavar="RULES",
                        help="the institution's rules file (TOML); without it probeplan's defaults are used")
    parser.add_argument("--json", action="store_true", help="print every check and note as JSON")


def check_rows(evaluation) -> list[dict]:
    """The rule table as printed: result 'pass'/'FAIL', example-only limits marked in the source."""
    rows = []
    for c in evaluation.checks:
        rows.append({
            "rule": c.rule_id, "description": c.description, "value": c.value, "comparison": c.comparison,
            "limit": c.limit, "unit": c.unit, "result": "pass" if c.passed else "FAIL",
            "source": _marked(c),
        })
    return rows


def _marked(check) -> str:
    """The source, with '(example only)' added to a limit the institution has not set."""
    if check.example_only and "example only" not in check.source:
        return f"{check.source} (example only)"
    return check.source


def run(args: argparse.Namespace) -> int:
    from probeplan import RESEARCH_USE_CAUTION
    from probeplan.cli.common import print_json, print_table
    from probeplan.study.evaluate import evaluate_plan
    from probeplan.study.plan import load_plan
    from probeplan.study.rules import load_rules

    plan = load_plan(args.plan)
    rules = load_rules(args.rules)
    ev = evaluate_plan(plan, rules)
    code = 0 if ev.passed else 1
    if args.json:
        out = {"caution": RESEARCH_USE_CAUTION, **ev.as_dict()}
        out.pop("tables")
        print_json(out)
        return code
    print(RESEARCH_USE_CAUTION)
    print(f"plan: {args.plan}; rules: {', '.join(rules.files) or 'probeplan defaults'}\n")
    print_table(check_rows(ev), ["rule", "description", "value", "comparison", "limit", "unit", "result", "source"])
    print()
    if ev.passed:
        print(f"all {len(ev.checks)} rule checks pass")
    else:
        ids = ", ".join(dict.fromkeys(c.rule_id for c in ev.failed))
        print(f"{len(ev.failed)} of {len(ev.checks)} rule checks FAIL: {ids}")
    for w in ev.warnings:
        print(f"warning: {w}")
    return code
