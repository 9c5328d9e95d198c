#!/usr/bin/env bash
# Install everything and run the whole test suite (this is what CI runs).
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
.venv/bin/ruff check indexer service tests
.venv/bin/python -m pytest -ra "$@"
