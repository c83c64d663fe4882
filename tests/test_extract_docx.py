"""DOCX extraction on documents built here with python-docx."""

from __future__ import annotations

import io

import docx
from docx.oxml.ns import qn
from docx.oxml import OxmlElement

from thresher.steps.extract import ExtractParams, extract
from thresher.steps.spec import StepContext
from thresher.steps.units import BLOCK_SEP, HEADING, OK, PARAGRAPH, TABLE, Source


def one(data: bytes, name: str = "policy.docx"):
    source = Source(doc_id="d", source_path=f"hr/{name}", data=data, size=len(data), mtime=0.0)
    pages = extract(source, ExtractParams(), StepContext())
    assert len(pages) == 1
    return pages[0]


def save(document) -> bytes:
    buf = io.BytesIO()
    document.save(buf)
    return buf.getvalue()


def leave_policy() -> bytes:
    d = docx.Document()
    d.core_properties.title = "Staff Leave Policy"
    d.add_paragraph("Leave at Quillfern", style="Title")
    d.add_heading("Annual leave", level=1)
    d.add_paragraph("Staff receive 25 days of annual leave.")
    d.add_paragraph("Request leave two weeks ahead.", style="List Bullet")
    d.add_paragraph("Record it in the rota.", style="List Bullet")
    d.add_heading("Carry-over", level=2)
    table = d.add_table(rows=3, cols=3)
    for r, row in enumerate([["Years of service", "Days", "Carry-over"],
                             ["Under 5", "25", "5"], ["5 or more", "28", "5"]]):
        for j, text in enumerate(row):
            table.cell(r, j).text = text
    d.add_paragraph("Unused days beyond the carry-over lapse.\nAsk HR for exceptions.")
    d.add_heading("Sick leave", level=3)
    d.add_paragraph("")  # empty paragraphs are skipped
    d.add_paragraph("Tell your coordinator on the first morning.")
    return save(d)


def test_headings_lists_tables_in_document_order():
    page = one(leave_policy())
    assert page.status == OK and page.format == "docx"
    assert page.locator == "file" and page.page is None
    assert page.title == "Staff Leave Policy"
    assert [(b.kind, b.level, b.text) for b in page.blocks] == [
        (HEADING, 1, "Leave at Quillfern"),  # Title style
        (HEADING, 1, "Annual leave"),
        (PARAGRAPH, 0, "Staff receive 25 days of annual leave."),
        (PARAGRAPH, 0, "- Request leave two weeks ahead.\n- Record it in the rota."),
        (HEADING, 2, "Carry-over"),
        (TABLE, 0, "Years of service | Days | Carry-over\nUnder 5 | 25 | 5\n5 or more | 28 | 5"),
        (PARAGRAPH, 0, "Unused days beyond the carry-over lapse.\nAsk HR for exceptions."),
        (HEADING, 3, "Sick leave"),
        (PARAGRAPH, 0, "Tell your coordinator on the first morning."),
    ]
    # Table text is in the table only.
    assert sum("Years of service" in b.text for b in page.blocks) == 1
    assert page.payload["method"] == "docx" and page.payload["encoding"] == ""
    assert all(BLOCK_SEP not in b.text for b in page.blocks)


def test_merged_cells_appear_once():
    d = docx.Document()
    table = d.add_table(rows=3, cols=3)
    for r, row in enumerate([["Branch", "Mon", "Tue"], ["East", "9-17", "9-17"], ["West", "", ""]]):
        for j, text in enumerate(row):
            table.cell(r, j).text = text
    merged = table.cell(2, 1).merge(table.cell(2, 2))
    merged.text = "closed"
    down = table.cell(1, 0).merge(table.cell(2, 0))
    down.text = "East and West"
    page = one(save(d))
    assert page.blocks[0].text == "Branch | Mon | Tue\nEast and West | 9-17 | 9-17\n | closed | "


def test_outline_level_marks_a_heading_in_a_custom_style():
    d = docx.Document()
    p = d.add_paragraph("Rota rules")
    ppr = p._p.get_or_add_pPr()
    level = OxmlElement("w:outlineLvl")
    level.set(qn("w:val"), "1")  # 0-based: a level-2 heading
    ppr.append(level)
    d.add_paragraph("Swap shifts on the board.")
    page = one(save(d), "rota.docx")
    assert [(b.kind, b.level) for b in page.blocks] == [(HEADING, 2), (PARAGRAPH, 0)]
    assert page.title == "Rota rules"  # no core title: the first heading


def test_single_row_table_reads_as_text():
    d = docx.Document()
    table = d.add_table(rows=1, cols=2)
    table.cell(0, 0).text = "Signed:"
    table.cell(0, 1).text = "Coordinator"
    page = one(save(d))
    assert [(b.kind, b.text) for b in page.blocks] == [(PARAGRAPH, "Signed: Coordinator")]


def test_empty_document_is_ok_with_a_warning():
    page = one(save(docx.Document()), "blank.docx")
    assert page.status == OK and page.blocks == []
    assert page.title == "blank"
    assert page.warnings == ["no text (the document body is empty)"]
