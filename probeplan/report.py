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
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from probeplan import RESEARCH_USE_CAUTION, __version__
from probeplan.errors import input_error
from probeplan.outputs import write_csv_atomic, write_json_atomic, write_text_atomic

__all__ = ["Report", "Table", "write_report", "HEAVY_METAL_CAUTION", "LASER_CAUTION", "figure_png_bytes"]

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
class Table:
    """A named table: rows of dicts with the same keys; ``columns`` fixes their order."""

    name: str
    title: str
    rows: list[dict[str, Any]]
    columns: list[str] | None = None
    note: str = ""

    def cols(self) -> list[str]:
        """The column order."""
        return self.columns or (list(self.rows[0]) if self.rows else [])


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

    def add_table(self, name: str, title: str, rows: list[dict[str, Any]], columns: list[str] | None = None,
                  note: str = "") -> None:
        """Add a table; ``name`` becomes its CSV file name (letters, digits, ``_``)."""
        if not re.fullmatch(r"[A-Za-z0-9_]+", name):
            raise input_error("table name", f"got {name!r}", "use letters, digits and underscores")
        self.tables.append(Table(name, title, rows, columns, note))

    def add_figure(self, caption: str, fig) -> None:
        """Add a matplotlib figure (rendered to PNG now, then closed)."""
        self.figures.append((caption, figure_png_bytes(fig)))


def figure_png_bytes(fig, *, dpi: int = 110) -> bytes:
    """Render a matplotlib figure to PNG bytes and close it."""
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight")
    plt.close(fig)
    return buf.getvalue()


def _cell(value: Any) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        if math.isnan(value):
            return "–"
        if math.isinf(value):
            return "∞" if value > 0 else "−∞"
        if value != 0 and (abs(value) >= 1e5 or abs(value) < 1e-3):
            return f"{value:.3e}"
        return f"{value:.4g}"
    return html.escape(str(value))


_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;
color:#1b1b1b;line-height:1.45}
h1{margin-bottom:.1em} .sub{color:#555;margin-top:0}
.caution{border-left:6px solid #b35806;background:#fdf3e7;padding:.6em 1em;margin:.6em 0}
table{border-collapse:collapse;margin:.5em 0 1.2em;font-size:.92em}
th,td{border:1px solid #ccc;padding:.25em .6em;text-align:left} th{background:#f0f0f0}
td.fail{background:#f8d7d3;font-weight:600} td.pass{background:#dcefe0}
figure{margin:1em 0} figcaption{color:#444;font-size:.9em} img{max-width:100%}
.note{color:#555;font-size:.9em} footer{color:#777;font-size:.85em;margin-top:3em}
"""


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
    if report.summary:
        parts.append("<h2>Summary</h2><ul>" + "".join(f"<li>{html.escape(s)}</li>" for s in report.summary) + "</ul>")
    for table in report.tables:
        parts.append(f"<h2>{html.escape(table.title)}</h2>")
        if table.note:
            parts.append(f"<p class='note'>{html.escape(table.note)}</p>")
        cols = table.cols()
        parts.append("<table><tr>" + "".join(f"<th>{html.escape(c)}</th>" for c in cols) + "</tr>")
        for row in table.rows:
            cells = []
            for c in cols:
                v = row.get(c, "")
                cls = ""
                if c in ("passed", "result") and isinstance(v, (bool, str)):
                    ok = v is True or v == "pass"
                    cls = " class='pass'" if ok else " class='fail'"
                    v = "pass" if ok else "FAIL"
                cells.append(f"<td{cls}>{_cell(v)}</td>")
            parts.append("<tr>" + "".join(cells) + "</tr>")
        parts.append(f"</table><p class='note'>Also in {html.escape(table.name)}.csv</p>")
    for caption, png in report.figures:
        data = base64.b64encode(png).decode("ascii")
        parts.append(f"<figure><img alt='{html.escape(caption)}' src='data:image/png;base64,{data}'>"
                     f"<figcaption>{html.escape(caption)}</figcaption></figure>")
    if report.assumptions:
        parts.append("<h2>Model assumptions</h2><ul>"
                     + "".join(f"<li>{html.escape(a)}</li>" for a in report.assumptions) + "</ul>")
    parts.append(f"<footer>Written by probeplan {__version__}. {html.escape(RESEARCH_USE_CAUTION)}</footer>")
    parts.append("</body></html>")
    return "\n".join(parts)


def write_report(report: Report, out_dir: str | Path) -> dict[str, Path]:
    """Write ``report.html``, ``report.json`` and one CSV per table into ``out_dir``.

    The folder is created if missing.  Every file is written atomically; the
    HTML is written last, so its presence means the report is complete.

    Returns
    -------
    dict
        File role → path (``"html"``, ``"json"``, and each table's name).
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise input_error("--out", f"{str(out)!r} is a file", "give a folder for the report")
    out.mkdir(parents=True, exist_ok=True)
    written: dict[str, Path] = {}
    for table in report.tables:
        written[table.name] = write_csv_atomic(out / f"{table.name}.csv", table.rows, table.cols())
    for name, data in report.extra_files.items():
        from probeplan.outputs import write_bytes_atomic

        written[name] = write_bytes_atomic(out / name, data)
    written["json"] = write_json_atomic(out / "report.json", {
        "title": report.title,
        "subtitle": report.subtitle,
        "cautions": [RESEARCH_USE_CAUTION, *report.cautions],
        "summary": report.summary,
        "tables": {t.name: {"title": t.title, "rows": t.rows, "note": t.note} for t in report.tables},
        "assumptions": report.assumptions,
        "probeplan_version": __version__,
    })
    written["html"] = write_text_atomic(out / "report.html", render_html(report))
    return written
