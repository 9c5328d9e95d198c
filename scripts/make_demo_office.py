"""Write the demo corpus's office files, mail and scanned form (Quillmere Water Cooperative).

    .venv/bin/python scripts/make_demo_office.py [--out demo_corpus]

Everything here is invented. The files are committed; run this again to rebuild
them after changing the text below. Zip members, document properties and the
scan's PDF get fixed dates, so a rebuild of unchanged text gives the same bytes.
Fonts: DejaVu Sans from Debian's fonts-dejavu-core (apt-get install fonts-dejavu-core).
"""

from __future__ import annotations

import argparse
import datetime as dt
import io
import re
import zipfile
from email import policy
from email.message import EmailMessage
from email.parser import BytesParser
from pathlib import Path

import docx
import openpyxl
import pptx
from odf import dc, meta, text
from odf.opendocument import OpenDocumentText
from PIL import Image, ImageDraw, ImageFont

ROOT = Path(__file__).resolve().parent.parent
FONT = Path("/usr/share/fonts/truetype/dejavu/DejaVuSans.ttf")
FIXED = (2026, 10, 1, 9, 0, 0)
WHEN = dt.datetime(2026, 10, 1, 9, 0, 0)


def fixed_zip(data: bytes) -> bytes:
    """The zip ``data`` with every member dated FIXED (and the order kept)."""
    source = zipfile.ZipFile(io.BytesIO(data))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as target:
        for info in source.infolist():
            copy = zipfile.ZipInfo(info.filename, date_time=FIXED)
            copy.compress_type = info.compress_type
            copy.external_attr = info.external_attr
            body = source.read(info)
            if info.filename == "docProps/core.xml":  # openpyxl stamps its save time here
                body = re.sub(
                    rb"(<dcterms:modified[^>]*>)[^<]*(</dcterms:modified>)",
                    rb"\g<1>2026-10-01T09:00:00Z\g<2>",
                    body,
                )
            target.writestr(copy, body)
    return out.getvalue()


def fleet_policy() -> bytes:
    """A policy as .docx: headings, a table, core properties."""
    d = docx.Document()
    d.add_heading("Vehicle and fleet policy", level=0)
    d.add_paragraph(
        "This policy covers the cooperative's pool vans, the two tanker lorries and private "
        "cars used on cooperative business. It is owned by the Fleet Manager, Tomasz Wray, "
        "and reviewed every October."
    )
    d.add_heading("Pool vans", level=1)
    d.add_heading("Booking", level=2)
    d.add_paragraph(
        "Pool vans are booked in Harkline under Fleet, at least one working day ahead. Keys "
        "are collected from the Sallow Lane depot key safe with your site card."
    )
    d.add_heading("Taking a van home", level=2)
    d.add_paragraph(
        "A pool van may be kept overnight at home only by the standby engineer on duty or by "
        "staff starting a site visit before 07:00 the next day, and only with the Fleet "
        "Manager's approval recorded in the booking. Vans are never used for private trips."
    )
    d.add_heading("Fuel cards", level=2)
    d.add_paragraph(
        "Each van carries a fuel card locked to diesel and AdBlue. Enter the odometer reading "
        "at every fill; a missing reading is queried by Finance within a week."
    )
    d.add_heading("The van fleet", level=1)
    d.add_paragraph("Each van belongs to a base and returns there at the end of the day:")
    rows = [
        ("Van", "Base", "Type", "Fitted for"),
        ("QW-14", "Sallow Lane depot", "Panel van, 3.5 t", "Network repairs, standpipes"),
        ("QW-17", "Millrace treatment works", "Crew van, 6 seats", "Process and chemical work"),
        ("QW-21", "Ferncombe pumping station", "Electric panel van", "Instrument technicians"),
        ("QW-22", "Sallow Lane depot", "Electric panel van", "Meter fitters"),
    ]
    table = d.add_table(rows=len(rows), cols=4)
    for i, row in enumerate(rows):
        for j, value in enumerate(row):
            table.cell(i, j).text = value
    d.add_paragraph(
        "Private cars used on cooperative business are claimed as mileage under the expense "
        "claims policy, not under this one."
    )
    d.add_heading("Telematics and driving standards", level=1)
    d.add_paragraph(
        "Every van has a Trackwise telematics unit. Harsh braking and speeding events are "
        "reviewed monthly; three events in a quarter lead to a refresher drive with the "
        "fleet trainer. Phones stay in the cradle and on hands-free."
    )
    d.add_heading("Accidents and damage", level=1)
    d.add_paragraph(
        "Stop, make the scene safe and call the control room on extension 4400. Photograph "
        "both vehicles and report the damage on the accident form within 24 hours."
    )
    props = d.core_properties
    props.title = "Vehicle and fleet policy"
    props.author = "Tomasz Wray"
    props.last_modified_by = "Tomasz Wray"
    props.created = props.modified = WHEN
    props.subject = "Fleet"
    props.keywords = "policy, fleet, vans"
    out = io.BytesIO()
    d.save(out)
    return fixed_zip(out.getvalue())


