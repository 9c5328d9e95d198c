"""OCR of scanned pages with Debian's ``tesseract`` command, when it is installed.

A subprocess rather than a Python wrapper: a timeout that truly stops the work
(the process is killed), no extra dependency, and one thread per call
(``OMP_THREAD_LIMIT=1``) so an index run does not take every core.
"""

from __future__ import annotations

import functools
import os
import shutil
import subprocess
from dataclasses import dataclass

from ..errors import LoadError

# A4 at 600 dpi is 35 M pixels; anything far larger is not a page scan, and
# decoding it would cost hundreds of MB.
MAX_OCR_PIXELS = 60_000_000
# Tesseract's page segmentation mode 3: fully automatic layout, no orientation detection
# (tesseract's own default; named so a reader knows it was chosen).
_PSM = "3"


@dataclass(frozen=True)
class OcrEngine:
    """A usable tesseract: its command, language data and version line."""

    command: str
    language: str
    version: str


class OcrTimeout(LoadError):
    """Tesseract ran out of the time it was given; the process was killed."""


@functools.cache
def find_tesseract(language: str = "eng") -> OcrEngine | None:
    """The tesseract command with ``language`` data installed, or None."""
    command = shutil.which("tesseract")
    if command is None:
        return None
    try:
        langs = subprocess.run(
            [command, "--list-langs"], capture_output=True, timeout=20, check=False
        )
        version = subprocess.run(
            [command, "--version"], capture_output=True, timeout=20, check=False
        )
    except (OSError, subprocess.SubprocessError):
        return None
    listed = langs.stdout.decode("utf-8", "replace").split()
    wanted = language.split("+")
    if langs.returncode != 0 or not all(lang in listed for lang in wanted):
        return None
    first = (version.stdout or version.stderr).decode("utf-8", "replace").strip()
    return OcrEngine(command, language, first.splitlines()[0] if first else "tesseract")


def ocr_image(engine: OcrEngine, image: bytes, timeout: float) -> str:
    """The text tesseract reads in ``image`` (PNG, JPEG, TIFF... bytes).

    OcrTimeout after ``timeout`` seconds; LoadError when tesseract fails.
    """
    env = {**os.environ, "OMP_THREAD_LIMIT": "1"}
    try:
        done = subprocess.run(
            [engine.command, "stdin", "stdout", "-l", engine.language, "--psm", _PSM],
            input=image,
            capture_output=True,
            timeout=max(timeout, 0.1),
            check=False,
            env=env,
        )
    except subprocess.TimeoutExpired:
        raise OcrTimeout(f"OCR stopped after {timeout:.0f} s") from None
    except OSError as exc:
        raise LoadError(f"tesseract could not run: {exc.strerror or exc}") from None
    if done.returncode != 0:
        lines = done.stderr.decode("utf-8", "replace").strip().splitlines()
        raise LoadError(f"tesseract failed: {lines[-1] if lines else done.returncode}")
    return done.stdout.decode("utf-8", "replace")
