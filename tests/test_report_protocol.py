"""The report a protocol can quote: narrative first, results, then each assumption once in plain words; the PDF.

The numbers in the narrative are checked against the evaluation they come from and, for the
injection volume, against the dose arithmetic itself (V = dose × body mass / stock, the
Beer–Lambert-free unit bookkeeping of any pharmacology handbook: nmol/kg × kg / (µmol/L) = µL).
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from probeplan.report.document import plan_report, render_html, report_pdf_bytes
from probeplan.report.protocol import PLACEHOLDER, plain_assumptions, protocol_sections
from probeplan.study.evaluate import evaluate_plan
from probeplan.study.plan import load_plan

DEMO = Path(__file__).resolve().parents[1] / "demo_tissue" / "plan.toml"

ORDER = ["Aim", "Design: groups, animals and time points", "Justification of the animal numbers",
         "Probes, doses and injection volumes", "Light dose against the skin limit",
         "Imaging schedule and anaesthesia", "Humane endpoints", "Heavy-metal probes: handling and waste"]


@pytest.fixture(scope="module")
def evaluation():
    if not DEMO.is_file():
        pytest.skip("demo plan not in this checkout")
    return evaluate_plan(load_plan(DEMO))


def test_narrative_sections_in_protocol_order(evaluation):
    sections = protocol_sections(evaluation)
    assert [s.title for s in sections] == ORDER
    text = {s.title: " ".join(s.paragraphs) for s in sections}
    # design: two groups of 8 from the plan, 16 in all, three time points
    assert "vehicle (8 animals) and treated (8 animals); 16 animals in all" in text[ORDER[1]]
    assert "1 h, 49 h and 97 h" in text[ORDER[1]]
    # animal numbers: the evaluation's own per-group need, not the total row
    need = {r["group"]: r["needed_with_attrition"] for r in evaluation.table("animals").rows}
    assert f"{need['vehicle']} animals per group are needed" in text[ORDER[2]]
    # injection volume: 8 nmol/kg x 0.018 kg / 10 µM = 14.4 µL; x 0.026 kg = 20.8 µL
    assert "14.4–20.8 µL per animal" in text[ORDER[3]]
    # summed volume: 3 x 0.8 mL/kg = 2.4 mL/kg, written as 2.4 (not 2.4000000000000004)
    assert "2.4 mL/kg against a limit of 5 mL/kg" in text[ORDER[3]]
    assert "2.4000000000000004" not in " ".join(text.values())
    # light: irradiance and share of the skin limit come from the light table
    light = evaluation.table("light").rows[0]
    assert f"{light['wavelength_nm']:g} nm" in text[ORDER[4]] and "skin maximum permissible exposure" in text[ORDER[4]]
    # places only the institution can fill are marked, never invented
    humane = next(s for s in sections if s.title == "Humane endpoints")
    assert humane.placeholders and "Humane endpoints" in humane.placeholders[0]
    waste = next(s for s in sections if s.title.startswith("Heavy-metal"))
    assert "cadmium" in waste.paragraphs[0] and "disposal" in waste.placeholders[0]


def test_assumptions_once_each_in_plain_words(evaluation):
    report = plan_report(evaluation)
    assert report.assumptions
    assert not any(re.match(r"^[A-Z][A-Za-z]*Warning:", a) for a in report.assumptions)
    assert len(report.assumptions) == len(set(report.assumptions))
    transport = [a for a in report.assumptions if a.lower().startswith("light transport")]
    assert len(transport) == 1
    assert plain_assumptions(["AssumptionWarning: a thing", "a thing", "b"]) == ["A thing.", "B."]


def test_html_has_the_narrative_before_the_results(evaluation):
    page = render_html(plan_report(evaluation))
    assert page.index("<h2>Protocol</h2>") < page.index("<h2>Results</h2>") < page.index("<h2>Assumptions</h2>")
    assert PLACEHOLDER in page
    assert "<th>volume (µL)</th>" in page  # column names written with their units


def test_pdf_is_paginated_with_real_tables(evaluation):
    pdfium = pytest.importorskip("pypdfium2")
    data = report_pdf_bytes(plan_report(evaluation))
    assert data[:5] == b"%PDF-"
    pdf = pdfium.PdfDocument(data)
    n = len(pdf)
    assert n >= 3
    pages = [pdf[i].get_textpage().get_text_range() for i in range(n)]
    for i, text in enumerate(pages, start=1):
        assert f"page {i} of {n}" in text
    whole = "\n".join(pages)
    assert whole.index("Protocol") < whole.index("Results") < whole.index("Assumptions")
    assert "Rules checked" in whole and "2.4000000000000004" not in whole
    assert "µL" in whole and "mW/cm²" in whole  # the font has the units' characters
    assert "ModelValidityWarning" not in whole
