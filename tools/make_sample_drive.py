#!/usr/bin/env python3
"""Build the demo shared drive of the Quillfern Library Cooperative (a fictional
organisation of our own) into sample_inputs/.

Every file is generated, none is copied from elsewhere, and the output is byte for byte
the same on every run: reportlab runs in invariant mode, the Word file is re-zipped with
fixed timestamps, and all randomness is seeded. Nothing here touches the network.

Usage: make_sample_drive.py [OUTPUT_DIR]     (default: the repo's sample_inputs/)

The drive deliberately holds awkward files next to ordinary ones (a scan with no text
layer, a truncated PDF, a password-protected PDF, an empty file, a binary file named
.txt, Latin-1 text, HTML without a charset) so that every failure path has a real input.
"""

from __future__ import annotations

import datetime as dt
import io
import random
import shutil
import sys
import zipfile
from pathlib import Path
from xml.sax.saxutils import escape

# invariant must be set before the other reportlab modules are imported: pdfencrypt
# reads it at import time, and it also fixes the creation date and the document ID.
from reportlab import rl_config

rl_config.invariant = 1

from reportlab.lib import colors  # noqa: E402
from reportlab.lib.enums import TA_LEFT  # noqa: E402
from reportlab.lib.pagesizes import A4  # noqa: E402
from reportlab.lib.pdfencrypt import StandardEncryption  # noqa: E402
from reportlab.lib.styles import ParagraphStyle  # noqa: E402
from reportlab.lib.units import mm  # noqa: E402
from reportlab.lib.utils import ImageReader  # noqa: E402
from reportlab.pdfgen import canvas as rl_canvas  # noqa: E402
from reportlab.platypus import (  # noqa: E402
    KeepTogether,
    Paragraph,
    SimpleDocTemplate,
    Spacer,
    Table,
    TableStyle,
)

from PIL import Image, ImageDraw, ImageFilter, ImageFont  # noqa: E402
import docx  # noqa: E402
from docx.shared import Pt  # noqa: E402
import openpyxl  # noqa: E402
import pptx  # noqa: E402
from pptx.util import Inches  # noqa: E402

REPO = Path(__file__).resolve().parent.parent
DEFAULT_OUT = REPO / "sample_inputs"

ORG = "Quillfern Library Cooperative"

# Passwords of the protected HR file (documented in the repo so the demo can open it).
HR_USER_PASSWORD = "kestrel-ledger-7"
HR_OWNER_PASSWORD = "qlc-hr-owner-2026"

# Share of the events programme's bytes that survive in the truncated copy.
TRUNCATE_FRACTION = 0.40

# ---------------------------------------------------------------------------------------
# PDF rendering shared by the handbook, the policies, the programme and the HR memo
# ---------------------------------------------------------------------------------------

PAGE_W, PAGE_H = A4
MARGIN_X = 22 * mm
MARGIN_TOP = 26 * mm
MARGIN_BOTTOM = 24 * mm

STYLE_TITLE = ParagraphStyle(
    "DocTitle", fontName="Helvetica-Bold", fontSize=22, leading=27, spaceAfter=6
)
STYLE_SUBTITLE = ParagraphStyle(
    "DocSubtitle", fontName="Helvetica", fontSize=11.5, leading=15, spaceAfter=14,
    textColor=colors.HexColor("#444444"),
)
STYLE_H1 = ParagraphStyle(
    "H1", fontName="Helvetica-Bold", fontSize=16, leading=20, spaceBefore=14, spaceAfter=6
)
STYLE_H2 = ParagraphStyle(
    "H2", fontName="Helvetica-Bold", fontSize=12.5, leading=16, spaceBefore=9, spaceAfter=4
)
STYLE_BODY = ParagraphStyle(
    "Body", fontName="Helvetica", fontSize=10.5, leading=14.2, spaceAfter=6, alignment=TA_LEFT
)
STYLE_BULLET = ParagraphStyle(
    "Bullet", parent=STYLE_BODY, leftIndent=14, bulletIndent=3, spaceAfter=2
)
STYLE_CAPTION = ParagraphStyle(
    "Caption", fontName="Helvetica-Oblique", fontSize=9, leading=12, spaceBefore=3, spaceAfter=8
)
STYLE_CELL = ParagraphStyle("Cell", fontName="Helvetica", fontSize=9, leading=11.5)
STYLE_CELL_HEAD = ParagraphStyle("CellHead", parent=STYLE_CELL, fontName="Helvetica-Bold")


class _OutlinedDoc(SimpleDocTemplate):
    """A doc template that adds a PDF bookmark for every heading it lays out."""

    def afterFlowable(self, flowable):
        level = getattr(flowable, "outline_level", None)
        if level is None:
            return
        self._heading_count = getattr(self, "_heading_count", 0) + 1
        key = "heading-%d" % self._heading_count
        self.canv.bookmarkPage(key)
        self.canv.addOutlineEntry(flowable.getPlainText(), key, level=level, closed=False)


def _heading(text: str, style: ParagraphStyle, level: int) -> Paragraph:
    para = Paragraph(escape(text), style)
    para.outline_level = level
    return para


def _table(rows: list[list[str]], widths_mm: list[float]) -> Table:
    cells = [[Paragraph(escape(c), STYLE_CELL_HEAD) for c in rows[0]]]
    cells += [[Paragraph(escape(c), STYLE_CELL) for c in row] for row in rows[1:]]
    table = Table(cells, colWidths=[w * mm for w in widths_mm], repeatRows=1)
    table.setStyle(
        TableStyle(
            [
                ("GRID", (0, 0), (-1, -1), 0.6, colors.black),
                ("BACKGROUND", (0, 0), (-1, 0), colors.HexColor("#dde3ea")),
                ("VALIGN", (0, 0), (-1, -1), "TOP"),
                ("TOPPADDING", (0, 0), (-1, -1), 3),
                ("BOTTOMPADDING", (0, 0), (-1, -1), 4),
            ]
        )
    )
    return table


def _story(blocks: list[tuple]) -> list:
    """Turn ("kind", ...) tuples into platypus flowables."""
    story = []
    for block in blocks:
        kind = block[0]
        if kind == "title":
            story.append(Paragraph(escape(block[1]), STYLE_TITLE))
        elif kind == "subtitle":
            story.append(Paragraph(escape(block[1]), STYLE_SUBTITLE))
        elif kind == "h1":
            story.append(_heading(block[1], STYLE_H1, 0))
        elif kind == "h2":
            story.append(_heading(block[1], STYLE_H2, 1))
        elif kind == "p":
            story.append(Paragraph(escape(block[1]), STYLE_BODY))
        elif kind == "bullets":
            for item in block[1]:
                story.append(Paragraph(escape(item), STYLE_BULLET, bulletText="\u2022"))
            story.append(Spacer(1, 4))
        elif kind == "table":
            _, caption, rows, widths = block
            story.append(
                KeepTogether([_table(rows, widths), Paragraph(escape(caption), STYLE_CAPTION)])
            )
        else:
            raise ValueError("unknown block kind %r" % kind)
    return story


def render_pdf(
    blocks: list[tuple],
    *,
    running_header: str,
    footer_left: str,
    title: str,
    subject: str,
    author: str = ORG,
    encrypt_factory=None,
) -> bytes:
    """Lay the blocks out on A4 with a running header and "Page n of N" footer.

    Built twice: the first pass only counts the pages so the footer can name the total.
    """

    def build(total: int | None) -> tuple[bytes, int]:
        buf = io.BytesIO()
        doc = _OutlinedDoc(
            buf,
            pagesize=A4,
            leftMargin=MARGIN_X,
            rightMargin=MARGIN_X,
            topMargin=MARGIN_TOP,
            bottomMargin=MARGIN_BOTTOM,
            title=title,
            author=author,
            subject=subject,
            creator="%s office templates" % ORG,
            invariant=1,
            # An encryption object can be prepared only once, so each pass gets its own.
            encrypt=encrypt_factory() if encrypt_factory else None,
        )

        def decorate(canv, doc_):
            canv.saveState()
            canv.setFont("Helvetica", 8.5)
            canv.setFillGray(0.3)
            canv.setStrokeGray(0.55)
            top = PAGE_H - 15 * mm
            canv.drawString(MARGIN_X, top, running_header)
            canv.line(MARGIN_X, top - 2.5 * mm, PAGE_W - MARGIN_X, top - 2.5 * mm)
            bottom = 13 * mm
            canv.line(MARGIN_X, bottom + 4 * mm, PAGE_W - MARGIN_X, bottom + 4 * mm)
            canv.drawString(MARGIN_X, bottom, footer_left)
            canv.drawRightString(
                PAGE_W - MARGIN_X, bottom, "Page %d of %s" % (doc_.page, total or "?")
            )
            canv.restoreState()

        def first_page(canv, doc_):
            canv.showOutline()
            decorate(canv, doc_)

        doc.build(_story(blocks), onFirstPage=first_page, onLaterPages=decorate)
        return buf.getvalue(), doc.page

    _, pages = build(None)
    data, pages_again = build(pages)
    assert pages == pages_again, "page count changed between passes"
    return data


# ---------------------------------------------------------------------------------------
# Content: branch operations handbook
# ---------------------------------------------------------------------------------------

FINES_TABLE = [
    ["Charge", "Adult", "Child (under 16)", "Notes"],
    ["Overdue book, per day", "\u20ac0.20", "none", "Capped at \u20ac6.00 per item"],
    ["Overdue DVD or game, per day", "\u20ac0.50", "none", "Capped at \u20ac6.00 per item"],
    ["Replacement library card", "\u20ac2.00", "\u20ac1.00", "First replacement each year is free"],
    ["Lost or damaged book", "Cost price", "Cost price", "Less 10% for each year of age"],
    ["Hold request", "Free", "Free", "Up to 12 active holds per card"],
    ["Printing, black and white", "\u20ac0.15", "\u20ac0.15", "Per A4 side"],
    ["Printing, colour", "\u20ac0.60", "\u20ac0.60", "Per A4 side"],
]

HOURS_TABLE = [
    ["Branch", "Address", "Monday to Friday", "Saturday", "Sunday"],
    ["Quillfern Central", "2 Guildhall Square", "09:00 to 19:00", "09:00 to 17:00", "11:00 to 15:00"],
    ["Tansywell", "14 Cooper's Lane", "09:30 to 17:30", "09:30 to 13:00", "Closed"],
    ["Brackenmoor", "3 Weavers Row", "10:00 to 18:00", "10:00 to 16:00", "Closed"],
    ["Lindle Cross", "88 Station Parade", "09:30 to 18:30", "09:30 to 16:00", "Closed"],
    ["Sorrel Wharf", "Unit 5, Canal Yard", "13:00 to 19:00", "10:00 to 14:00", "Closed"],
]

