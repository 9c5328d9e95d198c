"""Checks on office zip containers (OOXML, OpenDocument) before a library parses them.

Every office library here reads its parts through :mod:`zipfile`, which never
returns more bytes than a member's declared size; so the declared sizes,
checked here, bound what parsing can unpack. The XML parts are read once,
which also checks their CRCs (a truncated file fails here, not deep in a
library), and refused when they declare a DTD: no OOXML or ODF part needs
one, and entity definitions are how XML expands a few bytes into gigabytes.
"""

from __future__ import annotations

import io
import zipfile
import zlib
from collections.abc import Sequence

from ..errors import LoadError
from ._common import DEFAULT_MAX_UNPACKED_BYTES

OLE_MAGIC = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"
ENCRYPTED_OR_LEGACY = "encrypted or legacy binary document"
# Far more parts than any real document has (a 200-slide deck with media has ~1,000).
MAX_MEMBERS = 10_000
# Deflate rarely packs XML tighter than about 30:1 (repetitive spreadsheet XML, measured on
# our own generated files); zip bombs run at 1,000:1 and more. Small members may be any ratio.
MAX_RATIO = 200
RATIO_FREE_BYTES = 1 * 2**20
# A DTD must come before the root element; the prolog of a real part is a few hundred bytes.
_DTD_MARKERS = tuple(
    marker.encode(encoding)
    for marker in ("<!DOCTYPE", "<!ENTITY", "<!doctype")
    for encoding in ("utf-8", "utf-16-le", "utf-16-be")
)
_READ_BLOCK = 1 << 16


def open_container(
    data: bytes,
    what: str,
    required: Sequence[str],
    *,
    max_unpacked_bytes: int = DEFAULT_MAX_UNPACKED_BYTES,
) -> zipfile.ZipFile:
    """``data`` as a checked zip archive that holds every part in ``required``.

    ``what`` names the format in reasons ("Word document"). LoadError with the
    reason for an encrypted or legacy binary file (OLE2), a file that is not a
    zip or is truncated, an encrypted member, too many members, members that
    unpack past ``max_unpacked_bytes`` or at a zip bomb's ratio, a missing
    part (often a wrong extension), or XML that declares a DTD.
    """
    if data.startswith(OLE_MAGIC):
        # Password-protected OOXML is an OLE2 file holding the encrypted package; so are
        # .doc/.xls/.ppt. Neither can be read here.
        raise LoadError(ENCRYPTED_OR_LEGACY)
    if not data.startswith(b"PK"):
        raise LoadError(f"not a {what}: not a zip container (wrong extension?)")
    try:
        archive = zipfile.ZipFile(io.BytesIO(data))
        infos = archive.infolist()
    except (zipfile.BadZipFile, zipfile.LargeZipFile, ValueError, EOFError) as exc:
        raise LoadError(f"truncated or corrupt zip container ({exc})") from None
    if len(infos) > MAX_MEMBERS:
        raise LoadError(f"zip container has {len(infos)} parts, over the limit of {MAX_MEMBERS}")
    total = 0
    for info in infos:
        if info.flag_bits & 0x1:
            raise LoadError(ENCRYPTED_OR_LEGACY)
        total += info.file_size
        if info.file_size > RATIO_FREE_BYTES and info.file_size > MAX_RATIO * max(
            info.compress_size, 1
        ):
            raise LoadError(
                f"zip bomb? part {info.filename!r} unpacks {info.file_size} bytes from "
                f"{info.compress_size} (over {MAX_RATIO}:1)"
            )
    if total > max_unpacked_bytes:
        raise LoadError(
            f"zip container unpacks to {total} bytes, over the limit of {max_unpacked_bytes} "
            "(setting max_unpacked_bytes)"
        )
    names = {info.filename for info in infos}
    missing = [part for part in required if part not in names]
    if missing:
        raise LoadError(f"not a {what}: no {missing[0]} in the zip container (wrong extension?)")
    for info in infos:
        if info.filename.lower().endswith((".xml", ".rels")):
            _check_xml(archive, info)
    return archive


def _check_xml(archive: zipfile.ZipFile, info: zipfile.ZipInfo) -> None:
    """Read one XML part through (checking its CRC); LoadError if it declares a DTD."""
    tail = b""
    try:
        with archive.open(info) as part:
            while block := part.read(_READ_BLOCK):
                window = tail + block
                if any(marker in window for marker in _DTD_MARKERS):
                    raise LoadError(
                        f"XML part {info.filename!r} declares a DTD or entities; "
                        "refused (entity expansion)"
                    )
                tail = window[-32:]
    except (zipfile.BadZipFile, zlib.error, EOFError, NotImplementedError) as exc:
        raise LoadError(f"truncated or corrupt zip container ({exc})") from None
