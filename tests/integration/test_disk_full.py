"""A disk that fills up mid re-index: the run fails with one line, the index stays whole.

"Disk full" is simulated with RLIMIT_FSIZE in the child process: any write that would
grow a file past the limit fails with EFBIG, as a full disk fails with ENOSPC (SIGXFSZ is
ignored so the write returns an error instead of killing the process).
"""

from __future__ import annotations

import os
import resource
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from sounding.indexer.check import check_index
from sounding.indexer.embedding import bundled_model_path
from sounding.indexer.store import IndexReader

pytestmark = [pytest.mark.slow, pytest.mark.subprocess]  # the real encoder, in a child


def _limit_file_size(limit: int):
    def apply() -> None:
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

    return apply


def test_full_disk_during_reindex_keeps_the_last_generation(tmp_path: Path) -> None:
    root = tmp_path / "wiki"
    root.mkdir()
    for i in range(20):
        (root / f"p{i}.md").write_text(f"# Page {i}\n\nShort page {i}.\n")
    idx = tmp_path / "idx"
    env = {k: v for k, v in os.environ.items() if not k.startswith("SOUNDING_")}
    command = [
        sys.executable,
        "-m",
        "sounding.cli",
        "index",
        str(root),
        "--index",
        str(idx),
        "--model",
        str(bundled_model_path()),
        "--quiet",
    ]
    assert subprocess.run(command, env=env, capture_output=True, timeout=600).returncode == 0
    before = IndexReader(idx).counts()
    # The next run would write far more than the limit allows.
    for i in range(100):
        (root / f"big{i}.md").write_text(f"# Big {i}\n\n" + "many words here " * 400)
    size = max(p.stat().st_size for p in idx.iterdir() if p.is_file())
    proc = subprocess.run(
        command,
        env=env,
        capture_output=True,
        text=True,
        timeout=600,
        preexec_fn=_limit_file_size(size + 256 * 1024),
    )
    assert proc.returncode != 0
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr, proc.stderr
    assert lines[0].startswith("sounding: error: cannot write to the index"), lines[0]
    assert "disk full" in lines[0] and "last published generation is unchanged" in lines[0]
    # The previous generation is intact and served.
    report = check_index(idx)
    assert report.ok, report.problems
    reader = IndexReader(idx)
    assert reader.generation == 1 and reader.counts() == before
