"""Synthetic shared drives for benchmarks: the demo drive's files plus generated ones.

Generated text is invented from a small vocabulary of the fictional cooperative;
PDFs are the demo drive's PDFs with a distinct trailing comment (still valid PDFs,
distinct content hashes), so large and small documents mix as on a real drive.
"""

from __future__ import annotations

import random
import shutil
from pathlib import Path

from bench import REPO

SAMPLE = REPO / "sample_inputs"

SUBJECTS = ["The branch team", "The mobile library", "The board", "Every volunteer", "The duty manager",
            "The reading group", "The youth librarian", "The cataloguing desk", "The finance officer"]
VERBS = ["reviews", "updates", "records", "checks", "prepares", "schedules", "reports on", "collects"]
OBJECTS = ["the returns log", "the opening hours", "the holds list", "the event calendar", "the stock rota",
           "the incident book", "the visitor figures", "the van timetable", "the donation records"]
TAILS = ["every Monday morning.", "before the branch opens.", "at the end of each month.",
         "when a patron asks for it.", "after each school visit.", "once the quarter closes."]


def _paragraph(rng: random.Random, n: int) -> str:
    return " ".join(f"{rng.choice(SUBJECTS)} {rng.choice(VERBS)} {rng.choice(OBJECTS)} {rng.choice(TAILS)}"
                    for _ in range(n))


def _markdown(rng: random.Random, i: int) -> str:
    parts = [f"# Branch note {i}", ""]
    for s in range(rng.randint(2, 5)):
        parts += [f"## Section {s + 1}", "", _paragraph(rng, rng.randint(3, 12)), ""]
    return "\n".join(parts)


def _html(rng: random.Random, i: int) -> str:
    body = "".join(f"<h2>Topic {s + 1}</h2><p>{_paragraph(rng, rng.randint(3, 10))}</p>" for s in range(3))
    return (f"<html><head><title>Intranet page {i}</title></head><body><nav><a href='/'>Home</a></nav>"
            f"<main><h1>Intranet page {i}</h1>{body}</main><footer>Quillfern staff intranet</footer></body></html>")


def make_drive(root: Path, documents: int, seed: int = 7, large_share: float = 0.03) -> Path:
    """A drive of about `documents` files: mostly small notes, a few multi-page PDFs."""
    rng = random.Random(seed)
    root.mkdir(parents=True, exist_ok=True)
    shutil.copytree(SAMPLE, root / "demo", dirs_exist_ok=True)
    pdfs = sorted(p for p in SAMPLE.rglob("*.pdf") if "protected" not in p.name and "scan" not in p.name)
    n_large = max(1, int(documents * large_share))
    for i in range(n_large):
        src = pdfs[i % len(pdfs)]
        data = src.read_bytes() + f"\n% bench copy {i}\n".encode()
        (root / "pdf" / f"{src.stem}-{i:04d}.pdf").parent.mkdir(parents=True, exist_ok=True)
        (root / "pdf" / f"{src.stem}-{i:04d}.pdf").write_bytes(data)
    for i in range(documents - n_large - 20):
        folder = root / f"notes-{i % 10}"
        folder.mkdir(exist_ok=True)
        if i % 3 == 0:
            (folder / f"page-{i:05d}.html").write_text(_html(rng, i), encoding="utf-8")
        else:
            (folder / f"note-{i:05d}.md").write_text(_markdown(rng, i), encoding="utf-8")
    return root


def add_large_pdfs(root: Path, count: int, copies: int = 10) -> list[Path]:
    """Book-length PDFs: the demo handbook's pages repeated `copies` times (7 pages each)."""
    import pypdfium2 as pdfium

    src = pdfium.PdfDocument(str(SAMPLE / "operations" / "branch-operations-handbook.pdf"))
    out = []
    for i in range(count):
        dst = pdfium.PdfDocument.new()
        for _ in range(copies + i):  # different lengths, so each is its own document
            dst.import_pages(src)
        path = root / "books" / f"handbook-compilation-{i:02d}.pdf"
        path.parent.mkdir(parents=True, exist_ok=True)
        dst.save(str(path))
        out.append(path)
    return out


def change_files(root: Path, share: float, seed: int = 11) -> list[Path]:
    """Edit a share of the generated notes (appending a paragraph), as a week would."""
    rng = random.Random(seed)
    notes = sorted(root.glob("notes-*/*.md"))
    chosen = rng.sample(notes, max(1, round(len(list(root.rglob("*.*"))) * share)))
    for p in chosen:
        p.write_text(p.read_text(encoding="utf-8") + "\n\n## Update\n\n" + _paragraph(rng, 4) + "\n",
                     encoding="utf-8")
    return chosen
