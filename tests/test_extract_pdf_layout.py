"""PDF layout on pages built here with reportlab: columns, hyphenated line ends,
running headers with their removal records, tables in the payload."""

from __future__ import annotations

import io

from reportlab.lib.pagesizes import A4
from reportlab.pdfgen import canvas

from thresher.steps.extract import ExtractParams, extract
from thresher.steps.extract.pdf_layout import Vocabulary, join_lines
from thresher.steps.spec import StepContext
from thresher.steps.units import HEADING, OK, PARAGRAPH, TABLE, Source

W, H = A4


def run(data: bytes, **params):
    source = Source(doc_id="d", source_path="news/spring.pdf", data=data, size=len(data), mtime=0.0)
    return extract(source, ExtractParams(**params), StepContext())


LEFT = [
    "The spring programme opens at every branch",
    "in the first week of March, with readings,",
    "craft mornings and a lending amnesty for",
    "items that have been out since the autumn.",
    "Volunteers who want to host a session should",
    "tell their branch coordinator by the end of",
    "February, so that rooms can be booked and",
    "the printed leaflet can list every event on",
]
RIGHT = [
    "time. The leaflet goes to the printer on the",
    "twentieth and reaches the branches a week",
    "later; spare copies stay at the front desk.",
    "Lindle Cross will pilot an evening story",
    "hour for parents who work during the day,",
    "and Sorrel Wharf keeps its Saturday chess",
    "club, which now meets in the upper room",
    "beside the local history shelves.",
]
# Where a paragraph starts: first-line indents of 12 pt.
LEFT_INDENT = {0, 4}
RIGHT_INDENT = {3}


def two_column_pdf(right_drop: float = 0.0) -> bytes:
    """A title across the page, then two columns drawn line by line across both.

    The stream order interleaves the columns (left line, right line, ...), so a reader
    that follows the text stream or reads each baseline across the page mixes them.
    """
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4)
    c.setFont("Helvetica-Bold", 18)
    c.drawString(72, H - 72, "Spring at the branches")
    c.setFont("Times-Roman", 10)
    y = H - 110
    for k, (left, right) in enumerate(zip(LEFT, RIGHT)):
        c.drawString(72 + (12 if k in LEFT_INDENT else 0), y, left)
        c.drawString(320 + (12 if k in RIGHT_INDENT else 0), y - right_drop, right)
        y -= 12.5
    c.showPage()
    c.save()
    return buf.getvalue()


def joined(lines: list[str]) -> str:
    return " ".join(lines)


def test_two_columns_are_read_one_after_the_other():
    (page,) = run(two_column_pdf())
    assert page.status == OK
    assert page.payload["columns"] == 2
    assert [(b.kind, b.text) for b in page.blocks] == [
        (HEADING, "Spring at the branches"),
        (PARAGRAPH, joined(LEFT[:4])),
        # The paragraph at the foot of the left column goes on at the head of the right.
        (PARAGRAPH, joined(LEFT[4:] + RIGHT[:3])),
        (PARAGRAPH, joined(RIGHT[3:])),
    ]


def test_columns_whose_baselines_do_not_line_up():
    (page,) = run(two_column_pdf(right_drop=5.0))
    assert page.payload["columns"] == 2
    assert page.text.split("\n\n")[1:] == [joined(LEFT[:4]), joined(LEFT[4:] + RIGHT[:3]),
                                           joined(RIGHT[3:])]


def definition_list_pdf() -> bytes:
    """One column: terms at the left edge, their descriptions aligned further right."""
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4)
    c.setFont("Helvetica", 10)
    y = H - 72
    c.drawString(72, y, "Each branch keeps three kinds of loan record, described below in the order")
    c.drawString(72, y - 12, "in which the desk staff are expected to check them at the end of the day.")
    y -= 40
    for term, text in (("hold", "an item kept for a member"), ("renewal", "a loan made longer"),
                       ("transfer", "an item sent to another branch"), ("repair", "an item out for mending"),
                       ("loss", "an item a member reports lost"), ("recall", "an item asked back early")):
        c.drawString(72, y, term)
        c.drawString(250, y, text)
        y -= 14
    c.drawString(72, y - 10, "Records that do not fit any kind go to the branch coordinator for a decision.")
    c.showPage()
    c.save()
    return buf.getvalue()


def test_an_aligned_list_in_one_column_is_not_taken_for_columns():
    (page,) = run(definition_list_pdf())
    assert page.payload["columns"] == 1
    assert "hold an item kept for a member renewal a loan made longer" in page.text


