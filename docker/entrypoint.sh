#!/bin/sh
# Entry point of the image: every file sounding writes (the index, keys.db) is
# readable by its owner only, then the command runs as PID 1 (signals reach it).
umask 077
exec "$@"
