"""Self-contained reports: one HTML file with plots embedded, plus CSV and JSON of every table.

A :class:`Report` collects sections of text, tables (lists of row dicts) and
matplotlib figures; :func:`write_report` writes ``report.html`` (nothing in it
is fetched from a network: figures are inline PNG, styles inline), one CSV per
table, and ``report.json`` with every table and note.  All files are written
atomically.  Every report opens with the research-use-only caution and the
reminder of who decides; a heavy-metal caution is added when the study uses a
cadmium- or lead-containing probe.
"""

from __future__ import annotations

import base64
import html
import io
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from probeplan import RESEARCH_USE_CAUTION, __version__
from probeplan.errors import input_error
from probeplan.format import column_label, format_number
from probeplan.io.atomic import make_output_folder, output_batch, write_csv_atomic, write_json_atomic, write_text_atomic
from probeplan.io.tables import Table

__all__ = ["Report", "Table", "write_report", "format_number", "HEAVY_METAL_CAUTION", "LASER_CAUTION",
           "figure_png_bytes", "plan_report", "report_pdf_bytes", "column_label"]

#: Shown whenever a plan uses a Cd- or Pb-containing probe.
HEAVY_METAL_CAUTION = (
    "This study uses a probe containing {metals}. Cadmium and lead are toxic heavy metals: the institution's "
    "chemical safety office and animal care committee set the allowed dose, handling, carcass and waste disposal. "
    "Dots larger than about 5.5 nm hydrodynamic diameter are not cleared by the kidneys and are retained "
    "(Choi et al., Nat. Biotechnol. 25, 1165, 2007; figure from memory)."
)
#: Shown on every report that involves laser excitation.
LASER_CAUTION = (
    "Laser light can injure skin and eyes. The skin limits here follow the published maximum permissible exposure "
    "rules; eye exposure is not assessed. The laser safety officer approves the set-up, eyewear and controls."
)


@dataclass
class Report:
    """Everything one report shows, in order."""

    title: str
    subtitle: str = ""
    cautions: list[str] = field(default_factory=list)
    summary: list[str] = field(default_factory=list)
    tables: list[Table] = field(default_factory=list)
    figures: list[tuple[str, bytes]] = field(default_factory=list)
    assumptions: list[str] = field(default_factory=list)
    extra_files: dict[str, bytes] = field(default_factory=dict)
    #: The narrative first part (:class:`probeplan.report.protocol.Section` objects), before the results.
    narrative: list = field(default_factory=list)

    def add_table(self, name: str, title: str, rows: list[dict[str, Any]], columns: list[str] | None = None,
                  note: str = "") -> None:
        """Add a table; ``name`` becomes its CSV file name (letters, digits, ``_``)."""
        if not re.fullmatch(r"[A-Za-z0-9_]+", name):
            raise input_error("table name", f"got {name!r}", "use letters, digits and underscores")
        self.tables.append(Table(name, title, rows, columns, note))

    def add_figure(self, caption: str, fig) -> None:
        """Add a matplotlib figure (rendered to PNG now, then closed)."""
        self.figures.append((caption, figure_png_bytes(fig)))


def figure_png_bytes(fig, *, dpi: int = 110, tight: bool = True, compress_level: int = 6) -> bytes:
    """Render a matplotlib figure to PNG bytes and close it.

    ``tight`` crops the margins to the drawn content (``bbox_inches="tight"``, which draws the
    figure twice); a figure with fixed margins is drawn once with ``tight=False``.
    ``compress_level`` is zlib's (0-9, Pillow's default 6); 1 encodes about twice as fast for a
    few per cent more bytes (the page, which redraws often).
    """
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight" if tight else None,
                pil_kwargs={"compress_level": int(compress_level)})
    plt.close(fig)
    return buf.getvalue()


def _cell(value: Any) -> str:
    if value is None:
        return "–"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return format_number(value)
    return html.escape(str(value))