BOARD = [
    (
        "Board meeting, October 2026",
        ["Quillmere Water Cooperative", "Presented by Maren Oduya and Lotte Brannigan"],
        "Welcome the two new member directors.",
    ),
    (
        "Capital programme 2027",
        [
            "Mains renewal: 18 km of cast-iron main in the Ashgrove and Millrace districts",
            "Brackwell service reservoir: roof membrane replaced, April to June",
            "Total capital spend: 6.4 million pounds, up 9% on 2026",
        ],
        "The 18 km is the largest renewal year since 2019; most is Ashgrove.",
    ),
    (
        "Leakage",
        [
            "Leakage down to 61 litres per property per day (target 58)",
            "Night-flow alarms now on every district meter",
        ],
        "",
    ),
    (
        "Tariff proposal for 2027",
        [
            "Average household bill up 3.2%, to 412 pounds a year",
            "Social tariff widened to households on Pension Credit",
        ],
        "Members vote on the tariff at the AGM on 5 December.",
    ),
    (
        "Risks",
        [
            "Sodium hypochlorite supply: one supplier, deliveries late twice this quarter",
            "Ageing pumps at Otterbrook booster station",
        ],
        "",
    ),
]


def board_deck() -> bytes:
    """A board deck as .pptx: titled slides with speaker notes."""
    deck = pptx.Presentation()
    title_layout, body_layout = deck.slide_layouts[0], deck.slide_layouts[1]
    for number, (heading, lines, notes) in enumerate(BOARD):
        slide = deck.slides.add_slide(title_layout if number == 0 else body_layout)
        slide.shapes.title.text = heading
        body = slide.placeholders[1].text_frame
        body.text = lines[0]
        for line in lines[1:]:
            body.add_paragraph().text = line
        if notes:
            slide.notes_slide.notes_text_frame.text = notes
    props = deck.core_properties
    props.title = "Board meeting, October 2026"
    props.author = props.last_modified_by = "Maren Oduya"
    props.created = props.modified = WHEN
    props.revision = 1
    out = io.BytesIO()
    deck.save(out)
    return fixed_zip(out.getvalue())


def asset_register() -> bytes:
    """An asset register as .xlsx: two sheets, a header row, a formula with its cached value."""
    book = openpyxl.Workbook()
    pumps = book.active
    pumps.title = "Pumps"
    pumps.append(["Asset tag", "Site", "Make and model", "Installed", "Last service", "Duty"])
    rows = [
        ("PMP-0112", "Otterbrook booster station", "Grundfos CR 64", 2009, "2026-03-11", "duty"),
        ("PMP-0113", "Otterbrook booster station", "Grundfos CR 64", 2009, "2026-03-11", "standby"),
        ("PMP-0140", "Ferncombe pumping station", "KSB Etanorm 125", 2017, "2026-06-02", "duty"),
        ("PMP-0141", "Ferncombe pumping station", "KSB Etanorm 125", 2017, "2026-06-02", "standby"),
        ("PMP-0201", "Millrace treatment works", "Xylem Flygt NP 3171", 2021, "2026-08-19", "duty"),
    ]
    for row in rows:
        pumps.append(list(row))
    generators = book.create_sheet("Generators")
    generators.append(["Asset tag", "Site", "Rating (kVA)", "Fuel (litres)", "Run time (hours)"])
    generators.append(["GEN-007", "Ferncombe pumping station", 250, 900, "=ROUND(D2/41,0)"])
    generators.append(["GEN-009", "Millrace treatment works", 500, 2400, "=ROUND(D3/66,0)"])
    book.properties.title = "Asset register: pumps and generators"
    book.properties.creator = "Dafydd Rook"
    book.properties.created = book.properties.modified = WHEN
    out = io.BytesIO()
    book.save(out)
    # Excel stores a formula's last result beside it; openpyxl writes none, so add them.
    return fixed_zip(_cache(out.getvalue(), "xl/worksheets/sheet2.xml", {"E2": "22", "E3": "36"}))


