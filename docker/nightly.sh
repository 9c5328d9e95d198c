#!/bin/sh
# The re-index job of the container (installed as sounding-nightly).
#
#   sounding-nightly [OPTION...]        wait for $SOUNDING_REINDEX_AT, re-index, once a day
#   sounding-nightly --now [OPTION...]  re-index once now and exit with its exit code
#
# It runs `sounding index $SOUNDING_REINDEX_PATHS --quiet OPTION...` (OPTIONs are
# sounding index's, e.g. --json or --max-runtime 3600). SOUNDING_REINDEX_AT is
# HH:MM or HH:MM:SS in UTC (default 02:00); SOUNDING_REINDEX_PATHS the folders to
# index, separated by spaces (default /data/docs). A run that finds another one
# holding the index lock exits with 75 and changes nothing; a failed run leaves
# the last good index served.
set -u
at="${SOUNDING_REINDEX_AT:-02:00}"
paths="${SOUNDING_REINDEX_PATHS:-/data/docs}"

reindex() {
    # shellcheck disable=SC2086 # the paths are separated by spaces on purpose
    sounding index $paths --quiet "$@"
    rc=$?
    case "$rc" in
    0) ;;
    75) echo "nightly: another run holds the index; this one changed nothing" >&2 ;;
    *) echo "nightly: re-index failed (exit $rc); the last good index is still served" >&2 ;;
    esac
    return "$rc"
}

if [ "${1:-}" = "--now" ]; then
    shift
    reindex "$@"
    exit $?
fi

case "$at" in
[0-2][0-9]:[0-5][0-9] | [0-2][0-9]:[0-5][0-9]:[0-5][0-9]) ;;
*)
    echo "nightly: SOUNDING_REINDEX_AT must be HH:MM or HH:MM:SS (UTC), not '$at'" >&2
    exit 2
    ;;
esac
if ! date -u -d "1970-01-01 $at" +%s >/dev/null 2>&1; then
    echo "nightly: SOUNDING_REINDEX_AT is not a time of day: '$at'" >&2
    exit 2
fi

# `docker stop` sends TERM: leave the wait at once. A run in progress goes on until
# it ends or Docker kills it; the index lock and its atomic switch keep the index whole.
trap 'exit 143' TERM INT
while :; do
    now=$(date -u +%s)
    next=$(date -u -d "$(date -u +%F) $at" +%s)
    [ "$next" -le "$now" ] && next=$((next + 86400))
    echo "nightly: next re-index at $(date -u -d "@$next" '+%F %T') UTC" >&2
    sleep $((next - now)) &
    wait $!
    reindex "$@"
done
