"""The report as a PDF a committee can read, typeset with reportlab's page layout engine (platypus).

Real tables (ruled, header row repeated on each page, text wrapped in its cell, numbers
right-aligned and written by :func:`probeplan.report.document.format_number`), wrapped
paragraphs, the figures scaled to the page, "page N of M" and the research-use caution
in every footer.  Tables wider than the page are split into parts that repeat their
first column.  The text font is DejaVu Sans as shipped with matplotlib (it has µ, ², ⁻,
≤ and ∞, which the PDF standard fonts lack).
"""

from __future__ import annotations

import io
from pathlib import Path
from typing import Any

from probeplan import RESEARCH_USE_CAUTION, __version__

__all__ = ["report_pdf_bytes", "MAX_COLUMNS"]

#: The most columns a table part holds on a portrait page (the first column repeats in every part).
MAX_COLUMNS = 7
_FONT, _BOLD = "ProbeplanSans", "ProbeplanSans-Bold"


def _fonts() -> None:
    from matplotlib import get_data_path
    from reportlab.pdfbase import pdfmetrics
    from reportlab.pdfbase.ttfonts import TTFont

    if _FONT in pdfmetrics.getRegisteredFontNames():
        return
    ttf = Path(get_data_path()) / "fonts" / "ttf"
    pdfmetrics.registerFont(TTFont(_FONT, str(ttf / "DejaVuSans.ttf")))
    pdfmetrics.registerFont(TTFont(_BOLD, str(ttf / "DejaVuSans-Bold.ttf")))
    pdfmetrics.registerFontFamily(_FONT, normal=_FONT, bold=_BOLD, italic=_FONT, boldItalic=_BOLD)


def _styles():
    from reportlab.lib import colors
    from reportlab.lib.styles import ParagraphStyle

    base = ParagraphStyle("body", fontName=_FONT, fontSize=9.5, leading=12.5, spaceAfter=4)
    return {
        "title": ParagraphStyle("title", parent=base, fontName=_BOLD, fontSize=16, leading=20, spaceAfter=4),
        "sub": ParagraphStyle("sub", parent=base, textColor=colors.HexColor("#555555")),
        "h1": ParagraphStyle("h1", parent=base, fontName=_BOLD, fontSize=13, leading=16, spaceBefore=10, spaceAfter=5),
        "h2": ParagraphStyle("h2", parent=base, fontName=_BOLD, fontSize=11, leading=14, spaceBefore=8, spaceAfter=3,
                             keepWithNext=1),
        "body": base,
        "caution": ParagraphStyle("caution", parent=base, backColor=colors.HexColor("#fdf3e7"), borderPadding=4,
                                  borderColor=colors.HexColor("#b35806"), borderWidth=0.6, spaceBefore=4,
                                  spaceAfter=8),
        "placeholder": ParagraphStyle("placeholder", parent=base, backColor=colors.HexColor("#fff8d6"),
                                      borderPadding=3, borderColor=colors.HexColor("#8a6d00"), borderWidth=0.5,
                                      borderDash=(2, 2), spaceBefore=2, spaceAfter=6),
        "note": ParagraphStyle("note", parent=base, fontSize=8, leading=10, textColor=colors.HexColor("#444444"),
                               keepWithNext=1),
        "caption": ParagraphStyle("caption", parent=base, fontSize=8, leading=10, textColor=colors.HexColor("#444444")),
        "cell": ParagraphStyle("cell", parent=base, fontSize=7.5, leading=9, spaceAfter=0),
        "cellnum": ParagraphStyle("cellnum", parent=base, fontSize=7.5, leading=9, spaceAfter=0, alignment=2),
        "head": ParagraphStyle("head", parent=base, fontName=_BOLD, fontSize=7.5, leading=9, spaceAfter=0),
    }


def _esc(text: Any) -> str:
    from xml.sax.saxutils import escape

    return escape(str(text))


def _cell_text(value: Any) -> tuple[str, bool]:
    """(text, is_number) of one cell."""
    from probeplan.format import format_number

    if value is None:
        return "–", False
    if isinstance(value, bool):
        return ("yes" if value else "no"), False
    if isinstance(value, (int, float)):
        return (format_number(float(value)) if isinstance(value, float) else str(value)), True
    return str(value), False