HANDBOOK = [
    ("title", "Branch Operations Handbook"),
    ("subtitle", "%s - Edition 4, January 2026. For staff and key-holding volunteers at all five branches." % ORG),
    ("p", "This handbook describes how the branches of the Quillfern Library Cooperative are opened, run and closed each day. It is written for paid staff and for volunteers who hold a key-holder role, and it replaces the third edition of March 2024. Where a branch has its own local arrangements, the branch supervisor keeps a one-page supplement in the red folder behind the main desk, and that supplement takes precedence over the general guidance here."),
    ("p", "If something in this handbook no longer matches how your branch works, tell the operations coordinator so that the next edition can be corrected. A handbook that describes what people actually do is more useful than one that describes what we once hoped they would do."),

    ("h1", "1 Opening the branch"),
    ("p", "Opening a branch well sets the tone for the rest of the day. The steps below take about twenty minutes for one person and should be started at least half an hour before the advertised opening time, so that there is time to deal with anything unexpected."),
    ("h2", "1.1 Keys and alarms"),
    ("p", "Each branch has two sets of building keys and one alarm code for every key-holder. Keys are signed out in the key register kept in the staff room safe, and a key must never be lent to another person, even for a single shift. If a key is lost, report it to the operations coordinator on the same day. The lock cylinder will be changed, and the cost is met from the central budget rather than by the member of staff concerned."),
    ("p", "On arrival, unlock the staff entrance, step inside and close the door behind you before entering your personal code on the alarm panel. The panel allows thirty seconds before the alarm sounds. If you make a mistake, press the clear key and start again; three wrong codes in a row send an alert to the monitoring company and to the duty manager's phone. Never open the public doors until the alarm is fully unset and the panel shows the word READY."),
    ("p", "If you arrive and find the alarm already unset, a door standing open or any sign of forced entry, do not go in. Move to a safe place, call the police on the emergency number and then ring the duty manager. Wait outside until help arrives, and do not touch the door or the lock, because the police may want to examine them."),
    ("h2", "1.2 Morning checks"),
    ("p", "Before opening, walk the whole public floor and check the following points. Write anything that needs attention in the day book, and tell the supervisor about anything that makes the branch unsafe to open."),
    ("bullets", [
        "Fire exits are clear on both sides and the exit signs are lit.",
        "Toilets are clean and stocked with soap, paper and hand towels.",
        "No belongings, food or rubbish were left in the building overnight.",
        "The children's corner is tidy and the soft furnishings are dry and undamaged.",
        "The returns bin has been emptied and its flap closes properly.",
    ]),
    ("p", "Switch on the lighting in the order shown on the panel beside the staff door. Switching every circuit on at once has tripped the main breaker at Brackenmoor and at Lindle Cross more than once, and resetting it means a call to the building contractor."),
    ("p", "Start the staff computer first, then the self-service kiosks, then the public computers. Log in to the circulation system and print the daily list of holds to be pulled from the shelves. Discharge anything that was dropped into the returns bin overnight. Items returned through the bin before opening are treated as returned on the previous day, so that nobody is charged for a day on which the branch was closed."),
    ("p", "Finally, read the handover notes in the day book. The closing team records anything the opening team needs to know, such as a broken printer, a patron who has been asked to come back, or a delivery that is expected in the morning."),
    ("h2", "1.3 Opening the doors"),
    ("p", "Open the public doors at the advertised time and not earlier, even if people are already waiting outside; staff need the last few minutes to finish the checks above. Turn the door sign to OPEN, put out the pavement board where the branch has one, and make sure that at least one member of staff is at the main desk for the first fifteen minutes, which are often the busiest of the morning."),

    ("h1", "2 Serving patrons at the desk"),
    ("p", "The main desk is the first point of contact for most visitors. Staff at the desk should greet everyone who approaches, offer help with the catalogue and the computers, and take the time to explain our services to people who are new to the library. A queue of more than four people is the signal to call a second person to the desk, even if that means leaving shelving for later."),
    ("h2", "2.1 Joining the library"),
    ("p", "Anyone who lives, works or studies in the area served by the cooperative may join free of charge. Adults show one document with their name and one with their current address; a single document that shows both is enough. Children under sixteen join with the signature of a parent or carer, who accepts responsibility for the items borrowed on the child's card. Visitors from outside the area can join as temporary members for three months."),
    ("p", "Enter the details exactly as they appear on the documents, check the date of birth twice, and ask the new member to choose a four-digit PIN for the self-service kiosks and the online catalogue. Hand over the welcome leaflet and point out the loan periods printed on the back. A lost card can be replaced once a year free of charge; further replacements are charged as shown in the table in section 2.3."),
    ("h2", "2.2 Loans, renewals and returns"),
    ("p", "Most books may be borrowed for three weeks and renewed up to three times, unless another member has placed a hold on them. Renewals can be made at the desk, by telephone, at a kiosk or online. Items on hold for another member cannot be renewed, and the system will say so; explain this politely and offer to place a hold for the patron on another copy."),
    ("p", "When discharging returned items, open each one to check for the previous borrower's belongings, such as letters, photographs or bookmarks with personal details written on them. Keep anything you find in the lost property box for four weeks, labelled with the date and the title of the book it was found in. Set damaged items aside for the supervisor and do not charge the patron at the desk, because the supervisor decides whether the damage had already been recorded."),
    ("h2", "2.3 Fines and charges"),
    ("p", "The cooperative charges overdue fines on adult items only. Items borrowed on children's and young people's cards are never fined, and no member is charged for a day on which their branch was closed. The schedule of charges is set by the Board each year and is reproduced in Table 1. The figure shown on the circulation system is always the one to apply, and staff may waive up to \u20ac5.00 at their own discretion when a patron explains a genuine difficulty."),
    ("table", "Table 1: Schedule of charges approved by the Board for 2026.", FINES_TABLE, [48, 24, 30, 64]),
    ("p", "Take payment by card wherever possible. Cash is accepted, but only the supervisor or a named key-holder may open the cash drawer, and every cash payment must be entered in the circulation system at the moment it is taken, not at the end of the shift."),

    ("h2", "2.4 Complaints and compliments"),
    ("p", "Most complaints can be put right at the desk, and the person who hears a complaint should try to resolve it there and then. Listen to the whole story before answering, apologise where we have got something wrong, and explain what you will do next. If the patron is not satisfied, give them the comments card and explain that the branch supervisor will reply within ten working days."),
    ("p", "Compliments matter as much as complaints. Write them in the day book with the name of the colleague or volunteer concerned, and pass them on to the supervisor, who includes them in the monthly report to the Board. A short note of thanks from a patron is often the only way a volunteer learns how much their work is valued."),

    ("h1", "3 Opening hours and staffing"),
    ("h2", "3.1 Opening hours by branch"),
    ("p", "Each branch keeps the hours agreed with the Board, which are published on the cooperative's website and on the door of the branch. Changes to the published hours need four weeks' notice to the public, except in an emergency. The current pattern is shown in Table 2."),
    ("table", "Table 2: Published opening hours from 1 January 2026.", HOURS_TABLE, [32, 36, 34, 32, 32]),
    ("p", "Sorrel Wharf opens only in the afternoon on weekdays because it shares its building with the canal trust's morning classes. When Quillfern Central hosts an evening event, the building may stay open later for ticket holders, but the published hours do not change and the lending desk closes at the usual time."),
    ("h2", "3.2 Minimum staffing"),
    ("p", "No branch may open with fewer than two people on the premises, at least one of whom must be a trained key-holder. Volunteers count towards the minimum once they have completed the induction described in the volunteer handbook. If the minimum cannot be met, the supervisor first asks staff from a neighbouring branch. If nobody is available, the branch opens late or closes early, and the duty manager updates the website and puts a notice on the door."),
    ("p", "Lone working is allowed only for the short periods at the start and end of the day described in sections 1 and 7, and only if the person has a charged phone and has told the duty manager what time they expect to finish. The duty manager rings anyone who has not reported that they have left safely within thirty minutes of that time."),

    ("h1", "4 Safety and incidents"),
    ("h2", "4.1 Fire and evacuation"),
    ("p", "Every member of staff must know where the fire exits, the assembly point and the alarm call points are in each branch they work in. When the alarm sounds, stop what you are doing, ask everyone to leave by the nearest exit, and sweep your assigned area on the way out, checking the toilets, the study rooms and the children's corner. Do not stop to collect belongings or to shut down computers."),
    ("p", "The person in charge of the shift takes the visitor count from the door counter, the staff signing-in sheet and the day's room bookings to the assembly point and meets the fire service there. Nobody goes back into the building until the fire service says it is safe to do so. A fire drill is held in every branch twice a year, and the time taken to clear the building is recorded in the safety log."),
    ("h2", "4.2 First aid"),
    ("p", "Each branch has a first aid kit in the staff room and a second kit at the main desk. At least one trained first aider should be on every shift, and their names are shown on the notice beside the staff room door. If someone is hurt or falls ill, call the first aider and, in any case of doubt, call an ambulance. Do not give medicines of any kind, including painkillers, to members of the public."),
    ("p", "The defibrillator at Quillfern Central hangs in the entrance lobby and may be used by anyone; the machine speaks its instructions aloud. After it has been used, tell the operations coordinator so that the pads and the battery can be replaced before the next emergency."),
    ("h2", "4.3 Recording an incident"),
    ("p", "Record every accident, near miss, act of aggression and safeguarding concern on an incident form on the same day, while memories are fresh. Write down what you saw and heard rather than what you think happened, and include the time, the place and the names of any witnesses who agree to be named. Send the form to the operations coordinator, who decides whether anyone outside the cooperative must be told."),
    ("p", "If a child or a vulnerable adult seems to be at risk, speak to the designated safeguarding lead before the end of your shift. Do not promise a child that you will keep a secret, and do not try to investigate the matter yourself. The safeguarding lead for each branch is named on the staff room notice board."),

    ("h2", "4.4 Difficult situations"),
    ("p", "Libraries are open to everyone, and now and then a visitor's behaviour makes the branch uncomfortable or unsafe for others. Speak calmly, keep a desk or a table between yourself and the person if you can, and never try to remove anyone from the building by force. Ask a colleague to stand nearby, and if the situation gets worse, call the police and then the duty manager."),
    ("p", "A patron who has been aggressive may be asked to leave for the rest of the day by the person in charge of the shift. Longer exclusions are decided only by the operations coordinator, who writes to the person concerned and tells every branch. Record every such incident as described in section 4.3, even if it ended quietly."),

    ("h1", "5 Public computers and Wi-Fi"),
    ("h2", "5.1 Booking sessions"),
    ("p", "Members can book a public computer for up to two hours a day, in sessions of one hour, at the desk or online. Visitors who are not members can have a guest session of thirty minutes after showing any form of identification. The booking system logs the user off automatically when the session ends and clears the browser history, downloads and saved passwords."),
    ("p", "The wireless network is open to everyone during opening hours. Patrons accept the acceptable use statement on the first page they see after connecting. Staff cannot see what patrons do online, and should say so if asked, but the filtering service blocks the categories of site on the list agreed by the Board."),
    ("h2", "5.2 Printing and scanning"),
    ("p", "Print jobs are released at the print station after payment at the desk, and uncollected jobs are deleted at the end of the day. The scanner in each branch is free to use and sends scans to the patron's own e-mail address or to a memory stick. Staff should not accept documents on their own phones or e-mail accounts in order to print them for patrons."),
    ("p", "When a patron needs help to fill in an online form, staff can show them how to use the computer but must not type passwords or personal details on their behalf. Offer instead to book a longer session with one of the digital help volunteers, who run drop-in sessions at Quillfern Central on Tuesday and Thursday mornings."),

    ("h1", "6 Stock handling"),
    ("h2", "6.1 Deliveries and transfers"),
    ("p", "The transport van visits every branch on Tuesdays and Fridays. Crates arrive sealed, with a transfer slip listing the number of items inside. Check the number against the slip, sign for the delivery and discharge each item so that holds are trapped and the patrons who placed them are notified. Outgoing crates must be packed by eleven o'clock on delivery days, with heavy items at the bottom and the slip on top."),
    ("p", "New stock is catalogued and processed centrally at Quillfern Central. If a new book arrives without a barcode, a spine label or a protective jacket, send it back to Central in the next crate with a note rather than trying to process it at the branch."),
    ("h2", "6.2 Damaged and withdrawn items"),
    ("p", "Items that are damaged beyond simple repair, out of date or no longer borrowed are withdrawn by the supervisor according to the stock policy. Withdrawn items are stamped WITHDRAWN inside the front cover before they are offered in the branch book sale or sent for recycling. Reference works, local history material and anything donated with conditions attached must never be withdrawn without first asking the stock librarian."),

    ("h2", "6.3 Donations"),
    ("p", "Patrons often offer books they no longer need. Thank them, and explain that donated items may be added to the collection, sold in the book sale or passed on to a charity, at the cooperative's discretion. Accept no more than one bag at a time at the desk; larger collections, and anything that looks old, rare or of local interest, should be referred to the stock librarian, who may arrange to see them at the donor's home."),
    ("p", "We do not accept encyclopaedias, magazines more than a year old, or anything damp, dirty or marked. Never give a valuation of a donated item, even an informal one, and do not buy donated items for yourself before they have been offered in the book sale."),

    ("h1", "7 Closing the branch"),
    ("h2", "7.1 End-of-day cash-up"),
    ("p", "Fifteen minutes before closing, announce that the branch will close shortly and that the public computers will log off five minutes before the doors are locked. At closing time, the person in charge counts the cash drawer with a second person present and records the totals on the cash-up sheet. The total must match the payments report from the circulation system, and any difference of more than \u20ac2.00 is reported to the finance officer on the next working day."),
    ("p", "Takings are placed in a sealed bag together with the cash-up sheet and locked in the safe. The float of \u20ac50.00 stays in the drawer, which is then locked, and the drawer key is returned to the key safe."),
    ("h2", "7.2 Locking up"),
    ("p", "Walk the whole building once more, checking the toilets, the study rooms and the children's corner for anyone left behind. Switch off the public computers, the kiosks and the lighting, close and lock the windows and the public doors, and write the handover notes in the day book."),
    ("p", "Set the alarm from the panel by the staff entrance and leave within the exit time. If the alarm will not set, do not leave the building unset. Call the duty manager, who will either talk you through the problem or arrange for the monitoring company to be told and for a second key-holder to attend."),

    ("h1", "8 Who to contact"),
    ("p", "The people below can be reached on the internal telephone system from any branch. Outside office hours, the duty manager's mobile number is written inside the front cover of the day book."),
    ("bullets", [
        "Operations coordinator: Tomasz Quenby, extension 214.",
        "Finance officer: Priya Haldane-Moss, extension 220.",
        "Stock librarian: Ines Catterick, extension 231.",
        "Designated safeguarding lead for the cooperative: Sunniva Hartle, extension 205.",
        "Building faults and IT problems: the fault desk, extension 299, or the form on the staff intranet.",
    ]),
]

