"""Builders of small office files, mail and scanned PDFs for the loader tests and benches.

Each returns the file's bytes, written with the same libraries the loaders read
with (odfpy for OpenDocument, Pillow for the scan), so a round trip tests what
a real file of that kind holds.
"""

from __future__ import annotations

import datetime as dt
import email
import io
from collections.abc import Sequence
from email import policy
from email.message import EmailMessage
from pathlib import Path

import docx
import openpyxl
import pptx
from odf import draw, presentation, style, table, text
from odf.namespaces import PRESENTATIONNS
from odf.opendocument import (
    OpenDocumentPresentation,
    OpenDocumentSpreadsheet,
    OpenDocumentText,
)
from PIL import Image, ImageDraw, ImageFont

Rows = Sequence[Sequence[object]]
FONT = Path("/usr/share/fonts/truetype/dejavu/DejaVuSans.ttf")


def docx_bytes(
    blocks: Sequence[tuple[str, object]],
    *,
    title: str = "",
    author: str = "",
    created: dt.datetime | None = None,
) -> bytes:
    """A .docx of ("h1".."h9", text), ("p", text), ("title", text) or ("table", rows)."""
    document = docx.Document()
    for kind, value in blocks:
        if kind == "title":
            document.add_heading(str(value), level=0)
        elif kind.startswith("h"):
            document.add_heading(str(value), level=int(kind[1:]))
        elif kind == "table":
            rows = list(value)  # type: ignore[call-overload]
            grid = document.add_table(rows=len(rows), cols=max(len(r) for r in rows))
            for i, row in enumerate(rows):
                for j, cell in enumerate(row):
                    grid.cell(i, j).text = str(cell)
        else:
            document.add_paragraph(str(value))
    props = document.core_properties
    props.title, props.author = title, author
    if created is not None:
        props.created = props.modified = created
    out = io.BytesIO()
    document.save(out)
    return out.getvalue()


def pptx_bytes(
    slides: Sequence[tuple[str, Sequence[str], str]], *, title: str = "", author: str = ""
) -> bytes:
    """A .pptx of (title, bullet lines, speaker notes) slides."""
    deck = pptx.Presentation()
    layout = deck.slide_layouts[1]  # "Title and Content"
    for heading, bullets, notes in slides:
        slide = deck.slides.add_slide(layout)
        slide.shapes.title.text = heading
        body = slide.placeholders[1].text_frame
        body.text = bullets[0] if bullets else ""
        for line in bullets[1:]:
            body.add_paragraph().text = line
        if notes:
            slide.notes_slide.notes_text_frame.text = notes
    deck.core_properties.title, deck.core_properties.author = title, author
    out = io.BytesIO()
    deck.save(out)
    return out.getvalue()


def xlsx_bytes(sheets: dict[str, Rows], *, title: str = "", author: str = "") -> bytes:
    """An .xlsx with one sheet per entry; a value starting with "=" is a formula."""
    book = openpyxl.Workbook()
    book.remove(book.active)
    for name, rows in sheets.items():
        sheet = book.create_sheet(name)
        for row in rows:
            sheet.append(list(row))
    book.properties.title, book.properties.creator = title, author
    out = io.BytesIO()
    book.save(out)
    return out.getvalue()


def with_cached_values(data: bytes, values: dict[str, str]) -> bytes:
    """``data`` (.xlsx) with cached results written for formula cells (cell ref → value),
    as Excel or LibreOffice store them on save; openpyxl itself writes none."""
    import zipfile

    source = zipfile.ZipFile(io.BytesIO(data))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as target:
        for info in source.infolist():
            body = source.read(info)
            if info.filename.startswith("xl/worksheets/sheet"):
                xml = body.decode("utf-8")
                for ref, value in values.items():
                    if f'r="{ref}"' not in xml:
                        continue
                    start = xml.index(f'r="{ref}"')
                    close = xml.index("</f>", start) + len("</f>")
                    xml = xml[:close] + f"<v>{value}</v>" + xml[close:]
                body = xml.encode("utf-8")
            target.writestr(info, body)
    return out.getvalue()


def odt_bytes(blocks: Sequence[tuple[str, object]], *, title: str = "", author: str = "") -> bytes:
    """An .odt of ("h1".."h9", text), ("p", text) or ("table", rows)."""
    document = OpenDocumentText()
    for kind, value in blocks:
        if kind.startswith("h"):
            document.text.addElement(text.H(outlinelevel=int(kind[1:]), text=str(value)))
        elif kind == "table":
            grid = table.Table(name=f"Table{len(document.text.childNodes)}")
            for row in value:  # type: ignore[attr-defined]
                tr = table.TableRow()
                for cell in row:
                    tc = table.TableCell(valuetype="string")
                    tc.addElement(text.P(text=str(cell)))
                    tr.addElement(tc)
                grid.addElement(tr)
            document.text.addElement(grid)
        else:
            document.text.addElement(text.P(text=str(value)))
    _odf_meta(document, title, author)
    out = io.BytesIO()
    document.write(out)
    return out.getvalue()


