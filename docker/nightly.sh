#!/bin/sh
# Re-index /data/docs now, then every night at $SOUNDING_REINDEX_AT (HH:MM, UTC).
set -u
at="${SOUNDING_REINDEX_AT:-02:00}"
while :; do
    sounding index /data/docs --quiet || echo "nightly: re-index failed (exit $?); the last good index is still served" >&2
    now=$(date -u +%s)
    next=$(date -u -d "$(date -u +%F) $at" +%s)
    [ "$next" -le "$now" ] && next=$((next + 86400))
    sleep $((next - now))
done
