#!/usr/bin/env bash
# Create .venv and install sounding: what running needs, and with --test (or
# SOUNDING_SETUP_TEST=1) the test tools too. Safe to run again: it reinstalls
# only when pyproject.toml or the choice of extras changed.
set -euo pipefail
cd "$(dirname "$0")/.."
extra=""
if [ "${1:-}" = "--test" ] || [ "${SOUNDING_SETUP_TEST:-0}" = "1" ]; then
    extra="[test]"
fi
PYTHON="${PYTHON:-python3}"
if [ ! -x .venv/bin/python ]; then
    echo "setup: creating .venv with $("$PYTHON" --version)"
    "$PYTHON" -m venv .venv
fi
stamp=".venv/.sounding-installed"
want="$(sha256sum pyproject.toml | cut -d' ' -f1) ${extra:-[run]}"
have="$(cat "$stamp" 2>/dev/null || true)"
# An environment with the test tools also runs everything: no reinstall to drop them.
if [ "$have" != "$want" ] && [ "$have" != "${want% *} [test]" ]; then
    echo "setup: installing sounding${extra} into .venv (once; later runs skip this)"
    .venv/bin/python -m pip install --quiet --upgrade pip
    # torch first and pinned: this version is a CPU build; an unpinned torch
    # would pull several GB of CUDA libraries that a CPU box never uses.
    .venv/bin/python -m pip install --quiet "torch==2.13.0"
    .venv/bin/python -m pip install --quiet -e ".${extra}"
    echo "$want" > "$stamp"
fi