def hyphen_pdf() -> bytes:
    """Line-end hyphens whose meaning the rest of the document settles."""
    lines = [
        "The built-in scanner and the co-operative's van are listed in the",
        "handbook, and the co-operative pays for both. Ask the coordinator",
        "before you move the built-",
        "in scanner; the coordinator will arrange it. Loans can be re-",
        "newed twice. Every co-",
        "operative branch keeps a co-",
        "ordinator on duty, and the Quillfern-",
        "Central desk handles ISO-",
        "8859 labels.",
    ]
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4)
    c.setFont("Helvetica", 10)
    y = H - 72
    for line in lines:
        c.drawString(72, y, line)
        y -= 12
    c.showPage()
    c.save()
    return buf.getvalue()


def test_hyphenated_line_ends_follow_the_documents_own_spelling():
    (page,) = run(hyphen_pdf())
    assert page.text == (
        "The built-in scanner and the co-operative's van are listed in the handbook, and the "
        "co-operative pays for both. Ask the coordinator before you move the built-in scanner; "
        # "built-in" and "co-operative" are written hyphenated elsewhere; "coordinator" is
        # written joined; "renewed" is a typesetter's break; a capital after the hyphen
        # keeps it ("Quillfern-Central"), and so does a digit ("ISO-8859").
        "the coordinator will arrange it. Loans can be renewed twice. Every co-operative "
        "branch keeps a coordinator on duty, and the Quillfern-Central desk handles ISO-8859 labels."
    )


def test_join_lines_rule_on_its_own():
    vocab = Vocabulary()
    vocab.add("e-mail e-mail email")
    assert join_lines("send an e-", "mail today", vocab) == "send an e-mail today"
    assert join_lines("re-", "newed", None) == "renewed"
    assert join_lines("ELE-", "MENT", None) == "ELEMENT"
    assert join_lines("non-", "English", None) == "non-English"
    assert join_lines("pages 10-", "12", None) == "pages 10-12"
    assert join_lines("soft\u00ad", "ware", None) == "software"
    assert join_lines("a dash -", "then more", None) == "a dash - then more"


def footer_pdf(pages: int = 4) -> bytes:
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4)
    for n in range(1, pages + 1):
        c.setFont("Helvetica", 8)
        c.drawString(72, H - 30, "Quillfern Library Cooperative - Branch Operations")
        c.drawString(W / 2, 30, str(n + 10))
        c.setFont("Helvetica", 10)
        c.drawString(72, H - 100, f"Section {n} explains how the branches handle task {n * 7}.")
        c.showPage()
    c.save()
    return buf.getvalue()


def test_each_removed_header_and_page_number_is_recorded_in_the_payload():
    pages = run(footer_pdf())
    for n, page in enumerate(pages, start=1):
        assert page.text == f"Section {n} explains how the branches handle task {n * 7}."
        assert page.payload["removed"] == [
            {"kind": "running header", "text": "Quillfern Library Cooperative - Branch Operations",
             "reason": "running header: the same line (digits aside) stands at this height on 4 of 4 pages"},
            {"kind": "page number", "text": str(n + 10),
             "reason": "page number: the same line (digits aside) stands at this height on 4 of 4 pages"},
        ]


def test_tables_are_counted_in_the_payload():
    buf = io.BytesIO()
    c = canvas.Canvas(buf, pagesize=A4)
    c.setFont("Helvetica", 10)
    c.drawString(72, H - 72, "Room bookings this week:")
    rows = [["Room", "Day", "Group"], ["Community room", "Tuesday", "Book club"],
            ["Study room", "Friday", "Chess club"]]
    xs, top = [72, 200, 300, 420], H - 90
    for r, row in enumerate(rows):
        for j, cell in enumerate(row):
            c.drawString(xs[j] + 4, top - r * 18 - 13, cell)
    for r in range(len(rows) + 1):
        c.line(xs[0], top - r * 18, xs[-1], top - r * 18)
    for x in xs:
        c.line(x, top, x, top - len(rows) * 18)
    c.showPage()
    c.save()
    (page,) = run(buf.getvalue())
    assert page.payload["table_count"] == 1
    assert [(b.kind, b.text) for b in page.blocks] == [
        (PARAGRAPH, "Room bookings this week:"),
        (TABLE, "Room | Day | Group\nCommunity room | Tuesday | Book club\nStudy room | Friday | Chess club"),
    ]
    assert 0.5 < page.payload["table_share"] < 1.0
