"""Hostile office files, built here: truncated containers, zip bombs, encrypted files,
wrong extensions, XML entity expansion. Each is skipped with its reason, never a crash,
and a bomb is refused before it is unpacked (memory measured)."""

from __future__ import annotations

import io
import tracemalloc
import zipfile
from pathlib import Path

import pytest
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.loaders import LoadLimits, parse_document
from sounding.indexer.loaders._zipcheck import ENCRYPTED_OR_LEGACY, OLE_MAGIC

from tests.unit.loading import make_pdf, walk, write
from tests.unit.office_files import (
    docx_bytes,
    eml_bytes,
    odp_bytes,
    ods_bytes,
    odt_bytes,
    pptx_bytes,
    xlsx_bytes,
)

GOOD = {
    "docx": docx_bytes([("h1", "Valves"), ("p", "Exercise each valve yearly.")]),
    "pptx": pptx_bytes([("Valves", ["Exercise yearly"], "")]),
    "xlsx": xlsx_bytes({"Valves": [["Tag", "Due"], ["V-1", "2026-11"]]}),
    "odt": odt_bytes([("h1", "Valves"), ("p", "Exercise each valve yearly.")]),
    "odp": odp_bytes([("Valves", ["Exercise yearly"], "")]),
    "ods": ods_bytes({"Valves": [["Tag", "Due"], ["V-1", "2026-11"]]}),
}
MAIN_PART = {
    "docx": "word/document.xml",
    "pptx": "ppt/presentation.xml",
    "xlsx": "xl/workbook.xml",
    "odt": "content.xml",
    "odp": "content.xml",
    "ods": "content.xml",
}
LAUGHS = (
    b'<?xml version="1.0"?>\n<!DOCTYPE lolz [<!ENTITY lol "lol">'
    + b"".join(
        b'<!ENTITY lol%d "%s">' % (i, (b"&lol%d;" % (i - 1) if i > 1 else b"&lol;") * 10)
        for i in range(1, 10)
    )
    + b"]>\n<root>&lol9;</root>"
)


def rezip(data: bytes, replace: dict[str, bytes]) -> bytes:
    """``data`` (a zip) with the named parts replaced (or added), deflated."""
    source = zipfile.ZipFile(io.BytesIO(data))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as target:
        names = set()
        for info in source.infolist():
            names.add(info.filename)
            target.writestr(info.filename, replace.get(info.filename, source.read(info)))
        for name, body in replace.items():
            if name not in names:
                target.writestr(name, body)
    return out.getvalue()


def encrypted_flag(data: bytes) -> bytes:
    """``data`` with every member marked encrypted (general purpose bit 0), as a
    password-protected zip is; the bytes are not really encrypted."""
    raw = bytearray(data)
    for signature, offset in ((b"PK\x03\x04", 6), (b"PK\x01\x02", 8)):
        at = raw.find(signature)
        while at != -1:
            raw[at + offset] |= 0x01
            at = raw.find(signature, at + 4)
    return bytes(raw)


def parse(data: bytes, kind: str, **limits: object):
    return parse_document(
        data,
        kind,
        doc_id=f"x.{kind}",
        name=f"x.{kind}",
        source="x",
        modified=0.0,
        limits=LoadLimits(**limits),  # type: ignore[arg-type]
    )


def reason(data: bytes, kind: str, tmp_path: Path, **limits: object) -> str:
    """The skip reason of a folder run over one file (never an exception)."""
    root = tmp_path / kind
    write(root, f"file.{kind}", data)
    docs, skipped = walk(root)
    assert not docs, f"{kind}: hostile file indexed"
    return skipped[f"file.{kind}"]


@pytest.mark.parametrize("kind", sorted(GOOD))
def test_good_files_parse(kind: str) -> None:
    assert "V-1" in parse(GOOD[kind], kind).text or "Exercise" in parse(GOOD[kind], kind).text