_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,sans-serif;max-width:1400px;margin:2em auto;padding:0 1em;
color:#1b1b1b;line-height:1.45}
.scroll{overflow-x:auto;max-width:100%}
h1{margin-bottom:.1em} .sub{color:#555;margin-top:0}
.caution{border-left:6px solid #b35806;background:#fdf3e7;padding:.6em 1em;margin:.6em 0}
table{border-collapse:collapse;margin:.5em 0 1.2em;font-size:.85em}
th,td{border:1px solid #ccc;padding:.25em .6em;text-align:left;vertical-align:top} th{background:#f0f0f0}
td{min-width:4em;max-width:34em} td.num{white-space:nowrap;text-align:right}
td.fail{background:#f8d7d3;font-weight:600} td.pass{background:#dcefe0}
figure{margin:1em 0} figcaption{color:#444;font-size:.9em} img{max-width:100%}
.note{color:#555;font-size:.9em} footer{color:#777;font-size:.85em;margin-top:3em}
.placeholder{border:1px dashed #8a6d00;background:#fff8d6;padding:.3em .6em;margin:.4em 0}
"""


def _placeholder_word() -> str:
    from probeplan.report.protocol import PLACEHOLDER

    return PLACEHOLDER


def render_html(report: Report) -> str:
    """The report as one self-contained HTML document."""
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{html.escape(report.title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{html.escape(report.title)}</h1>",
    ]
    if report.subtitle:
        parts.append(f"<p class='sub'>{html.escape(report.subtitle)}</p>")
    for text in [RESEARCH_USE_CAUTION, *report.cautions]:
        parts.append(f"<div class='caution'>{html.escape(text)}</div>")
    if report.narrative:
        parts.append("<h2>Protocol</h2>")
        for sec in report.narrative:
            parts.append(f"<h3>{html.escape(sec.title)}</h3>")
            parts += [f"<p>{html.escape(p)}</p>" for p in sec.paragraphs]
            parts += [f"<p class='placeholder'><b>{html.escape(_placeholder_word())}:</b> {html.escape(p)}</p>"
                      for p in sec.placeholders]
        parts.append("<h2>Results</h2>")
    if report.summary:
        parts.append("<h2>Summary</h2><ul>" + "".join(f"<li>{html.escape(s)}</li>" for s in report.summary) + "</ul>")
    for table in report.tables:
        parts.append(f"<h2>{html.escape(table.title)}</h2>")
        if table.note:
            parts.append(f"<p class='note'>{html.escape(table.note)}</p>")
        cols = table.cols()
        parts.append("<div class='scroll'><table><tr>" + "".join(f"<th>{html.escape(column_label(c))}</th>"
                                                                 for c in cols) + "</tr>")
        for row in table.rows:
            cells = []
            for c in cols:
                v = row.get(c, "")
                cls = ""
                if c in ("passed", "result") and isinstance(v, (bool, str)):
                    ok = v is True or v == "pass"
                    cls = " class='pass'" if ok else " class='fail'"
                    v = "pass" if ok else "FAIL"
                if not cls and isinstance(v, (int, float)) and not isinstance(v, bool):
                    cls = " class='num'"
                cells.append(f"<td{cls}>{_cell(v)}</td>")
            parts.append("<tr>" + "".join(cells) + "</tr>")
        parts.append(f"</table></div><p class='note'>Also in {html.escape(table.name)}.csv</p>")
    for caption, png in report.figures:
        data = base64.b64encode(png).decode("ascii")
        parts.append(f"<figure><img alt='{html.escape(caption)}' src='data:image/png;base64,{data}'>"
                     f"<figcaption>{html.escape(caption)}</figcaption></figure>")
    if report.assumptions:
        parts.append("<h2>Assumptions</h2><ul>"
                     + "".join(f"<li>{html.escape(a)}</li>" for a in report.assumptions) + "</ul>")
    parts.append(f"<footer>Written by probeplan {__version__}. {html.escape(RESEARCH_USE_CAUTION)}</footer>")
    parts.append("</body></html>")
    return "\n".join(parts)


def write_report(report: Report, out_dir: str | Path) -> dict[str, Path]:
    """Write ``report.html``, ``report.json`` and one CSV per table into ``out_dir``.

    The folder is created if missing.  The files are written as one group
    (:func:`probeplan.io.atomic.output_batch`): all of them appear, or none.

    Returns
    -------
    dict
        File role → path (``"html"``, ``"json"``, and each table's name).
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise input_error("out", f"{str(out)!r} is a file", "give a folder for the report")
    with output_batch():  # every file of the report appears together, or none does
        make_output_folder(out)
        return _write_report_files(report, out)


def _write_report_files(report: Report, out: Path) -> dict[str, Path]:
    written: dict[str, Path] = {}
    for table in report.tables:
        written[table.name] = write_csv_atomic(out / f"{table.name}.csv", table.rows, table.cols())
    for name, data in report.extra_files.items():
        from probeplan.io.atomic import write_bytes_atomic

        written[name] = write_bytes_atomic(out / name, data)
    written["json"] = write_json_atomic(out / "report.json", {
        "title": report.title,
        "subtitle": report.subtitle,
        "cautions": [RESEARCH_USE_CAUTION, *report.cautions],
        "summary": report.summary,
        "tables": {t.name: {"title": t.title, "rows": t.rows, "note": t.note} for t in report.tables},
        "narrative": [{"title": sec.title, "paragraphs": sec.paragraphs, "to_complete": sec.placeholders}
                      for sec in report.narrative],
        "assumptions": report.assumptions,
        "probeplan_version": __version__,
    })
    written["html"] = write_text_atomic(out / "report.html", render_html(report))
    return written


# ---------------------------------------------------------------------------
# The study plan report
# ---------------------------------------------------------------------------

#: Columns of the rule table, in order.
_CHECK_COLUMNS = ["rule", "description", "value", "comparison", "limit", "unit", "passed", "source", "example_only"]


def plan_report(evaluation) -> Report:
    """The report of an evaluated study plan (:func:`probeplan.study.evaluate.evaluate_plan`).

    Cautions (research use only, who decides, laser, heavy metals when a Cd- or
    Pb-containing probe is used), a summary with the failed rules and the
    predicted problems, the rule table, every evaluation table, the SBR/SNR/blur
    against depth figure (target depth marked), the spectra/filters/crosstalk
    figure, and the model assumptions.  Figures are rendered now, so building
    the report does all the work before anything is written.
    """
    from probeplan.model.fluorescence import DEFAULT_SBR_THRESHOLD, emission_grid_nm
    from probeplan.report.figures import channels_figure, depth_figure

    ev = evaluation
    plan = ev.plan
    study = plan.study
    subtitle = " · ".join(x for x in (study.get("protocol_id", ""), f"plan {plan.path}" if plan.path else "",
                                      "rules: " + (", ".join(ev.rules.files) or "probeplan defaults")) if x)
    report = Report(title=study["title"], subtitle=subtitle)
    if plan.acquisition["source"] == "laser":
        report.cautions.append(LASER_CAUTION)
    else:
        report.cautions.append("Bright LED excitation can also heat skin and harm eyes; the skin limits here are the "
                               "laser maximum permissible exposure rules, applied as a planning figure.")
    if ev.heavy_metals:
        report.cautions.append(HEAVY_METAL_CAUTION.format(metals=" and ".join(
            {"Cd": "cadmium", "Pb": "lead"}.get(m, m) for m in ev.heavy_metals)))
    from probeplan.unmixing.pipeline import DEPTH_COMPARISON_CAUTION

    report.cautions.append(DEPTH_COMPARISON_CAUTION)
    if any(c.example_only for c in ev.checks):
        report.cautions.append("Some limits are probeplan's example values (marked example only): the institution "
                               "must set its own in a rules file (--rules).")
    n_fail = len(ev.failed)
    if n_fail:
        report.summary.append(f"{n_fail} of {len(ev.checks)} rule checks FAIL: "
                              + "; ".join(f"{c.rule_id} ({c.description}: {c.value:.4g} {c.comparison} "
                                          f"{c.limit:.4g} {c.unit} does not hold)" for c in ev.failed))
    else:
        report.summary.append(f"All {len(ev.checks)} rule checks pass.")
    if study.get("description"):
        report.summary.append(study["description"])
    report.summary += [f"Predicted problem: {w}" for w in ev.warnings]
    rows = []
    for c in ev.checks:
        row = c.as_row()
        if c.example_only and "example only" not in c.source:
            row["source"] = f"{row['source']} (example only)"
        rows.append(row)
    report.add_table("checks", "Rules checked", rows, _CHECK_COLUMNS,
                     note="Each value is compared with the limit as shown; 'example only' marks a probeplan example "
                          "value the institution has not set.")
    for table in ev.tables:
        report.add_table(table.name, table.title, table.rows, table.columns, note=table.note)
    depth = plan.target["depth_mm"]
    fig = depth_figure(ev.profiles, sbr_threshold=DEFAULT_SBR_THRESHOLD, target_depth_mm=depth)
    report.add_figure(f"SBR, SNR and blur against target depth in {plan.target['tissue']}, each probe in its own "
                      f"channel; dotted line: the target depth ({depth:g} mm); dashed: SBR "
                      f"{DEFAULT_SBR_THRESHOLD:g} (common practice, not a standard).", fig)
    rep = ev.channel_report
    model = ev.model
    fig = channels_figure(emission_grid_nm(model.probes), model.probes, model.channels, rep.crosstalk[0],
                          rep.probe_names, rep.channel_names, depth_mm=depth)
    report.add_figure("Emission spectra with the emission filter bands and the excitation line (left); crosstalk "
                      f"at the target depth ({depth:g} mm) (right).", fig)
    from probeplan.report.protocol import plain_assumptions, protocol_sections

    report.narrative = protocol_sections(ev)
    report.assumptions = plain_assumptions(ev.assumptions)
    return report


def report_pdf_bytes(report: Report) -> bytes:
    """The report as a PDF a committee can read: :func:`probeplan.report.pdf.report_pdf_bytes` (reportlab)."""
    from probeplan.report.pdf import report_pdf_bytes as _pdf

    return _pdf(report)