HANDBOOK_HEADER = "%s - Branch Operations Handbook" % ORG

# ---------------------------------------------------------------------------------------
# Content: lending policy, two revisions
# ---------------------------------------------------------------------------------------

POLICY_VERSION = {
    2025: "Version 2025.1. Approved by the Board of Trustees on 19 November 2024 and in effect from 1 January 2025.",
    2026: "Version 2026.1. Approved by the Board of Trustees on 18 November 2025 and in effect from 1 January 2026.",
}

POLICY_FINES = {
    2025: "Overdue fines are charged at \u20ac0.20 a day on adult books and at \u20ac0.50 a day on adult DVDs and games, up to a maximum of \u20ac6.00 for each item. Items borrowed on children's and young people's cards are charged at half the adult rate, up to a maximum of \u20ac3.00 for each item. No fines are charged for days on which the lending branch was closed.",
    2026: "Overdue fines are charged at \u20ac0.20 a day on adult books and at \u20ac0.50 a day on adult DVDs and games, up to a maximum of \u20ac6.00 for each item. Items borrowed on children's and young people's cards are no longer fined. The Board removed these charges after a year's trial at Lindle Cross and Sorrel Wharf showed that fines kept families away from the library without bringing items back any sooner. No fines are charged for days on which the lending branch was closed.",
}

# Only in the 2026 revision: the e-reader loan scheme.
POLICY_EREADERS_2026 = "From March 2026, members aged eighteen and over may borrow one e-reader at a time from Quillfern Central or Lindle Cross, for a loan period of three weeks with one renewal. E-readers are lent with a charger and a protective case and must be handed back at the desk, never through the returns bin. A member who returns an e-reader damaged is charged the cost of its repair, up to the price of a replacement, currently \u20ac120.00."


def policy_blocks(year: int) -> list[tuple]:
    loans_extra = [("p", POLICY_EREADERS_2026)] if year >= 2026 else []
    return [
        ("title", "Lending Policy"),
        ("subtitle", POLICY_VERSION[year]),
        ("h1", "1 Purpose and scope"),
        ("p", "This policy sets out who may borrow items from the Quillfern Library Cooperative, for how long, and what happens when items are returned late, lost or damaged. It applies at all five branches and to the online catalogue. Staff apply it with common sense: the aim is to keep the collection moving between readers, not to penalise people who have made an honest mistake."),
        ("h1", "2 Who may borrow"),
        ("p", "Membership is free for anyone who lives, works or studies in the area served by the cooperative. Adult members show proof of name and address when they join. Children under sixteen join with the signature of a parent or carer, who accepts responsibility for the items borrowed on the child's card. Temporary membership for three months is available to visitors, who may borrow up to four items at a time."),
        ("p", "A member's card is personal to them. Another person may collect holds on a member's behalf only with the card and a note signed by the member, and staff may ask to see identification."),
        ("h1", "3 How many items"),
        ("p", "Adult members may have up to fifteen items on loan at once, of which no more than five may be DVDs or games. Members under sixteen may have up to ten items on loan. Items in the local history collection and reference works are for use in the library only and cannot be borrowed."),
        ("h1", "4 Loan periods"),
        ("p", "Books, audiobooks and magazines are lent for three weeks. DVDs and games are lent for one week. Items borrowed through the inter-branch hold service have the same loan period as items borrowed directly from the shelves. Members with a reading disability, and members who care for someone at home, may ask for an extended loan period of six weeks on books and audiobooks."),
        *loans_extra,
        ("h1", "5 Renewals and holds"),
        ("p", "Items may be renewed up to three times, at the desk, by telephone, at a self-service kiosk or online, unless another member has placed a hold on them. A member may have up to twelve holds active at once. Holds are free of charge, and a member is notified by e-mail, text message or letter when a held item is ready. Held items are kept for seven days before they are offered to the next person in the queue."),
        ("h1", "6 Overdue items and charges"),
        ("p", POLICY_FINES[year]),
        ("p", "A reminder is sent three days before an item is due, and overdue notices are sent one week and three weeks after the due date. A member who owes more than \u20ac10.00 cannot borrow further items until the amount is paid or reduced. Staff may waive charges of up to \u20ac5.00 when a member explains a genuine difficulty, and the branch supervisor may waive larger amounts."),
        ("h1", "7 Lost and damaged items"),
        ("p", "A member who loses or damages an item is charged the cost of replacing it, less ten per cent for each full year since the item was added to the stock, and never less than \u20ac2.00. If a lost item is found and returned within three months, the charge is refunded in full. Damage that was already recorded on the item's record when it was lent is never charged to the borrower."),
        ("h1", "8 Privacy of borrowing records"),
        ("p", "The cooperative keeps a record of the items currently on loan to each member. Once an item has been returned and any charges settled, the link between the member and the item is removed from the circulation system after thirty days, unless the member has asked to keep a reading history. Staff never share what a member has borrowed with anyone else, including family members, except where the law requires it."),
        ("h1", "9 Review"),
        ("p", "The Board of Trustees reviews this policy every year at its November meeting, taking into account comments from members, staff and volunteers. Suggestions for changes can be made at any branch or to the operations coordinator at any time of the year."),
    ]


# ---------------------------------------------------------------------------------------
# Content: spring reading programme (the copy on the drive is truncated)
# ---------------------------------------------------------------------------------------

PROGRAMME_EVENTS = [
    ["Date", "Branch", "Event", "Audience"],
    ["Sat 7 March", "Quillfern Central", "Launch morning: meet the spring reading guides", "All ages"],
    ["Tue 10 March", "Tansywell", "Rhyme time with the Tansywell storytellers", "Under fives"],
    ["Thu 12 March", "Lindle Cross", "Book club: short stories from the coast", "Adults"],
    ["Sat 14 March", "Brackenmoor", "Comic drawing workshop", "Ages 9 to 13"],
    ["Wed 18 March", "Sorrel Wharf", "Canal history walk and reading", "Adults"],
    ["Sat 21 March", "Quillfern Central", "Family quiz afternoon", "Families"],
    ["Tue 24 March", "Lindle Cross", "Digital help drop-in: reading e-books", "Adults"],
    ["Sat 28 March", "Tansywell", "Write your own fairy tale", "Ages 7 to 11"],
    ["Thu 2 April", "Quillfern Central", "Author evening: writing about the places we live", "Adults"],
    ["Sat 11 April", "All branches", "Spring reading challenge celebration", "All ages"],
]

