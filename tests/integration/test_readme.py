"""The README's shell examples, pasted in order after the demo, all work.

Every fenced ``bash`` block of README.md runs, top to bottom, in one shell in a copy of
the repository's demo files (the installed ``.venv`` linked in, so nothing is installed):
the block marked ``readme-test: background`` (the demo, which serves until stopped) in
the background until its service answers, the rest in order; a block marked
``readme-test: skip (why)`` is left out. Only loopback is ever contacted.
"""

from __future__ import annotations

import os
import re
import shutil
import signal
import subprocess
import time
import urllib.request
from pathlib import Path

import pytest

from tests.serving import free_port

pytestmark = [pytest.mark.slow, pytest.mark.subprocess]  # the real encoder, a real server

REPO = Path(__file__).resolve().parents[2]
BLOCK = re.compile(r"(?:<!-- readme-test: (?P<mark>[^>]*?) -->\n)?```bash\n(?P<body>.*?)```", re.S)


def readme_blocks(text: str) -> list[tuple[int, str, str]]:
    """(line, marker, body) of each bash block, in order."""
    return [
        (text[: m.start("body")].count("\n") + 1, m.group("mark") or "", m.group("body"))
        for m in BLOCK.finditer(text)
    ]


def test_the_blocks_are_found_and_marked() -> None:
    blocks = readme_blocks((REPO / "README.md").read_text(encoding="utf-8"))
    assert "scripts/demo.sh" in blocks[0][2] and blocks[0][1].startswith("background")
    assert sum(m.startswith("background") for _, m, _ in blocks) == 1
    assert all(re.fullmatch(r"(background .*|skip \(.+\))?", m) for _, m, _ in blocks)


def _environment(home: Path, port: int) -> dict[str, str]:
    # A new user's shell: no venv on PATH, no SOUNDING_* setting, a home of its own.
    path = [p for p in os.environ.get("PATH", "").split(":") if ".venv" not in p]
    env = {k: v for k, v in os.environ.items() if not k.startswith("SOUNDING_")}
    env.pop("VIRTUAL_ENV", None)
    env.update(
        PATH=":".join(path), HOME=str(home), XDG_CACHE_HOME=str(home / ".cache"),
        SOUNDING_SKIP_SETUP="1", SOUNDING_PORT=str(port), SOUNDING_THREADS="1",
    )  # fmt: skip
    return env


def _wait_for(url: str, demo: subprocess.Popen[bytes], log: Path, seconds: float) -> None:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if demo.poll() is not None:
            pytest.fail(f"the demo exited with {demo.returncode}:\n{log.read_text()[-3000:]}")
        try:
            with urllib.request.urlopen(url, timeout=5) as answer:
                if b'"index_loaded":true' in answer.read().replace(b" ", b""):
                    return
        except OSError:
            pass
        time.sleep(1)
    pytest.fail(f"the demo's service did not answer within {seconds} s:\n{log.read_text()[-3000:]}")


def test_every_readme_example_works_after_the_demo(tmp_path: Path) -> None:
    if not (REPO / ".venv" / "bin" / "sounding").exists():
        pytest.skip("needs the installed .venv (bash scripts/setup.sh)")
    clone = tmp_path / "clone"
    clone.mkdir()
    for part in ("README.md", "scripts", "demo_corpus"):
        copy = shutil.copytree if (REPO / part).is_dir() else shutil.copy
        copy(REPO / part, clone / part)
    (clone / ".venv").symlink_to(REPO / ".venv")
    (tmp_path / "home").mkdir()
    port = free_port()
    env = _environment(tmp_path / "home", port)
    blocks = readme_blocks((clone / "README.md").read_text(encoding="utf-8"))
    runnable = [(line, body.replace("8757", str(port))) for line, mark, body in blocks
                if not mark.startswith("skip")]  # fmt: skip
    (_, demo_body), rest = runnable[0], runnable[1:]
    log = tmp_path / "demo.log"
    with open(log, "wb") as out:
        demo = subprocess.Popen(
            ["bash", "-c", demo_body], cwd=clone, env=env, stdout=out, stderr=subprocess.STDOUT,
            start_new_session=True,
        )  # fmt: skip
    try:
        _wait_for(f"http://127.0.0.1:{port}/health", demo, log, seconds=900)
        script = "set -euo pipefail\n" + "".join(
            f"echo '@@ README line {line}' | tee /dev/stderr\n{body}" for line, body in rest
        )
        done = subprocess.run(
            ["bash", "-c", script], cwd=clone, env=env, capture_output=True, text=True,
            timeout=900,
        )  # fmt: skip
        where = re.findall(r"@@ README line \d+", done.stderr)
        context = f"{where[-1] if where else 'start'}\n{done.stderr[-3000:]}\n{done.stdout[-2000:]}"
        assert done.returncode == 0, context
        for block in done.stdout.split("@@ README line ")[1:]:
            assert '{"detail"' not in block, f"README line {block[:3000]}"  # an HTTP error body
        assert len(where) == len(rest)
        # What a person sees: the demo's passages from the shell, through its service.
        assert "vacation" in done.stdout.lower() or "leave" in done.stdout.lower()
    finally:
        os.killpg(demo.pid, signal.SIGTERM)
        try:
            demo.wait(timeout=30)
        except subprocess.TimeoutExpired:
            os.killpg(demo.pid, signal.SIGKILL)
            demo.wait(timeout=30)
