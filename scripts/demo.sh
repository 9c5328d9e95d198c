#!/usr/bin/env bash
# Install, index the bundled demo wiki and serve it on 127.0.0.1.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
export SOUNDING_INDEX_DIR="${SOUNDING_INDEX_DIR:-$PWD/.sounding/demo-index}"
PORT="${SOUNDING_PORT:-8757}"
.venv/bin/sounding index demo_corpus
cat <<MSG

Index ready in $SOUNDING_INDEX_DIR. Starting the service on http://127.0.0.1:$PORT
(press Ctrl-C to stop). In another terminal, try:

  curl -s http://127.0.0.1:$PORT/search -H 'content-type: application/json' \\
       -d '{"query": "can I move unused vacation days to next year?", "k": 3}'

MSG
exec .venv/bin/sounding serve --host 127.0.0.1 --port "$PORT"