PROGRAMME = [
    ("title", "Spring Reading Programme 2026"),
    ("subtitle", "Free events at every branch of the %s, March and April 2026." % ORG),
    ("p", "Spring is when our branches fill up again after the quiet winter months, and this year's programme is the biggest we have put together. Every event listed here is free, and most do not need a booking; where places are limited, the listing says so and you can book at any branch desk or through the online catalogue."),
    ("p", "The programme was planned with the help of the readers' panel that met at Quillfern Central in December, and many of the ideas came straight from the suggestion cards left at the desks. Thank you to everyone who took the time to write one."),
    ("h1", "1 The spring reading challenge"),
    ("p", "The reading challenge runs from 7 March to 11 April. Readers of every age collect a stamp card at any branch, read six books of their own choosing, and tell a member of staff or a volunteer a little about each one. Audiobooks, comics and books read aloud together all count. Everyone who finishes receives a certificate and a bookmark designed by last year's young readers, and their name goes into the draw for a family day out."),
    ("p", "Younger children can take part with picture books, and the desk staff are happy to help a child fill in their card. Adults who would like a little encouragement can join one of the challenge groups that meet once a fortnight at Lindle Cross and Tansywell."),
    ("h1", "2 Events by date"),
    ("p", "The table below lists the main events. Rhyme times and toddler sessions also carry on as usual every week at all branches, and the weekly times are printed on the back page of this programme."),
    ("table", "Table 1: Main events of the spring programme.", PROGRAMME_EVENTS, [26, 32, 76, 32]),
    ("h1", "3 Workshops that need a booking"),
    ("p", "The comic drawing workshop at Brackenmoor and the fairy tale workshop at Tansywell have twelve places each, because every participant gets their own drawing board and materials. Places can be booked from 23 February. If a workshop is full, ask to go on the waiting list; places often come free in the last few days."),
    ("p", "The canal history walk at Sorrel Wharf starts from the branch and follows the towpath for about two kilometres. Wear sensible shoes and bring a waterproof. The walk ends at the old lock-keeper's cottage, where the reading takes place indoors, and a minibus brings anyone who would rather not walk back to the branch."),
    ("h1", "4 Author evening"),
    ("p", "On Thursday 2 April, three writers who live in the district will talk about how the streets, rivers and markets around them find their way into their books. The evening starts at seven o'clock in the community room at Quillfern Central and finishes with questions from the audience. Tickets are free but must be collected from a branch desk, because the room holds eighty people."),
    ("h1", "5 Access and help"),
    ("p", "All event spaces are step-free except the upstairs study room at Tansywell, which is not used for any event in this programme. Hearing loops are available at Quillfern Central and Lindle Cross. If you need anything else to take part, such as a large-print copy of the reading for an event, please ask at any branch desk at least a week beforehand and we will do our best to help."),
    ("h1", "6 Weekly sessions"),
    ("bullets", [
        "Rhyme time: Tuesdays at 10:00 at Tansywell, Wednesdays at 10:30 at Quillfern Central, Fridays at 10:00 at Lindle Cross.",
        "Toddler stories: Thursdays at 10:30 at Brackenmoor.",
        "Homework club: Mondays and Wednesdays from 16:00 at Quillfern Central and Sorrel Wharf.",
        "Knit and natter: Fridays at 14:00 at Lindle Cross.",
        "Digital help drop-in: Tuesdays and Thursdays from 09:30 at Quillfern Central.",
    ]),
]

# ---------------------------------------------------------------------------------------
# Content: confidential salary review memo (password protected)
# ---------------------------------------------------------------------------------------

SALARY_BANDS = [
    ["Grade", "Roles", "Current range", "Proposed range from April 2026"],
    ["L1", "Library assistant", "\u20ac24,100 to \u20ac26,300", "\u20ac25,000 to \u20ac27,150"],
    ["L2", "Senior library assistant", "\u20ac26,800 to \u20ac29,400", "\u20ac27,650 to \u20ac30,350"],
    ["L3", "Branch supervisor, stock librarian", "\u20ac31,200 to \u20ac34,900", "\u20ac32,200 to \u20ac36,000"],
    ["L4", "Operations coordinator, finance officer", "\u20ac37,500 to \u20ac41,800", "\u20ac38,700 to \u20ac43,150"],
]

SALARY_REVIEW = [
    ("title", "Salary Review 2026"),
    ("subtitle", "Confidential: for the Board of Trustees and the finance officer only. Prepared by Priya Haldane-Moss, January 2026."),
    ("h1", "1 Summary"),
    ("p", "This paper proposes an increase of 3.2 per cent to every point on the cooperative's pay scale from 1 April 2026, in line with the increase in the regional cost of living index over the twelve months to November 2025. The proposal adds about \u20ac16,000 a year to the staff budget, which the draft budget for 2026 already allows for."),
    ("p", "It also proposes that the lowest point of grade L1 is raised by a further 0.5 per cent, so that no member of staff earns less than the voluntary living wage recommended by the regional employers' forum."),
    ("h1", "2 Proposed pay ranges"),
    ("table", "Table 1: Pay ranges by grade, before and after the proposed increase, rounded to the nearest \u20ac50.", SALARY_BANDS, [16, 58, 44, 48]),
    ("h1", "3 Other terms"),
    ("p", "No change is proposed to annual leave, sick pay or the pension contribution this year. The staff representative has asked the Board to look again at paying for time spent on evening events, and the finance officer will bring a costed proposal to the May meeting."),
    ("p", "Individual letters confirming new salaries will be sent to staff by 15 March 2026. Questions from staff should be directed to the finance officer and not discussed at branch level."),
]


# ---------------------------------------------------------------------------------------
# Scanned receipt: an image only, no text layer
# ---------------------------------------------------------------------------------------

# (text on the left or centred, amount flush right, font size)
RECEIPT_LINES = [
    ("TIDEWELL & DAUGHTERS", None, 30),
    ("Stationers since 1962", None, 20),
    ("19 Ropewalk, Lindle Cross", None, 20),
    ("", None, 12),
    ("Date 14/01/2026", "Time 11:42", 21),
    ("Till 2", "Receipt 004817", 21),
    ("-", None, 21),
    ("A4 copier paper x5", "24.75", 21),
    ("Box files x4", "11.60", 21),
    ("Date stamp ink", "4.20", 21),
    ("Book tape 50mm x6", "17.40", 21),
    ("Labels, spine, 1000", "9.95", 21),
    ("-", None, 21),
    ("SUBTOTAL", "EUR 67.90", 22),
    ("VAT included", "EUR 11.32", 21),
    ("TOTAL", "EUR 67.90", 27),
    ("Card payment", "EUR 67.90", 21),
    ("", None, 12),
    ("Customer: Quillfern Library Coop.", None, 19),
    ("Thank you for your custom", None, 19),
]


def _receipt_image() -> bytes:
    """Draw the receipt on a grey scanner bed, tilt it and add speckle, as a JPEG."""
    rng = random.Random(20260114)
    width, height = 900, 1270  # A4 proportions, about 110 dpi
    bed = Image.new("L", (width, height), 214)

    paper = Image.new("L", (460, 760), 247)
    draw = ImageDraw.Draw(paper)
    left, right = 28, paper.width - 28
    y = 40
    for text, amount, size in RECEIPT_LINES:
        font = ImageFont.load_default(size=size)
        if amount is None and text and not text.startswith("-"):
            draw.text(((paper.width - draw.textlength(text, font=font)) / 2, y), text, fill=38, font=font)
        elif text.startswith("-"):
            rule = "-" * int((right - left) / draw.textlength("-", font=font))
            draw.text((left, y), rule, fill=38, font=font)
        elif text:
            draw.text((left, y), text, fill=38, font=font)
        if amount:
            draw.text((right - draw.textlength(amount, font=font), y), amount, fill=38, font=font)
        y += int(size * 1.55)
    # A soft blur stands in for the scanner optics.
    paper = paper.filter(ImageFilter.GaussianBlur(0.7))

    tilted = paper.rotate(-1.6, resample=Image.BICUBIC, expand=True, fillcolor=214)
    bed.paste(tilted, (210, 150))

    # Speckle from dust on the glass: a seeded sprinkle of dark pixels.
    pixels = bed.load()
    for _ in range(1800):
        px, py = rng.randrange(width), rng.randrange(height)
        pixels[px, py] = rng.randrange(60, 170)

    out = io.BytesIO()
    bed.save(out, format="JPEG", quality=72)
    return out.getvalue()


def receipt_pdf() -> bytes:
    buf = io.BytesIO()
    canv = rl_canvas.Canvas(buf, pagesize=A4, invariant=1)
    canv.setTitle("Scan 14/01/2026 11:58")
    canv.setCreator("Branch multifunction scanner")
    canv.drawImage(ImageReader(io.BytesIO(_receipt_image())), 0, 0, width=PAGE_W, height=PAGE_H)
    canv.showPage()
    canv.save()
    return buf.getvalue()


# ---------------------------------------------------------------------------------------
# Word form
# ---------------------------------------------------------------------------------------

DOCX_STAMP = (2026, 1, 12, 14, 30, 0)


def _stable_zip(data: bytes) -> bytes:
    """Re-zip with fixed timestamps and sorted member order ([Content_Types].xml first)."""
    src = zipfile.ZipFile(io.BytesIO(data))
    names = sorted(src.namelist(), key=lambda n: (n != "[Content_Types].xml", n))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as dst:
        for name in names:
            info = zipfile.ZipInfo(name, date_time=DOCX_STAMP)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.create_system = 0
            info.external_attr = 0
            dst.writestr(info, src.read(name), compresslevel=6)
    return out.getvalue()