def _table_flowables(table, styles, width: float) -> list:
    from reportlab.lib import colors
    from reportlab.platypus import Paragraph, Spacer, TableStyle
    from reportlab.platypus import Table as PdfTable

    from probeplan.format import column_label

    cols = table.cols()
    if len(table.rows) == 1 and len(cols) > MAX_COLUMNS:  # one wide row reads better as quantity | value
        from probeplan.io.tables import Table

        row = table.rows[0]
        table = Table(table.name, table.title, [{"quantity": column_label(c), "value": row.get(c)} for c in cols],
                      ["quantity", "value"], table.note)
        cols = table.cols()
    out: list = [Paragraph(_esc(table.title), styles["h2"])]
    if table.note:
        out.append(Paragraph(_esc(table.note), styles["note"]))
    if not cols:
        return out
    first, rest = cols[0], cols[1:]
    per = MAX_COLUMNS - 1
    parts = [rest[i:i + per] for i in range(0, len(rest), per)] or [[]]
    for n, part in enumerate(parts):
        use = [first, *part]
        data = [[Paragraph(_esc(column_label(c)), styles["head"]) for c in use]]
        texts = [[_cell_text(row.get(c))[0] for c in use] for row in table.rows]
        # column widths follow their text: the longest header word or the typical cell, within bounds
        weights = []
        for j, c in enumerate(use):
            cells = sorted(len(t[j]) for t in texts) or [0]
            longest_word = max((len(w) for w in column_label(c).split()), default=4)
            weights.append(min(45.0, max(8.0, longest_word * 1.5, cells[(len(cells) * 3) // 4])))
        total_w = sum(weights)
        fails = []
        for r, row in enumerate(table.rows, start=1):
            line = []
            for j, c in enumerate(use):
                v = row.get(c)
                if c in ("passed", "result", "enough") and isinstance(v, (bool, str)):
                    ok = v is True or v == "pass"
                    if not ok:
                        fails.append((j, r))
                    v = "pass" if ok else "FAIL"
                text, is_num = _cell_text(v)
                line.append(Paragraph(_esc(text), styles["cellnum" if is_num else "cell"]))
            data.append(line)
        t = PdfTable(data, colWidths=[width * w / total_w for w in weights], repeatRows=1, hAlign="LEFT")
        style = [
            ("GRID", (0, 0), (-1, -1), 0.4, colors.HexColor("#bbbbbb")),
            ("BACKGROUND", (0, 0), (-1, 0), colors.HexColor("#eeeeee")),
            ("VALIGN", (0, 0), (-1, -1), "TOP"),
            ("TOPPADDING", (0, 0), (-1, -1), 2), ("BOTTOMPADDING", (0, 0), (-1, -1), 2),
        ]
        style += [("BACKGROUND", (j, r), (j, r), colors.HexColor("#f8d7d3")) for j, r in fails]
        t.setStyle(TableStyle(style))
        if len(parts) > 1:
            out.append(Paragraph(f"part {n + 1} of {len(parts)}", styles["note"]))
        out += [t, Spacer(1, 6)]
    return out


def report_pdf_bytes(report) -> bytes:
    """The report (:class:`probeplan.report.document.Report`) as PDF bytes (A4 portrait).

    Order: title, cautions, the narrative (placeholders marked for the institution),
    the summary, the tables, the figures with their captions, the assumptions.
    """
    from reportlab.lib.pagesizes import A4
    from reportlab.lib.units import mm
    from reportlab.lib.utils import ImageReader
    from reportlab.platypus import Image, KeepTogether, ListFlowable, ListItem, PageBreak, Paragraph, SimpleDocTemplate

    from probeplan.report.protocol import PLACEHOLDER

    _fonts()
    styles = _styles()
    buf = io.BytesIO()
    doc = SimpleDocTemplate(buf, pagesize=A4, leftMargin=18 * mm, rightMargin=18 * mm, topMargin=16 * mm,
                            bottomMargin=20 * mm, title=report.title, author=f"probeplan {__version__}",
                            subject="study plan report")
    width = doc.width

    def make_story() -> list:
        story: list = [Paragraph(_esc(report.title), styles["title"])]
        if report.subtitle:
            story.append(Paragraph(_esc(report.subtitle), styles["sub"]))
        for text in [RESEARCH_USE_CAUTION, *report.cautions]:
            story.append(Paragraph(_esc(text), styles["caution"]))

        def bullets(items):
            return ListFlowable([ListItem(Paragraph(_esc(i), styles["body"]), leftIndent=10) for i in items],
                                bulletType="bullet", start="•", leftIndent=10)

        if report.narrative:
            story.append(Paragraph("Protocol", styles["h1"]))
            for sec in report.narrative:
                story.append(Paragraph(_esc(sec.title), styles["h2"]))
                story += [Paragraph(_esc(p), styles["body"]) for p in sec.paragraphs]
                story += [Paragraph(f"<b>{_esc(PLACEHOLDER)}:</b> {_esc(p)}", styles["placeholder"])
                          for p in sec.placeholders]
            story.append(PageBreak())
            story.append(Paragraph("Results", styles["h1"]))
        if report.summary:
            story += [Paragraph("Summary", styles["h2"]), bullets(report.summary)]
        for table in report.tables:
            story += _table_flowables(table, styles, width)
        for caption, png in report.figures:
            img = ImageReader(io.BytesIO(png))
            w, h = img.getSize()
            scale = min(width / w, (doc.height * 0.8) / h)
            story.append(KeepTogether([Image(io.BytesIO(png), width=w * scale, height=h * scale),
                                       Paragraph(_esc(caption), styles["caption"])]))
        if report.assumptions:
            story += [Paragraph("Assumptions", styles["h1"]), bullets(report.assumptions)]

        return story

    def footer(canvas, _doc, total=None):
        canvas.saveState()
        canvas.setFont(_FONT, 7)
        canvas.drawString(doc.leftMargin, 10 * mm, f"probeplan {__version__} · {report.title[:70]} · "
                          "for research use only")
        text = f"page {canvas.getPageNumber()}" + (f" of {total}" if total else "")
        canvas.drawRightString(A4[0] - doc.rightMargin, 10 * mm, text)
        canvas.restoreState()

    # Two passes: the first counts the pages, the second writes "page N of M".
    counter = SimpleDocTemplate(io.BytesIO(), pagesize=A4, leftMargin=doc.leftMargin, rightMargin=doc.rightMargin,
                                topMargin=doc.topMargin, bottomMargin=doc.bottomMargin)
    counter.build(make_story(), onFirstPage=footer, onLaterPages=footer)
    total = counter.page
    doc.build(make_story(), onFirstPage=lambda c, d: footer(c, d, total), onLaterPages=lambda c, d: footer(c, d, total))
    return buf.getvalue()
