#!/usr/bin/env bash
# Create .venv and install sounding with its test tools. Safe to run again:
# it reinstalls only when pyproject.toml changed.
set -euo pipefail
cd "$(dirname "$0")/.."
PYTHON="${PYTHON:-python3}"
if [ ! -x .venv/bin/python ]; then
    echo "setup: creating .venv with $("$PYTHON" --version)"
    "$PYTHON" -m venv .venv
fi
stamp=".venv/.sounding-installed"
want="$(sha256sum pyproject.toml | cut -d' ' -f1)"
if [ "$(cat "$stamp" 2>/dev/null)" != "$want" ]; then
    .venv/bin/python -m pip install --quiet --upgrade pip
    # torch first and pinned: this version is a CPU build; an unpinned torch
    # would pull several GB of CUDA libraries that a CPU box never uses.
    .venv/bin/python -m pip install --quiet "torch==2.13.0"
    .venv/bin/python -m pip install --quiet -e ".[test]"
    echo "$want" > "$stamp"
fi