def booking_form_docx() -> bytes:
    document = docx.Document()
    document.styles["Normal"].font.size = Pt(11)

    props = document.core_properties
    props.title = "Meeting Room Booking Form"
    props.subject = "Booking the community rooms at Quillfern Central and Lindle Cross"
    props.author = ORG
    props.last_modified_by = "Tomasz Quenby"
    props.keywords = "meeting room, booking, community room, form"
    props.category = "Forms"
    props.language = "en-GB"
    props.revision = 3
    props.created = dt.datetime(2025, 9, 1, 9, 0, 0)
    props.modified = dt.datetime(2026, 1, 12, 14, 30, 0)
    props.last_printed = dt.datetime(2026, 1, 12, 14, 35, 0)

    document.add_heading("Meeting Room Booking Form", level=1)
    document.add_paragraph(
        "Use this form to book the community room at Quillfern Central or the meeting room "
        "at Lindle Cross. Hand the completed form to any branch desk or send it to the "
        "operations coordinator at least ten working days before the date you need. We will "
        "confirm your booking in writing within five working days."
    )
    document.add_paragraph(
        "Community groups, charities and members of the cooperative may book the rooms free "
        "of charge for meetings that are open to the public. Private and commercial bookings "
        "are charged at the rates shown on the back of this form."
    )

    document.add_heading("1. About you and your booking", level=2)
    fields = [
        ("Name of organiser", ""),
        ("Organisation or group (if any)", ""),
        ("Telephone", ""),
        ("E-mail address", ""),
        ("Library card number", ""),
        ("Room requested", "Community room, Quillfern Central  /  Meeting room, Lindle Cross"),
        ("Date of booking", ""),
        ("Start and finish time (including setting up)", ""),
        ("Expected number of people", ""),
        ("Purpose of the meeting", ""),
        ("Is the meeting open to the public?", "Yes  /  No"),
    ]
    table = document.add_table(rows=1, cols=2)
    table.style = "Table Grid"
    head = table.rows[0].cells
    head[0].text = "Field"
    head[1].text = "Your answer"
    for label, answer in fields:
        row = table.add_row().cells
        row[0].text = label
        row[1].text = answer

    document.add_heading("2. Layout and equipment", level=2)
    document.add_paragraph(
        "Please tick the equipment you need. The rooms are set out in rows of chairs unless "
        "you ask for another layout; staff can help with setting up but cannot move heavy "
        "furniture on their own."
    )
    for item in (
        "Projector and screen",
        "Hearing loop (Quillfern Central only)",
        "Tables set out for a workshop",
        "Tea and coffee urn",
        "Flip chart and pens",
    ):
        document.add_paragraph(item, style="List Bullet")

    document.add_heading("3. Conditions of use", level=2)
    document.add_paragraph(
        "The organiser must be present for the whole booking and is responsible for the "
        "safety of everyone attending, including knowing where the fire exits are. Rooms must "
        "be left as they were found, and bookings must end at least fifteen minutes before "
        "the branch closes. The cooperative may cancel a booking at short notice if the room "
        "is needed in an emergency, and will try to offer another date."
    )
    document.add_paragraph(
        "By signing below, I confirm that I have read the conditions of use and that the "
        "information on this form is correct."
    )
    document.add_paragraph("Signature: ______________________    Date: ____________")

    document.add_heading("4. For office use only", level=2)
    office = document.add_table(rows=4, cols=2)
    office.style = "Table Grid"
    for row, label in zip(office.rows, ("Received by", "Date received", "Booking confirmed", "Charge due")):
        row.cells[0].text = label

    buf = io.BytesIO()
    document.save(buf)
    return _stable_zip(buf.getvalue())


# ---------------------------------------------------------------------------------------
# Intranet pages: the same banner, menu, footer, style and script around each page
# ---------------------------------------------------------------------------------------

INTRANET_NAV = [
    ("index.html", "Home"),
    ("opening-hours.html", "Opening hours"),
    ("reporting-a-fault.html", "Report a fault"),
    ("new-staff-welcome.html", "New staff"),
]

INTRANET_STYLE = """\
body { font-family: system-ui, sans-serif; margin: 0; color: #1f2328; line-height: 1.5; }
header.banner { background: #2f5d50; color: #fff; padding: 14px 28px; }
header.banner .org { font-size: 1.4em; font-weight: 600; margin: 0; }
header.banner .strap { margin: 2px 0 0; font-size: 0.9em; opacity: 0.85; }
nav { background: #e8efe9; border-bottom: 1px solid #c9d6cc; }
nav ul { list-style: none; margin: 0; padding: 0 20px; display: flex; gap: 4px; }
nav a { display: block; padding: 8px 12px; color: #2f5d50; text-decoration: none; }
nav a.current { font-weight: 600; border-bottom: 3px solid #2f5d50; }
main { max-width: 46em; padding: 10px 28px 30px; }
table { border-collapse: collapse; margin: 12px 0; }
th, td { border: 1px solid #9aa8a0; padding: 4px 10px; text-align: left; }
footer { border-top: 1px solid #c9d6cc; padding: 10px 28px; font-size: 0.85em; color: #555; }"""

INTRANET_SCRIPT = """\
document.addEventListener("DOMContentLoaded", function () {
  var here = window.location.pathname.split("/").pop() || "index.html";
  document.querySelectorAll("nav a").forEach(function (link) {
    if (link.getAttribute("href") === here) { link.classList.add("current"); }
  });
  var stamp = document.getElementById("reviewed");
  if (stamp) { stamp.title = "Pages are reviewed every six months by the page owner."; }
});"""


def intranet_page(title: str, body: str, reviewed: str, owner: str, *, meta_charset: bool) -> bytes:
    nav = "\n".join('    <li><a href="%s">%s</a></li>' % (href, label) for href, label in INTRANET_NAV)
    meta = '<meta charset="utf-8">\n' if meta_charset else ""
    html = f"""<!DOCTYPE html>
<html lang="en">
<head>
{meta}<title>{title} - Quillfern staff intranet</title>
<style>
{INTRANET_STYLE}
</style>
<script>
{INTRANET_SCRIPT}
</script>
</head>
<body>
<header class="banner">
  <p class="org">{ORG}</p>
  <p class="strap">Staff intranet &ndash; for staff and volunteers only</p>
</header>
<nav>
  <ul>
{nav}
  </ul>
</nav>
<main>
{body.strip()}
</main>
<footer>
  <p>{ORG} &middot; 2 Guildhall Square &middot; fault desk extension 299</p>
  <p>Page owner: {owner}. <span id="reviewed">Last reviewed {reviewed}.</span></p>
</footer>
</body>
</html>
"""
    return html.encode("utf-8")


INTRANET_INDEX = """
<h1>Staff news</h1>
<p>Welcome to the staff intranet. This page carries news for everyone who works or volunteers at our five branches. Older items move to the news archive after two months.</p>
<h2>Children’s fines have gone</h2>
<p>From 1 January 2026 no overdue fines are charged on items borrowed on children’s and young people’s cards. The Board agreed the change in November after the trial at Lindle Cross and Sorrel Wharf. If a family asks about an old fine from last year, you can waive it: the circulation system now offers a one-click waiver for children’s fines dated before the new year.</p>
<h2>E-readers arrive in March</h2>
<p>Twenty e-readers will be available to borrow from Quillfern Central and Lindle Cross from March. Training sessions for desk staff take place in the community room at Central.</p>
<h3>Training dates</h3>
<ul>
  <li>Tuesday 17 February, 14:00 – 15:30</li>
  <li>Thursday 19 February, 10:00 – 11:30</li>
  <li>Monday 23 February, 16:00 – 17:30 (Lindle Cross)</li>
</ul>
<h2>Brackenmoor roof repairs</h2>
<p>Brackenmoor will close from 2 to 27 March while the roof is repaired. Staff at Brackenmoor will work at Tansywell and Quillfern Central during the closure; the rota is on the staff room notice boards. Notices for patrons have been printed in English, German and French.</p>
<h2>Café corner at Central</h2>
<p>The new café corner opens in the entrance lobby at Quillfern Central on 2 February. It is run by the Friends of Quillfern Libraries, and any surplus goes to the children’s book fund. Drinks in lidded cups are welcome in the library; food stays in the café corner.</p>
"""

INTRANET_HOURS_ROWS = "\n".join(
    "  <tr>%s</tr>" % "".join("<td>%s</td>" % escape(c) for c in row) for row in HOURS_TABLE[1:]
)

INTRANET_HOURS = f"""
<h1>Opening hours</h1>
<p>These are the published opening hours for all branches from 1 January 2026. Staff should arrive at least thirty minutes before opening and expect to leave about twenty minutes after closing.</p>
<table>
  <caption>Published opening hours by branch</caption>
  <thead>
  <tr>{"".join("<th>%s</th>" % c for c in HOURS_TABLE[0])}</tr>
  </thead>
  <tbody>
{INTRANET_HOURS_ROWS}
  </tbody>
</table>
<h2>Bank holidays</h2>
<p>All branches close on public holidays. On the Saturday before Easter, and on 24 and 31 December, branches close at 13:00. Quillfern Central does not open on the Sunday of a holiday weekend.</p>
<h2>Changing the hours</h2>
<p>Only the Board can change the published hours, and the public must be given four weeks’ notice. A branch supervisor may close a branch early in an emergency – for example if the heating fails or there are not enough staff – but must tell the duty manager first so that the website and the door notice can be updated.</p>
<h3>Sorrel Wharf</h3>
<p>Sorrel Wharf shares its building with the canal trust, which uses the space for classes on weekday mornings. Please do not arrange deliveries to Sorrel Wharf before 12:30 on weekdays.</p>
"""

INTRANET_FAULT = """
<h1>Reporting a fault</h1>
<p>The fault desk handles problems with buildings, computers, kiosks, printers and telephones at every branch. Report a fault as soon as you notice it, even if you think someone else may already have done so: a second report tells us the problem matters.</p>
<h2>How to report a fault</h2>
<ol>
  <li>Check the fault list on the noticeboard in the staff room; if the fault is there, add the date and your initials.</li>
  <li>If it is not listed, ring the fault desk on extension 299 or fill in the fault form on this intranet.</li>
  <li>Give the branch, the exact place (for example “second public computer by the window”), what you saw and when it started.</li>
  <li>Write the reference number the fault desk gives you in the day book, so the next shift can follow it up.</li>
</ol>
<h2>Urgent faults</h2>
<p>Some faults cannot wait for the next working day. Ring the duty manager at once if any of the following happens:</p>
<ul>
  <li>the alarm will not set or unset;</li>
  <li>a door or window cannot be locked;</li>
  <li>there is a leak, a smell of gas or a burning smell;</li>
  <li>the heating fails in winter or the lifts stop with someone inside.</li>
</ul>
<h3>Computers and kiosks</h3>
<p>Before reporting a frozen public computer, try switching it off at the power button and waiting a minute. Do not unplug kiosks: they need to shut down properly or the receipt printer loses its settings. The fault desk can restart most kiosks remotely within half an hour.</p>
"""

INTRANET_WELCOME = """
<h1>Welcome to the cooperative</h1>
<p>We are glad you have joined us. Whether you are a new member of staff or a volunteer, this page tells you what to expect in your first weeks and where to find help. Your supervisor will go through it with you on your first day.</p>
<h2>Your first week</h2>
<ul>
  <li>Collect your identity badge and, if you are a key-holder, sign for your keys in the key register.</li>
  <li>Read the Branch Operations Handbook, especially the sections on opening, closing and safety.</li>
  <li>Shadow an experienced colleague at the desk for at least two shifts.</li>
  <li>Complete the online safeguarding course; it takes about an hour.</li>
  <li>Meet the first aider and find the fire exits and the assembly point in your branch.</li>
</ul>
<h2>Who is who</h2>
<p>The cooperative has a small central team based at Quillfern Central. Tomasz Quenby coordinates operations across the branches, Priya Haldane-Moss looks after finance and payroll, and Ines Catterick is responsible for the stock. Each branch has a supervisor who plans the rota and is your first point of contact.</p>
<h3>Volunteers</h3>
<p>Volunteers help with rhyme times, homework club, digital help and the home library service. Volunteer shifts are arranged through the volunteer coordinator, and the rota for the current season is kept on the shared drive in the volunteers folder.</p>
<h2>Getting help</h2>
<p>Nobody expects you to know everything straight away. If you are unsure about anything – a question from a patron, a system you have not used before, or a situation that worries you – ask your supervisor or ring the duty manager. It is always better to ask.</p>
"""

