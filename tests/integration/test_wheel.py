"""The built wheel installs one top-level package, ``sounding``, with the page's files inside."""

from __future__ import annotations

import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

pytestmark = [pytest.mark.subprocess, pytest.mark.slow]  # pip builds and installs the wheel

REPO = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def wheel(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("wheel")
    # The venv's own setuptools builds it: no download, and the same backend as an install.
    subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-q",
         "-w", str(out), str(REPO)],
        check=True, capture_output=True, timeout=300,
    )  # fmt: skip
    (built,) = out.glob("sounding-*.whl")
    return built


def test_the_wheel_holds_one_top_level_package(wheel: Path) -> None:
    names = zipfile.ZipFile(wheel).namelist()
    top = {n.split("/")[0] for n in names}
    (metadata,) = top - {"sounding"}
    assert metadata.endswith(".dist-info")
    for part in ("sounding/indexer/store", "sounding/service/app.py", "sounding/cli/__init__.py"):
        assert any(n.startswith(part) for n in names), part
    # The search page is served from inside the package.
    assert {"sounding/service/static/index.html", "sounding/service/static/page.js"} <= set(names)


def test_installed_the_old_top_level_names_do_not_import(wheel: Path, tmp_path: Path) -> None:
    target = tmp_path / "site"
    subprocess.run(
        [sys.executable, "-m", "pip", "install", "--no-deps", "-q", "--target", str(target),
         str(wheel)],
        check=True, capture_output=True, timeout=300,
    )  # fmt: skip

    def run(code: str) -> subprocess.CompletedProcess[str]:
        # -S: no site-packages, so neither this checkout's editable install nor its folders
        # (cwd is a temporary folder) can answer; only the wheel's files on PYTHONPATH.
        return subprocess.run(
            [sys.executable, "-S", "-c", code], cwd=tmp_path, capture_output=True, text=True,
            env={"PYTHONPATH": str(target)}, timeout=60,
        )  # fmt: skip

    ok = run("import sounding, sounding.indexer.errors, sounding.indexer.documents; "
             "print(sounding.indexer.errors.__file__)")  # fmt: skip
    assert ok.returncode == 0, ok.stderr
    assert ok.stdout.strip().startswith(str(target))
    for old in ("indexer", "service"):
        gone = run(f"import {old}")
        assert gone.returncode != 0
        assert f"No module named '{old}'" in gone.stderr