def _cache(data: bytes, part: str, values: dict[str, str]) -> bytes:
    source = zipfile.ZipFile(io.BytesIO(data))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as target:
        for info in source.infolist():
            body = source.read(info)
            if info.filename == part:
                xml = body.decode("utf-8")
                for ref, value in values.items():
                    close = xml.index("</f>", xml.index(f'r="{ref}"')) + len("</f>")
                    xml = xml[:close] + f"<v>{value}</v>" + xml[close:]
                body = xml.encode("utf-8")
            target.writestr(info, body)
    return out.getvalue()


def volunteering() -> bytes:
    """A guide as .odt: outline-level headings and paragraphs."""
    d = OpenDocumentText()
    blocks = [
        (1, "Community volunteering days"),
        (
            0,
            "Quillmere is a cooperative owned by the households it serves, and we want staff "
            "to give time back to those communities.",
        ),
        (2, "How many days"),
        (
            0,
            "Every member of staff may take two paid volunteering days a year, pro rata for "
            "part-time colleagues. Unused days do not carry over.",
        ),
        (2, "What counts"),
        (
            0,
            "River clean-ups with the Otter Valley Trust, school visits about where tap "
            "water comes from, and helping at the Sallow Lane food bank all count. Political "
            "campaigning does not.",
        ),
        (2, "How to book"),
        (
            0,
            "Agree the date with your manager, then record it in the HR system as "
            "Volunteering. Team volunteering days are organised by Nell Ashby in "
            "Communications.",
        ),
    ]
    for level, body in blocks:
        if level:
            d.text.addElement(text.H(outlinelevel=level, text=body))
        else:
            d.text.addElement(text.P(text=body))
    d.meta.addElement(dc.Title(text="Community volunteering days"))
    d.meta.addElement(meta.InitialCreator(text="Nell Ashby"))
    d.meta.addElement(meta.CreationDate(text="2026-09-15T10:00:00"))
    out = io.BytesIO()
    d.write(out)
    return fixed_zip(out.getvalue())


def smart_meter_costs() -> bytes:
    book = openpyxl.Workbook()
    sheet = book.active
    sheet.title = "Phase 2 by district"
    sheet.append(["District", "Meters", "Installation cost", "Start"])
    for row in [
        ("Ashgrove", 4200, "382,000 pounds", "2027-01"),
        ("Millrace", 3100, "291,000 pounds", "2027-03"),
        ("Ferncombe", 1800, "176,000 pounds", "2027-05"),
    ]:
        sheet.append(list(row))
    book.properties.title = "Smart meter rollout, phase 2 costs"
    book.properties.creator = "Lotte Brannigan"
    book.properties.created = book.properties.modified = WHEN
    out = io.BytesIO()
    book.save(out)
    return fixed_zip(out.getvalue())


def mail(subject: str, sender: str, to: str, date: str, body: str, msg_id: str) -> EmailMessage:
    message = EmailMessage(policy=policy.default)
    message["Subject"], message["From"], message["To"] = subject, sender, to
    message["Date"], message["Message-ID"] = date, f"<{msg_id}@quillmere.example>"
    message.set_content(body)
    return message