# ---------------------------------------------------------------------------------------
# Notices to patrons in German (HTML) and French (Latin-1 plain text)
# ---------------------------------------------------------------------------------------

NOTICE_DE = """<!DOCTYPE html>
<html lang="de">
<head>
<meta charset="utf-8">
<title>Vorübergehende Schließung der Zweigstelle Brackenmoor</title>
</head>
<body>
<h1>Vorübergehende Schließung der Zweigstelle Brackenmoor</h1>
<p>Liebe Leserinnen und Leser,</p>
<p>die Zweigstelle Brackenmoor in der Weavers Row 3 bleibt vom 2. bis zum 27. März 2026 geschlossen. In dieser Zeit wird das Dach des Gebäudes erneuert, das im vergangenen Winter mehrfach undicht war. Wir bedauern die Unannehmlichkeiten und danken Ihnen für Ihr Verständnis.</p>
<h2>Ausleihen und Rückgaben</h2>
<p>Alle Medien, die während der Schließung fällig werden, verlängern wir automatisch bis zum 10. April 2026. Sie müssen dafür nichts tun, und es entstehen Ihnen keine Gebühren. Die Rückgabebox vor dem Eingang ist während der Bauarbeiten gesperrt. Bitte geben Sie Ihre Medien in einer anderen Zweigstelle zurück.</p>
<p>Vorbestellungen, die Sie in Brackenmoor abholen wollten, werden in die Zweigstelle Tansywell in der Cooper's Lane 14 geschickt. Sie erhalten wie gewohnt eine Nachricht, sobald die Medien bereitliegen. Wenn Ihnen eine andere Zweigstelle lieber ist, sagen Sie uns bitte am Schalter oder telefonisch Bescheid.</p>
<h2>Veranstaltungen</h2>
<p>Die Vorlesestunde für Kleinkinder am Donnerstagvormittag findet während der Schließung in Tansywell statt, zur gewohnten Zeit um halb elf. Der Comic-Workshop am 14. März wird auf Samstag, den 18. April verschoben. Wer bereits einen Platz gebucht hat, behält ihn.</p>
<h2>So erreichen Sie uns</h2>
<p>Die nächstgelegene geöffnete Zweigstelle ist Tansywell, etwa zehn Gehminuten entfernt; die Buslinie 7 hält direkt vor der Tür. Die Zentralbibliothek am Guildhall Square ist auch sonntags geöffnet. Bei Fragen hilft Ihnen das Team an jedem Schalter gern weiter.</p>
<p>Wir freuen uns darauf, Sie ab dem 28. März wieder in einer trockenen und hellen Zweigstelle Brackenmoor zu begrüßen.</p>
<p>Ihr Team der Quillfern Library Cooperative</p>
</body>
</html>
"""

NOTICE_FR = """Quillfern Library Cooperative
Avis aux lecteurs

Fermeture temporaire de la bibliothèque de Brackenmoor

Chères lectrices, chers lecteurs,

La bibliothèque de Brackenmoor, 3 Weavers Row, sera fermée du 2 au 27 mars 2026. Pendant cette période, la toiture du bâtiment sera entièrement refaite, car elle a laissé passer l'eau à plusieurs reprises au cours de l'hiver dernier. Nous sommes désolés de la gêne occasionnée et vous remercions de votre compréhension.

Prêts et retours

Tous les documents dont la date de retour tombe pendant la fermeture seront prolongés automatiquement jusqu'au 10 avril 2026. Vous n'avez rien à faire, et aucune pénalité ne vous sera demandée. La boîte de retour située devant l'entrée restera fermée pendant les travaux : merci de rapporter vos documents dans une autre bibliothèque du réseau.

Les réservations que vous deviez retirer à Brackenmoor seront envoyées à la bibliothèque de Tansywell, 14 Cooper's Lane. Vous recevrez comme d'habitude un message dès qu'elles seront prêtes. Si vous préférez une autre bibliothèque, il suffit de le signaler à l'accueil ou par téléphone.

Animations

L'heure du conte pour les tout-petits du jeudi matin aura lieu à Tansywell pendant la fermeture, à l'heure habituelle de dix heures et demie. L'atelier de bande dessinée prévu le 14 mars est reporté au samedi 18 avril ; les enfants déjà inscrits conservent leur place. Ça ne change rien pour les familles qui ont reçu leur confirmation par courrier.

Nous joindre

La bibliothèque ouverte la plus proche est celle de Tansywell, à environ dix minutes à pied ; la ligne de bus 7 s'arrête juste devant la porte, côté marché. La bibliothèque centrale de Guildhall Square est également ouverte le dimanche. Pour toute question, l'équipe de l'accueil se fera un plaisir de vous aider, où que vous soyez dans le réseau.

Nous serons très heureux de vous retrouver bientôt, dès le 28 mars, dans une bibliothèque de Brackenmoor enfin au sec et plus lumineuse que jamais.

L'équipe de la Quillfern Library Cooperative
"""

# ---------------------------------------------------------------------------------------
# Board minutes (Markdown)
# ---------------------------------------------------------------------------------------

MINUTES_2025_11 = """\
Board of Trustees: Minutes
==========================

Meeting of the Board of Trustees of the Quillfern Library Cooperative, held on Tuesday
18 November 2025 at 18:30 in the community room at Quillfern Central, 2 Guildhall Square.

## Present

- Odile Fenwarrow (chair)
- Bram Oduya (treasurer)
- Sunniva Hartle
- Jonah Pellow
- Ines Catterick (staff representative)

In attendance: Tomasz Quenby (operations coordinator) and Priya Haldane-Moss (finance
officer, taking the minutes). Apologies were received from Wilhelmina Strand.

## 1. Minutes of the previous meeting

The minutes of the meeting held on 16 September 2025 were approved as a correct record.
There were no matters arising that are not covered elsewhere on the agenda.

## 2. Lending policy for 2026

Tomasz Quenby reported on the year-long trial at Lindle Cross and Sorrel Wharf, where no
overdue fines were charged on children's cards. Loans to children rose by eighteen per cent
at the two branches, compared with four per cent across the other three, and the share of
children's items returned late did not change. Several families who had stopped visiting
because of old fines had rejoined.

The Board also considered the proposal to lend e-readers from two branches, funded by the
grant received from the regional reading fund in the summer.

Motion, proposed by Sunniva Hartle and seconded by Jonah Pellow:

```text
That the Board approves the Lending Policy, version 2026.1, with effect from
1 January 2026, including:
  (a) the removal of overdue fines on all items borrowed on children's and
      young people's cards; and
  (b) the lending of e-readers to adult members from Quillfern Central and
      Lindle Cross from March 2026.
```

The motion was carried unanimously.

### Points raised in discussion

1. Bram Oduya noted that children's fines brought in about 1,900 euros in 2024, and that
   the loss is covered by the reading fund grant for the first year.
2. Ines Catterick asked that desk staff be trained on the e-readers before the loans
   start, not after.
3. Jonah Pellow asked for a report on the first six months of e-reader loans at the
   September meeting.

## 3. Roof repairs at Brackenmoor

The surveyor's report confirms that the roof at Brackenmoor must be replaced before next
winter. The contractor can start on 2 March 2026 and expects the work to take four weeks.
The Board agreed that the branch should close for the duration of the works, that loans due
during the closure should be extended automatically, and that notices for patrons should be
produced in English, German and French.

## 4. Any other business

The Friends of Quillfern Libraries have offered to run a café corner in the entrance lobby
at Quillfern Central. The Board welcomed the offer and asked the operations coordinator to
agree the details with the Friends.

## Actions

- **Tomasz Quenby**: publish the 2026 lending policy on the website and at every branch
  by 15 December.
- **Priya Haldane-Moss**: update the charges in the circulation system before 1 January.
- **Ines Catterick**: arrange e-reader training for desk staff in February.
- **Odile Fenwarrow**: write to the Friends of Quillfern Libraries about the café corner.

The meeting closed at 20:10. Next meeting: Tuesday 20 January 2026.
"""

MINUTES_2026_01 = """\
# Board of Trustees: Minutes of 20 January 2026

Meeting of the Board of Trustees of the Quillfern Library Cooperative, held at 18:30 in
the community room at Quillfern Central.

## Present

- Odile Fenwarrow (chair)
- Bram Oduya (treasurer)
- Sunniva Hartle
- Jonah Pellow
- Wilhelmina Strand
- Ines Catterick (staff representative)

In attendance: Tomasz Quenby and Priya Haldane-Moss (minutes).

## 1. Minutes and matters arising

The minutes of 18 November 2025 were approved. The lending policy for 2026 was published
on 12 December, and the charges in the circulation system were updated on 30 December.
The café corner at Quillfern Central will open on 2 February.

Finance report
--------------

Bram Oduya presented the draft budget for 2026. Income from the member councils is
unchanged in cash terms, which means a small cut once rising costs are taken into
account. The draft budget balances by drawing 6,000 euros from reserves, which would
leave reserves above the level the Board set as its minimum.

```
Draft budget 2026 (euros)       2025 actual    2026 draft
---------------------------------------------------------
Council contributions              612,000       612,000
Grants                              38,500        44,000
Fines and charges                   21,300        17,600
Room hire and sales                  9,800        10,400
Total income                       681,600       684,000

Staff                              498,200       515,700
Buildings                           92,400        88,900
Stock                               71,000        68,000
IT and systems                      24,300        17,400
Total spending                     685,900       690,000

Drawn from reserves                  4,300         6,000
```

The Board approved the draft budget. The salary review paper was taken as a confidential
item, and the decision is recorded in the confidential minutes.

## 2. Brackenmoor closure

Tomasz Quenby confirmed the closure dates of 2 to 27 March. Notices have been printed in
three languages, holds will be sent to Tansywell, and the Thursday toddler stories will
move to Tansywell for the four weeks.

## 3. Volunteer recognition

Sunniva Hartle proposed an evening in June to thank the volunteers, who gave more than
6,500 hours last year. The Board agreed and asked for ideas to be collected at the
branches.

- The evening will be held at Lindle Cross, which has the largest meeting room.
- Each branch will nominate one volunteer for a special mention.
- A modest budget of 400 euros was agreed for refreshments.

## Actions

1. Priya Haldane-Moss to circulate the final budget to the member councils by 31 January.
2. Tomasz Quenby to report on the Brackenmoor works at the March meeting.
3. Sunniva Hartle to plan the volunteer evening with the branch supervisors.

The meeting closed at 19:55. Next meeting: Tuesday 17 March 2026.
"""

# ---------------------------------------------------------------------------------------
# Plain text notes
# ---------------------------------------------------------------------------------------