@pytest.mark.parametrize("kind", sorted(GOOD))
def test_truncated_containers_are_skipped(kind: str, tmp_path: Path) -> None:
    cut = GOOD[kind][: len(GOOD[kind]) // 2]
    assert reason(cut, kind, tmp_path).startswith("truncated or corrupt zip container")


@pytest.mark.parametrize("kind", sorted(GOOD))
def test_zip_bombs_are_refused_before_unpacking(kind: str, tmp_path: Path) -> None:
    bomb = rezip(GOOD[kind], {"padding.xml": b" " * (20 * 2**20)})  # 20 MB from ~20 KB
    assert len(bomb) < 200_000
    tracemalloc.start()
    try:
        got = reason(bomb, kind, tmp_path)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert got.startswith("zip bomb? part 'padding.xml' unpacks 20971520 bytes")
    assert peak < 8 * 2**20, f"{peak} bytes allocated refusing a bomb"


def test_the_unpacked_size_cap_names_its_setting() -> None:
    with pytest.raises(Exception, match=r"over the limit of 1000 \(setting max_unpacked_bytes\)"):
        parse(GOOD["docx"], "docx", max_unpacked_bytes=1000)


@pytest.mark.parametrize("kind", sorted(GOOD))
def test_encrypted_documents_are_skipped(kind: str, tmp_path: Path) -> None:
    # Password-protected Word, PowerPoint and Excel files are OLE2 compound files.
    ole = OLE_MAGIC + b"\x00" * 504 + b"EncryptedPackage"
    assert reason(ole, kind, tmp_path) == ENCRYPTED_OR_LEGACY
    assert reason(encrypted_flag(GOOD[kind]), kind, tmp_path) == ENCRYPTED_OR_LEGACY


@pytest.mark.parametrize("kind", ["odt", "odp", "ods"])
def test_an_encrypted_opendocument_package_is_skipped(kind: str, tmp_path: Path) -> None:
    manifest = zipfile.ZipFile(io.BytesIO(GOOD[kind])).read("META-INF/manifest.xml")
    manifest = manifest.replace(
        b"</manifest:file-entry>", b"<manifest:encryption-data/></manifest:file-entry>", 1
    )
    if b"encryption-data" not in manifest:  # self-closing entries
        manifest = manifest.replace(b"/>", b"><manifest:encryption-data/></manifest:file-entry>", 2)
    locked = rezip(GOOD[kind], {"META-INF/manifest.xml": manifest})
    assert reason(locked, kind, tmp_path) == ENCRYPTED_OR_LEGACY


@pytest.mark.parametrize(
    ("kind", "actual"),
    [("docx", "xlsx"), ("pptx", "docx"), ("xlsx", "pptx"), ("odt", "ods"), ("ods", "odp")],
)
def test_wrong_extensions_say_so(kind: str, actual: str, tmp_path: Path) -> None:
    assert "(wrong extension?)" in reason(GOOD[actual], kind, tmp_path)


@pytest.mark.parametrize("kind", sorted(GOOD))
def test_a_pdf_or_text_named_as_an_office_file_is_skipped(kind: str, tmp_path: Path) -> None:
    assert "not a zip container (wrong extension?)" in reason(make_pdf([["Hi"]]), kind, tmp_path)
    assert "not a zip container" in reason(b"plain words\n", kind, tmp_path)


@pytest.mark.parametrize("kind", sorted(GOOD))
def test_xml_entity_expansion_is_refused(kind: str, tmp_path: Path) -> None:
    laughs = rezip(GOOD[kind], {MAIN_PART[kind]: LAUGHS})
    assert "declares a DTD or entities; refused (entity expansion)" in reason(
        laughs, kind, tmp_path
    )
    # The same in UTF-16, which a byte search for "<!DOCTYPE" alone would miss.
    wide = rezip(GOOD[kind], {MAIN_PART[kind]: LAUGHS.decode().encode("utf-16")})
    assert "declares a DTD" in reason(wide, kind, tmp_path)


def test_a_folder_of_hostile_files_indexes_the_good_ones(tmp_path: Path) -> None:
    from sounding.indexer.build import refresh_index
    from sounding.indexer.settings import IndexSettings

    root = tmp_path / "share"
    for kind, data in GOOD.items():
        write(root, f"good/valves.{kind}", data)
        write(root, f"bad/cut.{kind}", data[:300])
        write(root, f"bad/bomb.{kind}", rezip(data, {"pad.xml": b"\0" * (4 * 2**20)}))
        write(root, f"bad/laughs.{kind}", rezip(data, {MAIN_PART[kind]: LAUGHS}))
    write(root, "bad/garbage.eml", b"\x00\x01 not mail")
    report = refresh_index([root], IndexSettings(index_dir=tmp_path / "i"), HashingEmbedder(16))
    assert report.documents == len(GOOD)
    assert len(report.skipped) == 3 * len(GOOD) + 1
    assert all(s.path.startswith("bad/") and s.reason for s in report.skipped)


def test_pushes_of_office_files_over_http(serve_index) -> None:
    served = serve_index(
        {"a.md": "# A\n\nText.\n"}, embedder=HashingEmbedder(16), keys=[("w", "write", "", False)]
    )
    for kind, data in GOOD.items():
        r = served.client.put(
            f"/documents/up/valves.{kind}",
            files={"file": (f"valves.{kind}", data, "application/octet-stream")},
            headers=served.auth("w"),
        )
        assert r.status_code == 200, (kind, r.text)
    r = served.client.put(
        "/documents/up/laughs.docx",
        files={"file": ("laughs.docx", rezip(GOOD["docx"], {MAIN_PART["docx"]: LAUGHS}), "x/y")},
        headers=served.auth("w"),
    )
    assert r.status_code == 422 and "entity expansion" in r.json()["detail"]
    r = served.client.put(
        "/documents/up/a.eml",
        files={"file": ("a.eml", eml_bytes(subject="S", sender="a@b", to="c@d", body="Hi"), "x")},
        headers=served.auth("w"),
    )
    assert r.status_code == 200, r.text
