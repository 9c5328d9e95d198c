#!/usr/bin/env bash
# Install, index the bundled demo wiki and serve it on 127.0.0.1, with two API keys.
set -euo pipefail
cd "$(dirname "$0")/.."
# What running needs, no test tools. SOUNDING_SKIP_SETUP=1: the environment is installed
# already (tests/integration/test_readme.py runs the demo so).
[ "${SOUNDING_SKIP_SETUP:-0}" = "1" ] || bash scripts/setup.sh
export SOUNDING_INDEX_DIR="${SOUNDING_INDEX_DIR:-$PWD/.sounding/demo-index}"
export SOUNDING_ACCESS_RULES="${SOUNDING_ACCESS_RULES:-$PWD/scripts/demo-access.yaml}"
PORT="${SOUNDING_PORT:-8757}"
KEYS="$(dirname "$SOUNDING_INDEX_DIR")/demo-keys"
.venv/bin/sounding index demo_corpus
# Two demo keys, made once and kept (readable by you only) next to the index:
# "demo-hr" reads everything, "demo-guest" everything but the HR pages.
mkdir -p "$KEYS" && chmod 700 "$KEYS"
for spec in "demo-hr:hr" "demo-guest:"; do
  name="${spec%%:*}"; groups="${spec#*:}"
  if [ ! -s "$KEYS/$name" ]; then
    .venv/bin/sounding keys revoke "$name" >/dev/null 2>&1 || true
    (umask 077; .venv/bin/sounding keys create --name "$name" --scope read \
       ${groups:+--groups "$groups"} >"$KEYS/$name" 2>/dev/null)
  fi
done
cat <<MSG

Index ready in $SOUNDING_INDEX_DIR. Starting the service on http://127.0.0.1:$PORT
(press Ctrl-C to stop).

  Search page:  http://127.0.0.1:$PORT/   (paste a key when it asks)
  Keys:         $KEYS/demo-hr     (group hr: sees the HR pages too)
                $KEYS/demo-guest  (no group: the HR pages are hidden)

In another terminal, in $PWD, put the command on PATH and point it at the demo:

  . .venv/bin/activate
  export SOUNDING_INDEX_DIR=$SOUNDING_INDEX_DIR
  export SOUNDING_ACCESS_RULES=$SOUNDING_ACCESS_RULES
  export SOUNDING_SERVER=http://127.0.0.1:$PORT SOUNDING_API_KEY_FILE=$KEYS/demo-hr
  sounding search "can I move unused vacation days to next year?" -k 3

or ask over HTTP:

  curl -s http://127.0.0.1:$PORT/search -H "Authorization: Bearer \$(cat $KEYS/demo-hr)" \\
       -H 'content-type: application/json' \\
       -d '{"query": "can I move unused vacation days to next year?", "k": 3}'

MSG
exec .venv/bin/sounding serve --host 127.0.0.1 --port "$PORT"