DRIVE_README = """\
About this shared drive
=======================

This is the shared drive of the Quillfern Library Cooperative. Everything that staff and
volunteers at more than one branch need to see lives here. Branch-only material stays on
the branch computers.

How the folders are organised

  operations/   the Branch Operations Handbook, the opening hours, day-to-day guidance
  policies/     policies approved by the Board, one file per yearly revision
  board/        minutes of Board meetings (the confidential minutes are kept elsewhere)
  intranet/     copies of the staff intranet pages, exported each month
  notices/      notices for patrons, including translations
  forms/        forms to print or fill in on screen
  events/       programmes and posters for events
  finance/      scanned receipts and invoices waiting to be filed
  hr/           HR documents; files here are password protected
  volunteers/   volunteer rotas, the welcome slides, notes for volunteer coordinators
  it/           exports and logs from the library systems
  archive/      earlier editions kept for reference, by year; old minutes zipped by year
  mail/         e-mails worth keeping, saved as .eml with their attachments

Naming files

Please use lower case and hyphens, put the year first where a file belongs to a date
(for example 2026-01-20-board-minutes.md), and never overwrite an approved policy:
save the new revision under a new name and move the old one to the archive when the
Board says so.

Who looks after the drive

Tomasz Quenby (operations coordinator, extension 214) looks after the folder structure.
If you cannot find something, or you think a file is in the wrong place, ask him rather
than moving it yourself: other people may have links to it.
"""

VOLUNTEER_ROTA = """\
Volunteer rota – spring 2026
Prepared by Zoë Marchetti, volunteer coordinator, 9 January 2026

This note covers the volunteer shifts from 2 March to 11 April, including the four weeks
while Brackenmoor is closed for the roof repairs. Please check your shifts and tell me by
13 February if anything does not work for you.

Rhyme time (Tansywell, Tuesdays 10:00–10:45)
  Lead: Aurelio Fenn. Helpers: Maud Kestle, Rufus Ayodele.
  Please arrive by 09:40 to set out the mats and the song cards.

Toddler stories (moving from Brackenmoor to Tansywell, Thursdays 10:30–11:15)
  Lead: Hester Vance. Helper: Gideon Marlowe.
  The session uses the small room upstairs at Tansywell only if the main floor is busy.

Homework club (Quillfern Central and Sorrel Wharf, Mondays and Wednesdays from 16:00)
  Central: Noor Halloran and Felix Ambrose on Mondays, Tamsin Oakes on Wednesdays.
  Sorrel Wharf: Piet Lindqvist on both days.
  Remember that volunteers are never alone with a child; stay in the main room.

Digital help (Quillfern Central, Tuesdays and Thursdays from 09:30)
  Tuesdays: Colm Draper. Thursdays: Beatrix Yoon.
  From March the sessions will also cover the new e-readers. Training is on
  19 February at 10:00 in the community room – please come if you can.

Spring reading challenge (all branches, 7 March – 11 April)
  Volunteers at every branch help readers fill in their stamp cards. No extra shifts are
  needed; please keep a few spare cards and pencils at the desk.

Expenses
  Travel between branches is paid at the usual rate of €0.30 a kilometre. Hand your claim
  form to the branch supervisor by the last Friday of the month.

Thank you all. Last year volunteers gave more than 6,500 hours to the cooperative, and the
spring programme would not happen without you.
"""


def _logo_png() -> bytes:
    """A small branch logo, as exported by the label printer software."""
    img = Image.new("RGB", (64, 64), (255, 255, 255))
    draw = ImageDraw.Draw(img)
    draw.ellipse((4, 4, 60, 60), fill=(47, 93, 80))
    draw.polygon([(20, 50), (44, 12), (48, 16), (24, 52)], fill=(240, 236, 220))
    draw.line((18, 54, 26, 46), fill=(240, 236, 220), width=2)
    out = io.BytesIO()
    img.save(out, format="PNG")
    return out.getvalue()


# ---------------------------------------------------------------------------------------
# The drive
# ---------------------------------------------------------------------------------------

# ---------------------------------------------------------------------------------------
# Slide deck and spreadsheet
# ---------------------------------------------------------------------------------------

OFFICE_STAMP = dt.datetime(2026, 1, 19, 10, 0, 0)


def _stable_core(data: bytes) -> bytes:
    """Re-zip (fixed timestamps) with the core properties' dates pinned: the writer
    libraries stamp the time of saving there."""
    src = zipfile.ZipFile(io.BytesIO(data))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as dst:
        for name in sorted(src.namelist(), key=lambda n: (n != "[Content_Types].xml", n)):
            body = src.read(name)
            if name == "docProps/core.xml":
                import re

                body = re.sub(rb"(<dcterms:(?:created|modified)[^>]*>)[^<]*(<)",
                              rb"\g<1>2026-01-19T10:00:00Z\2", body)
            info = zipfile.ZipInfo(name, date_time=DOCX_STAMP)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.create_system = 0
            info.external_attr = 0
            dst.writestr(info, body, compresslevel=6)
    return out.getvalue()


def volunteer_welcome_deck() -> bytes:
    """Slides for new volunteers: a title slide, bullets with speaker notes, a table
    and a group of two boxes, and a hidden draft slide."""
    deck = pptx.Presentation()
    props = deck.core_properties
    props.title = "Welcome, new volunteers"
    props.author = ORG
    props.last_modified_by = "Ines Catterick"
    props.revision = 2
    props.created = props.modified = OFFICE_STAMP
    title, content, blank = deck.slide_layouts[0], deck.slide_layouts[1], deck.slide_layouts[6]
    s = deck.slides.add_slide(title)
    s.shapes.title.text = "Welcome, new volunteers"
    s.placeholders[1].text = "%s - induction, spring 2026" % ORG
    s = deck.slides.add_slide(content)
    s.shapes.title.text = "Your first shift"
    body = s.placeholders[1].text_frame
    body.text = "Sign in at the front desk and collect your badge"
    for text, level in (("The duty coordinator hands out the keys", 1),
                        ("Check the returns trolley", 0), ("Tidy the children's corner", 0)):
        p = body.add_paragraph()
        p.text, p.level = text, level
    s.notes_slide.notes_text_frame.text = (
        "Show where the fire exits are before anything else, and where the first aid box is kept.")
    s = deck.slides.add_slide(blank)
    box = s.shapes.add_textbox(Inches(0.8), Inches(0.5), Inches(8), Inches(0.8))
    box.text_frame.text = "Who to ask at each branch"
    rows = [["Branch", "Coordinator", "Shift starts"], ["Lindle Cross", "Ada Penhallow", "09:00"],
            ["Sorrel Wharf", "Tomasz Quenby", "12:30"], ["Tansywell", "Ines Catterick", "09:00"]]
    table = s.shapes.add_table(4, 3, Inches(0.8), Inches(1.6), Inches(8), Inches(2)).table
    for r, row in enumerate(rows):
        for c, text in enumerate(row):
            table.cell(r, c).text = text
    group = s.shapes.add_group_shape()
    left = group.shapes.add_textbox(Inches(0.8), Inches(4.4), Inches(3.8), Inches(1))
    left.text_frame.text = "Wear the green lanyard on the public floor"
    right = group.shapes.add_textbox(Inches(5), Inches(4.4), Inches(3.8), Inches(1))
    right.text_frame.text = "Never give out a borrower's details"
    s = deck.slides.add_slide(content)
    s.shapes.title.text = "Draft: new rota rules"
    s.placeholders[1].text = "Not agreed yet - do not present"
    s._element.set("show", "0")
    buf = io.BytesIO()
    deck.save(buf)
    return _stable_core(buf.getvalue())


def opening_hours_workbook() -> bytes:
    """Branch opening hours: a title row, a header row, times as times; a second
    sheet of holiday closures with dates; a hidden sheet of key holders."""
    wb = openpyxl.Workbook()
    wb.properties.creator = ORG
    wb.properties.title = "Branch opening hours 2026"
    wb.properties.created = wb.properties.modified = OFFICE_STAMP
    ws = wb.active
    ws.title = "Opening hours"
    ws.append(["Branch opening hours from 1 January 2026"])
    ws.append([])
    ws.append(["Branch", "Day", "Opens", "Closes"])
    for branch, weekday, saturday, sunday in (
        ("Quillfern Central", ("09:00", "19:00"), ("09:00", "17:00"), ("11:00", "15:00")),
        ("Tansywell", ("09:30", "17:30"), ("09:30", "13:00"), None),
        ("Brackenmoor", ("10:00", "18:00"), ("10:00", "16:00"), None),
        ("Lindle Cross", ("09:30", "18:30"), ("09:30", "16:00"), None),
        ("Sorrel Wharf", ("13:00", "19:00"), ("10:00", "14:00"), None),
    ):
        for day, hours in (("Monday to Friday", weekday), ("Saturday", saturday), ("Sunday", sunday)):
            if hours is None:
                ws.append([branch, day, "Closed", None])
                continue
            opens, closes = (dt.time(*map(int, h.split(":"))) for h in hours)
            ws.append([branch, day, opens, closes])
            ws.cell(ws.max_row, 3).number_format = ws.cell(ws.max_row, 4).number_format = "hh:mm"
    closures = wb.create_sheet("Holiday closures")
    closures.append(["Date", "Branches", "Reason"])
    for date, branches, reason in ((dt.date(2026, 4, 3), "All branches", "Good Friday"),
                                   (dt.date(2026, 4, 6), "All branches", "Easter Monday"),
                                   (dt.date(2026, 5, 4), "All except Quillfern Central", "Early May bank holiday"),
                                   (dt.date(2026, 8, 31), "All branches", "Summer bank holiday")):
        closures.append([date, branches, reason])
        closures.cell(closures.max_row, 1).number_format = "yyyy-mm-dd"
    keys = wb.create_sheet("Key holders")
    keys.append(["Branch", "Key holder", "Phone"])
    keys.append(["Lindle Cross", "Ada Penhallow", "01632 960123"])
    keys.append(["Sorrel Wharf", "Tomasz Quenby", "01632 960456"])
    keys.sheet_state = "hidden"
    buf = io.BytesIO()
    wb.save(buf)
    return _stable_core(buf.getvalue())


# Personal data for the personal-data step to find. All invented: e-mail addresses
# under the reserved .example domain (RFC 2606), phone numbers from the ranges Ofcom
# keeps for drama (0113 496 0xxx, 020 7946 0xxx), IBANs of a bank code that does not
# exist ("QUIL") with correct check digits.
STAFF_CONTACTS = """# Staff contact list - central team

Confidential: for the central team and branch supervisors only. Keep it in the HR folder.

| Name | Role | E-mail | Phone |
|---|---|---|---|
| Tomasz Quenby | Operations coordinator | tomasz.quenby@quillfern.example | 0113 496 0214 |
| Priya Haldane-Moss | Finance and payroll | priya.haldane-moss@quillfern.example | 0113 496 0227 |
| Ines Catterick | Stock librarian | ines.catterick@quillfern.example | 0113 496 0231 |
| Rowan Pellifer | Brackenmoor branch supervisor | rowan.pellifer@quillfern.example | 020 7946 0583 |

## Out of hours

The duty supervisor's phone is +44 113 496 0999. Building alarms go to the keyholder
on 020 7946 0112.
"""