def odp_bytes(slides: Sequence[tuple[str, Sequence[str], str]], *, title: str = "") -> bytes:
    """An .odp of (title, lines, speaker notes) slides."""
    document = OpenDocumentPresentation()
    layout = style.PageLayout(name="Layout")
    document.automaticstyles.addElement(layout)
    master = style.MasterPage(name="Default", pagelayoutname=layout)
    document.masterstyles.addElement(master)
    for number, (heading, lines, notes) in enumerate(slides, start=1):
        page = draw.Page(name=f"page{number}", masterpagename=master)
        frame = _frame("title", "1cm")
        box = draw.TextBox()
        box.addElement(text.P(text=heading))
        frame.addElement(box)
        page.addElement(frame)
        body = _frame("outline", "5cm")
        box = draw.TextBox()
        for line in lines:
            box.addElement(text.P(text=line))
        body.addElement(box)
        page.addElement(body)
        if notes:
            pnotes = presentation.Notes()
            nframe = _frame("notes", "1cm")
            nbox = draw.TextBox()
            nbox.addElement(text.P(text=notes))
            nframe.addElement(nbox)
            pnotes.addElement(nframe)
            page.addElement(pnotes)
        document.presentation.addElement(page)
    _odf_meta(document, title, "")
    out = io.BytesIO()
    document.write(out)
    return out.getvalue()


def _frame(kind: str, y: str) -> draw.Frame:
    frame = draw.Frame(width="20cm", height="4cm", x="1cm", y=y)
    frame.setAttrNS(PRESENTATIONNS, "class", kind)
    return frame


def ods_bytes(sheets: dict[str, Rows], *, title: str = "", repeat_tail: bool = True) -> bytes:
    """An .ods with one sheet per entry; numbers as float cells. ``repeat_tail`` adds the
    million-row run of empty cells LibreOffice writes at the end of every sheet."""
    document = OpenDocumentSpreadsheet()
    for name, rows in sheets.items():
        grid = table.Table(name=name)
        for row in rows:
            tr = table.TableRow()
            for cell in row:
                if isinstance(cell, (int, float)):
                    tc = table.TableCell(valuetype="float", value=str(cell))
                else:
                    tc = table.TableCell(valuetype="string")
                tc.addElement(text.P(text=str(cell)))
                tr.addElement(tc)
            grid.addElement(tr)
        if repeat_tail:
            tail = table.TableRow(numberrowsrepeated=1_048_000)
            tail.addElement(table.TableCell(numbercolumnsrepeated=1024))
            grid.addElement(tail)
        document.spreadsheet.addElement(grid)
    _odf_meta(document, title, "")
    out = io.BytesIO()
    document.write(out)
    return out.getvalue()


def _odf_meta(document: object, title: str, author: str) -> None:
    from odf import dc, meta

    if title:
        document.meta.addElement(dc.Title(text=title))  # type: ignore[attr-defined]
    if author:
        document.meta.addElement(meta.InitialCreator(text=author))  # type: ignore[attr-defined]


def eml_bytes(
    *,
    subject: str,
    sender: str,
    to: str,
    body: str,
    date: str = "Tue, 13 Oct 2026 09:30:00 +0100",
    html: str | None = None,
    attachments: Sequence[tuple[str, bytes, str]] = (),
) -> bytes:
    """A message with a plain body (and an HTML alternative), attachments as
    (file name, bytes, MIME type)."""
    message = EmailMessage()
    message["Subject"], message["From"], message["To"], message["Date"] = (
        subject,
        sender,
        to,
        date,
    )
    message["Message-ID"] = f"<{abs(hash(subject))}@quillmere.example>"
    message.set_content(body)
    if html is not None:
        message.add_alternative(html, subtype="html")
    for name, data, mime in attachments:
        main, sub = mime.split("/", 1)
        if mime == "message/rfc822":  # attached as a message (RFC 2046: never base64)
            inner = email.message_from_bytes(data, policy=policy.default)
            message.add_attachment(inner, filename=name)
        else:
            message.add_attachment(data, maintype=main, subtype=sub, filename=name)
    return message.as_bytes()


def text_image(lines: Sequence[str], *, width: int = 1240, size: int = 28) -> Image.Image:
    """A white page with ``lines`` in black DejaVu Sans, as a scanner at 150 dpi gives."""
    font = ImageFont.truetype(str(FONT), size) if FONT.exists() else ImageFont.load_default()
    line_height = int(size * 1.6)
    image = Image.new("L", (width, max(400, 120 + line_height * len(lines))), 255)
    pen = ImageDraw.Draw(image)
    for i, line in enumerate(lines):
        pen.text((80, 80 + i * line_height), line, fill=0, font=font)
    return image


def scanned_pdf_bytes(pages: Sequence[Sequence[str]], *, dpi: int = 150) -> bytes:
    """An image-only PDF: each page one image of its lines, no text layer."""
    images = [text_image(lines) for lines in pages]
    out = io.BytesIO()
    images[0].save(out, "PDF", resolution=dpi, save_all=True, append_images=images[1:])
    return out.getvalue()
