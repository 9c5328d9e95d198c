"""Time ``sounding search`` from the shell: in process (loads the model) against ``--server``.

Usage: python tests/bench/cli_server.py [--repeats N] [--index DIR]

Indexes demo_corpus/ into a scratch index (or uses --index DIR), starts ``sounding serve``
on a free loopback port with a read key, then runs the real console script as a person
would: once in process, then the same query ``--repeats`` times through the server. Each
figure is the wall-clock time of the whole command (Python start-up, imports, the HTTP
round trip). Exit status 1 when the two paths print different passages.
"""

from __future__ import annotations

import argparse
import os
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
SOUNDING = shutil.which("sounding", path=str(Path(sys.executable).parent)) or "sounding"
QUERY = "can I move unused vacation days to next year?"


def timed(args: list[str], env: dict[str, str]) -> tuple[float, str]:
    started = time.perf_counter()
    done = subprocess.run([SOUNDING, *args], env=env, capture_output=True, text=True, timeout=600)
    seconds = time.perf_counter() - started
    if done.returncode:
        sys.exit(f"sounding {' '.join(args)} failed: {done.stderr.strip()}")
    return seconds, done.stdout


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=10)
    parser.add_argument("--index", type=Path)
    options = parser.parse_args()
    env = {k: v for k, v in os.environ.items() if not k.startswith("SOUNDING_")}
    with tempfile.TemporaryDirectory(prefix="sounding-bench-") as tmp:
        index = options.index or Path(tmp) / "index"
        env["SOUNDING_INDEX_DIR"] = str(index)
        if options.index is None:
            print("indexing demo_corpus/ ...", flush=True)
            timed(["index", str(REPO / "demo_corpus"), "--quiet"], env)
        key = timed(["keys", "create", "--name", f"bench-{os.getpid()}", "--scope", "read"], env)
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            port = s.getsockname()[1]
        url = f"http://127.0.0.1:{port}"
        server = subprocess.Popen(
            [SOUNDING, "serve", "--port", str(port)], env={**env, "SOUNDING_LOG_LEVEL": "warning"},
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True,
        )  # fmt: skip
        try:
            deadline = time.monotonic() + 300
            while True:
                try:
                    urllib.request.urlopen(f"{url}/health", timeout=5).read()
                    break
                except OSError:
                    if time.monotonic() > deadline or server.poll() is not None:
                        sys.exit("sounding serve did not start")
                    time.sleep(0.5)
            local_s, local = timed(["search", QUERY, "-k", "5", "--json"], env)
            remote_env = {**env, "SOUNDING_SERVER": url, "SOUNDING_API_KEY": key[1].strip()}
            runs = [timed(["search", QUERY, "-k", "5", "--json"], remote_env)
                    for _ in range(options.repeats + 1)]  # fmt: skip
        finally:
            os.killpg(server.pid, signal.SIGTERM)
            server.wait(timeout=30)
    first, repeats = runs[0][0], [s for s, _ in runs[1:]]
    print(f"in process (loads the model):   {local_s:6.2f} s")
    print(f"--server, first query:          {first:6.2f} s")
    print(
        f"--server, {len(repeats)} repeats:           median {statistics.median(repeats):.2f} s, "
        f"max {max(repeats):.2f} s"
    )
    same = all(out == local for _, out in runs)
    print("same passages in both paths:", "yes" if same else "NO")
    return 0 if same else 1


if __name__ == "__main__":
    sys.exit(main())