EXPENSE_CLAIM = """Quillfern Library Cooperative - expense claim

Claimant: Rowan Pellifer, Brackenmoor branch supervisor
Claim number: EC-2026-0217
Period: 1 to 14 February 2026

Item                                   Date         Amount
Train to the Quillfern Central meeting  03.02.2026   GBP 18.40
Craft materials for story time          09.02.2026   GBP 26.15
Total                                                GBP 44.55

Please pay to: GB34 QUIL 4051 2712 3456 78 (account of R. Pellifer)
Questions about this claim: Priya Haldane-Moss, finance, 0113 496 0227 or
priya.haldane-moss@quillfern.example

Approved by Tomasz Quenby on 16.02.2026. Refunds of overpaid claims go to the
cooperative's account GB73 QUIL 4051 2787 6543 21.
"""


def build_drive() -> list[tuple[str, bytes]]:
    """Every file of the drive as (relative path, bytes), in a fixed order."""
    handbook = render_pdf(
        HANDBOOK,
        running_header=HANDBOOK_HEADER,
        footer_left="Edition 4 - January 2026 - uncontrolled when printed",
        title="Branch Operations Handbook",
        subject="How the branches of the %s are opened, run and closed" % ORG,
    )

    def policy(year: int) -> bytes:
        return render_pdf(
            policy_blocks(year),
            running_header="%s - Lending Policy" % ORG,
            footer_left="Approved by the Board of Trustees",
            title="Lending Policy %d" % year,
            subject="Who may borrow, loan periods, renewals and charges",
        )

    programme = render_pdf(
        PROGRAMME,
        running_header="%s - Spring Reading Programme 2026" % ORG,
        footer_left="Free events at all branches",
        title="Spring Reading Programme 2026",
        subject="Events at all branches in March and April 2026",
    )
    salary = render_pdf(
        SALARY_REVIEW,
        running_header="%s - CONFIDENTIAL" % ORG,
        footer_left="Confidential - not for circulation",
        title="Salary Review 2026",
        subject="Proposed pay ranges from April 2026",
        # 128-bit RC4 derives its keys from the passwords and the (invariant) document ID
        # alone; the AES-256 mode draws salts from reportlab's process-wide random stream,
        # so its bytes would depend on what else the process encrypted before.
        encrypt_factory=lambda: StandardEncryption(
            HR_USER_PASSWORD, HR_OWNER_PASSWORD, canPrint=0, canModify=0, canCopy=0, strength=128
        ),
    )

    return [
        ("README.txt", DRIVE_README.encode("utf-8")),
        ("operations/branch-operations-handbook.pdf", handbook),
        ("archive/2025/branch-operations-handbook.pdf", handbook),
        ("policies/lending-policy-2025.pdf", policy(2025)),
        ("policies/lending-policy-2026.pdf", policy(2026)),
        ("intranet/index.html", intranet_page("Staff news", INTRANET_INDEX, "12 January 2026", "Tomasz Quenby", meta_charset=False)),
        ("intranet/opening-hours.html", intranet_page("Opening hours", INTRANET_HOURS, "5 January 2026", "Tomasz Quenby", meta_charset=True)),
        ("intranet/reporting-a-fault.html", intranet_page("Reporting a fault", INTRANET_FAULT, "3 November 2025", "Fault desk", meta_charset=False)),
        ("intranet/new-staff-welcome.html", intranet_page("Welcome", INTRANET_WELCOME, "8 December 2025", "Ines Catterick", meta_charset=False)),
        ("board/2025-11-18-board-minutes.md", MINUTES_2025_11.encode("utf-8")),
        ("board/2026-01-20-board-minutes.md", MINUTES_2026_01.encode("utf-8")),
        ("notices/brackenmoor-closure.de.html", NOTICE_DE.encode("utf-8")),
        ("notices/brackenmoor-closure.fr.txt", NOTICE_FR.encode("iso-8859-1")),
        ("forms/meeting-room-booking-form.docx", booking_form_docx()),
        ("finance/2026-01-14-receipt-stationery-scan.pdf", receipt_pdf()),
        ("events/spring-reading-programme-2026.pdf", programme[: int(len(programme) * TRUNCATE_FRACTION)]),
        ("hr/salary-review-2026-protected.pdf", salary),
        ("hr/staff-contact-list.md", STAFF_CONTACTS.encode("utf-8")),
        ("finance/2026-02-expense-claim-pellifer.txt", EXPENSE_CLAIM.encode("utf-8")),
        ("volunteers/volunteer-rota-spring-2026.txt", VOLUNTEER_ROTA.encode("utf-8")),
        # The same rota saved again from a Windows program: other bytes (CRLF line ends,
        # Windows-1252), the same text -- a copy only deduplication can recognise.
        ("volunteers/windows-export/volunteer-rota-spring-2026.txt",
         VOLUNTEER_ROTA.replace("\n", "\r\n").encode("cp1252")),
        ("volunteers/welcome-new-volunteers.pptx", volunteer_welcome_deck()),
        ("operations/branch-opening-hours-2026.xlsx", opening_hours_workbook()),
        ("it/scanner-log.txt", b""),
        ("it/label-printer-logo.txt", _logo_png()),
        ("archive/2024-minutes.zip", minutes_zip()),
        ("mail/2026-03-02-lindle-cross-heating.eml", heating_notice_eml()),
    ]


# ---------------------------------------------------------------------------------------
# Documents inside documents: an e-mail with an attachment, a zip of old minutes
# ---------------------------------------------------------------------------------------

MINUTES_STAMP = (2024, 12, 20, 16, 0, 0)

OLD_MINUTES = {
    "march/2024-03-19-board-minutes.md": """\
Board of Trustees: Minutes, 19 March 2024
=========================================

Held at Sorrel Wharf at 18:30. Odile Fenwarrow in the chair.

## 1. Mobile library

The trustees agreed to keep the mobile library on its Tuesday route along the river
villages for another year, and to ask the volunteers which stops they would move.

## 2. Roof at Lindle Cross

The surveyor's report found two cracked slates above the children's corner. Bram Oduya
will ask for three quotes before the June meeting.
""",
    "june/2024-06-18-board-minutes.md": """\
Board of Trustees: Minutes, 18 June 2024
========================================

Held at Quillfern Central at 18:30. Odile Fenwarrow in the chair.

## 1. Roof at Lindle Cross

Three quotes were received. The trustees chose the second, which repairs the slates and
the gutter together, and asked for the work to be done before the autumn half term.

## 2. Summer reading challenge

Ines Catterick reported that two hundred and twelve children had signed up by the end
of the first week, more than in any earlier year.
""",
}


def minutes_zip() -> bytes:
    """Old minutes zipped by year: fixed member order, times and compression."""
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as dst:
        for name in sorted(OLD_MINUTES):
            info = zipfile.ZipInfo(name, date_time=MINUTES_STAMP)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.create_system = 0
            info.external_attr = 0
            dst.writestr(info, OLD_MINUTES[name].encode("utf-8"), compresslevel=6)
    return out.getvalue()


REPAIR_BUDGET = """\
# Repair budget 2026

| Item | Branch | Crowns |
|---|---|---|
| Boiler service and new valve | Lindle Cross | 640 |
| Book binding thread and glue | all branches | 180 |
| Reading room chairs recovered | Quillfern Central | 410 |

The heating works at Lindle Cross come first; the chairs wait until the boiler is paid for.
"""

HEATING_NOTICE_BODY = """\
Dear all,

The heating engineer comes to Lindle Cross on Thursday 5 March, so the branch closes at
one o'clock that day. Please tell patrons who ask, and move the afternoon story time to
Friday. The repair budget for this year is attached.

Ines wrote on Friday:
> Could the story time move to Friday at the same hour?
> The volunteers are free then.

Thank you,
Tomasz
"""


def heating_notice_eml() -> bytes:
    """An e-mail saved as .eml (RFC 5322, MIME): a plain-text body and one attachment."""
    boundary = "quillfern-0302"
    lines = [
        "From: Tomasz Quenby <tomasz.quenby@quillfern.example>",
        "To: Branch staff <staff@quillfern.example>",
        "Cc: Ines Catterick <ines.catterick@quillfern.example>",
        "Subject: Lindle Cross closes early on Thursday: heating works",
        "Date: Mon, 02 Mar 2026 08:45:00 +0000",
        "Message-ID: <2026-03-02-heating@quillfern.example>",
        "MIME-Version: 1.0",
        f'Content-Type: multipart/mixed; boundary="{boundary}"',
        "",
        f"--{boundary}",
        "Content-Type: text/plain; charset=utf-8",
        "Content-Transfer-Encoding: 8bit",
        "",
        HEATING_NOTICE_BODY,
        f"--{boundary}",
        "Content-Type: text/markdown; charset=utf-8",
        'Content-Disposition: attachment; filename="repair-budget-2026.md"',
        "Content-Transfer-Encoding: 8bit",
        "",
        REPAIR_BUDGET,
        f"--{boundary}--",
        "",
    ]
    return "\n".join(lines).encode("utf-8")


def _clear(out: Path, files: list[tuple[str, bytes]]) -> None:
    """Remove what an earlier run wrote; refuse if the directory holds anything else."""
    owned = {rel.split("/", 1)[0] for rel, _ in files}
    if not out.exists():
        return
    if not out.is_dir():
        raise SystemExit("make_sample_drive: %s exists and is not a directory" % out)
    foreign = sorted(p.name for p in out.iterdir() if p.name not in owned)
    if foreign:
        raise SystemExit(
            "make_sample_drive: refusing to wipe %s: it holds entries this script does not "
            "make (%s); remove them or choose another directory" % (out, ", ".join(foreign))
        )
    for name in sorted(owned):
        target = out / name
        if target.is_dir() and not target.is_symlink():
            shutil.rmtree(target)
        elif target.exists() or target.is_symlink():
            target.unlink()


def write_drive(out: Path) -> list[tuple[str, int]]:
    files = build_drive()
    _clear(out, files)
    written = []
    for rel, data in files:
        path = out / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)
        written.append((rel, len(data)))
    return written


def main(argv: list[str]) -> int:
    if argv and argv[0] in ("-h", "--help"):
        print(__doc__.strip())
        return 0
    if len(argv) > 1 or (argv and argv[0].startswith("-")):
        print("usage: make_sample_drive.py [OUTPUT_DIR]", file=sys.stderr)
        return 2
    out = Path(argv[0]) if argv else DEFAULT_OUT
    for rel, size in write_drive(out):
        print("%9d  %s" % (size, rel))
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from sample_times import apply  # the drive's modification times, as make demo sets them

    apply(out)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