def smart_meter_mail() -> bytes:
    message = mail(
        "Smart meter rollout: phase 2 costs for the board",
        "Lotte Brannigan <lotte.brannigan@quillmere.example>",
        "Maren Oduya <maren.oduya@quillmere.example>",
        "Wed, 14 Oct 2026 16:05:00 +0100",
        "Hi Maren,\n\nAttached are the phase 2 smart meter installation costs by district, "
        "for the board papers. Ashgrove goes first in January; the contractor has held "
        "the unit price from phase 1.\n\nLotte\n",
        "smart-meter-phase2",
    )
    message.add_attachment(
        smart_meter_costs(),
        maintype="application",
        subtype="vnd.openxmlformats-officedocument.spreadsheetml.sheet",
        filename="smart-meter-phase2-costs.xlsx",
    )
    # One boundary, fixed, so a rebuild gives the same bytes.
    message.set_boundary("quillmere-demo-boundary")
    return message.as_bytes()


def hypochlorite_mail() -> bytes:
    message = mail(
        "Re: Sodium hypochlorite delivery to Brackwell delayed",
        "Sunniva Peake <sunniva.peake@quillmere.example>",
        "Treatment operators <operators@quillmere.example>",
        "Mon, 19 Oct 2026 07:42:00 +0100",
        "Morning all,\n\nClearwell Chemicals have moved the Brackwell sodium hypochlorite "
        "delivery from Tuesday to Thursday 22 October, first thing. Bulk tank 2 is at 38%, "
        "enough for five days at current dosing, so there is no need to switch to the "
        "standby tank yet.\n\nIf the level falls below 25% before the tanker arrives, call "
        "the duty manager and we will move a day tank over from Millrace.\n\nSunniva\n"
        "Control room manager\n",
        "hypochlorite-brackwell",
    )
    return message.as_bytes()


HOT_WORK = [
    "QUILLMERE WATER COOPERATIVE",
    "HOT WORK PERMIT  (form HW-2, revised 2019)",
    "",
    "Site: Millrace treatment works, chemical building",
    "Work: welding of pipe supports, dosing room 2",
    "",
    "Before work starts:",
    "  Combustibles cleared for 10 metres around the work",
    "  Two foam fire extinguishers at the work area",
    "  Smoke detectors in the room isolated by the control room",
    "",
    "Fire watch: stays for 60 minutes after hot work ends,",
    "then a final check of the area after 2 hours.",
    "",
    "Permit issued by: Dafydd Rook      Valid until: 17:00",
    "Permit closed by: ____________________",
]


def hot_work_scan() -> bytes:
    """A scanned form: one grey image per page, no text layer (as a scanner makes)."""
    size = 30
    font = ImageFont.truetype(str(FONT), size) if FONT.exists() else ImageFont.load_default()
    page = Image.new("L", (1240, 1754), 250)  # A4 at 150 dpi, off-white paper
    pen = ImageDraw.Draw(page)
    for i, line in enumerate(HOT_WORK):
        pen.text((110, 140 + i * int(size * 1.7)), line, fill=20, font=font)
    pen.rectangle((90, 120, 1150, 160 + len(HOT_WORK) * int(size * 1.7)), outline=60, width=3)
    out = io.BytesIO()
    page.save(out, "PDF", resolution=150.0, creationDate=WHEN.timetuple(), modDate=WHEN.timetuple())
    return out.getvalue()


FILES = {
    "policies/vehicle-and-fleet-policy.docx": fleet_policy,
    "meetings/2026-10-board-deck.pptx": board_deck,
    "design/asset-register-pumps-generators.xlsx": asset_register,
    "onboarding/community-volunteering-days.odt": volunteering,
    "meetings/mail/2026-10-14-smart-meter-phase2.eml": smart_meter_mail,
    "meetings/mail/2026-10-19-hypochlorite-delivery.eml": hypochlorite_mail,
    "policies/forms/hot-work-permit-scan.pdf": hot_work_scan,
}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=ROOT / "demo_corpus")
    args = parser.parse_args()
    for rel, make in FILES.items():
        path = args.out / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(make())
        print(f"wrote {path.relative_to(args.out)}")
    # Sanity: the saved mail parses back with its attachment.
    parsed = BytesParser(policy=policy.default).parsebytes(smart_meter_mail())
    assert len(list(parsed.iter_attachments())) == 1


if __name__ == "__main__":
    main()
