"""Loader throughput per format: pages (slides, sheets, messages) per second.

    .venv/bin/python tests/bench/loaders.py [--units 200] [--repeat 3]

Two columns per format: the demo corpus's files of that format, and one generated
document of ``--units`` pages (slides, sheets; for mail, that many messages) built
with the tests' builders. Parsing is timed from bytes in memory (no disk), best of
``--repeat`` runs; OCR (the scanned PDF) runs once, with the OCR time cap lifted.
"""

from __future__ import annotations

import argparse
import io
import sys
import time
from pathlib import Path

import pypdf

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from sounding.indexer.loaders import LoadLimits, file_suffix, parse_document  # noqa: E402

from tests.unit.loading import make_pdf  # noqa: E402
from tests.unit.office_files import (  # noqa: E402
    docx_bytes,
    eml_bytes,
    odp_bytes,
    ods_bytes,
    odt_bytes,
    pptx_bytes,
    scanned_pdf_bytes,
    xlsx_bytes,
)

DEMO = ROOT / "demo_corpus"
LIMITS = LoadLimits(max_chars=50_000_000, ocr_seconds=3600)
PARAGRAPH = (
    "The duty engineer checks the reservoir levels at Brackwell and Otterbrook, confirms "
    "the chlorine residual at each works outlet and records the readings in Gaugehouse "
    "before the morning handover to the control room. "
) * 3  # about 600 characters: five of these make a page of prose


def page_blocks(units: int) -> list[tuple[str, object]]:
    blocks: list[tuple[str, object]] = []
    for page in range(units):
        blocks.append(("h1" if page % 10 == 0 else "h2", f"Section {page + 1}"))
        blocks += [("p", PARAGRAPH)] * 5
    return blocks


def generated(kind: str, units: int) -> list[bytes]:
    """One document of ``units`` pages of ``kind`` (for mail: ``units`` messages)."""
    slides = [
        (f"Slide {i + 1}", [PARAGRAPH[:200], PARAGRAPH[200:400]], "Notes.") for i in range(units)
    ]
    sheets = {
        f"Sheet {i + 1}": [
            ["Asset tag", "Site", "Installed"],
            *([f"PMP-{i:03}{r:02}", "Ferncombe", 2017] for r in range(50)),
        ]
        for i in range(units)
    }
    if kind == "docx":
        return [docx_bytes(page_blocks(units))]
    if kind == "odt":
        return [odt_bytes(page_blocks(units))]
    if kind == "pptx":
        return [pptx_bytes(slides)]
    if kind == "odp":
        return [odp_bytes(slides)]
    if kind == "xlsx":
        return [xlsx_bytes(sheets)]
    if kind == "ods":
        return [ods_bytes(sheets)]
    if kind == "mail":
        return [
            eml_bytes(
                subject=f"Handover {i}", sender="a@q.example", to="b@q.example", body=PARAGRAPH * 5
            )
            for i in range(units)
        ]
    if kind == "pdf (text)":
        return [make_pdf([[PARAGRAPH[j : j + 90] for j in range(0, 540, 90)]] * units)]
    if kind == "pdf (scanned)":
        lines = ["Quillmere Water Cooperative", "Hot work permit", "Fire watch: 60 minutes"]
        return [scanned_pdf_bytes([lines] * units)]
    raise ValueError(kind)


def units_of(kind: str, data: bytes) -> int:
    """Pages, slides, sheets or messages in one file, as the loader counts them."""
    doc = parse(kind, data)
    if kind.startswith("pdf"):
        return len(pypdf.PdfReader(io.BytesIO(data)).pages)
    if kind in ("pptx", "odp"):
        return int(doc.metadata["slides"])
    if kind in ("xlsx", "ods"):
        return len(doc.metadata["sheets"])
    if kind == "mail":
        return 1
    return max(1, round(sum(len(s.text) for s in doc.sections) / 3000))  # 3,000 chars a page


def parse(kind: str, data: bytes):  # noqa: ANN201 - a Document
    loader_kind = kind.split(" ")[0]
    return parse_document(
        data, loader_kind, doc_id="b", name="b", source="b", modified=0.0, limits=LIMITS
    )


def timed(kind: str, files: list[bytes], repeat: int) -> tuple[int, float]:
    units = sum(units_of(kind, f) for f in files)
    best = float("inf")
    for _ in range(1 if kind == "pdf (scanned)" else repeat):
        start = time.perf_counter()
        for data in files:
            parse(kind, data)
        best = min(best, time.perf_counter() - start)
    return units, best


def demo_files(kind: str) -> list[bytes]:
    suffixes = {
        "docx": {".docx"},
        "odt": {".odt"},
        "pptx": {".pptx"},
        "odp": {".odp"},
        "xlsx": {".xlsx"},
        "ods": {".ods"},
        "mail": {".eml"},
        "pdf (text)": {".pdf"},
        "pdf (scanned)": {".pdf"},
    }[kind]
    out = []
    for path in sorted(DEMO.rglob("*")):
        if path.is_file() and file_suffix(path.name) in suffixes:
            scanned = "forms/" in path.as_posix()
            if kind.startswith("pdf") and scanned != (kind == "pdf (scanned)"):
                continue
            out.append(path.read_bytes())
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--units", type=int, default=200)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--kinds", nargs="*", default=None)
    args = parser.parse_args()
    kinds = args.kinds or [
        "docx",
        "odt",
        "pptx",
        "odp",
        "xlsx",
        "ods",
        "mail",
        "pdf (text)",
        "pdf (scanned)",
    ]
    unit = {
        "pptx": "slides",
        "odp": "slides",
        "xlsx": "sheets",
        "ods": "sheets",
        "mail": "messages",
    }
    head = f"| format | unit | demo files | demo units/s | generated {args.units} | units/s |"
    print(head)
    print("| --- | --- | --- | --- | --- | --- |")
    for kind in kinds:
        files = demo_files(kind)
        if files:
            n, seconds = timed(kind, files, args.repeat)
            demo = f"{len(files)} files, {n} in {seconds:.2f} s", f"{n / seconds:,.1f}"
        else:
            demo = "none", "-"
        n, seconds = timed(kind, generated(kind, args.units), args.repeat)
        print(
            f"| {kind} | {unit.get(kind, 'pages')} | {demo[0]} | {demo[1]} | "
            f"{n} in {seconds:.2f} s | {n / seconds:,.1f} |",
            flush=True,
        )


if __name__ == "__main__":
    main()
