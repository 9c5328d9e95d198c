#!/bin/sh
# Make a base image for docker/Dockerfile from Debian's own packages, for a
# machine that cannot pull python:3.11-slim (no registry of container images,
# an air-gapped site). Needs root, debootstrap and a running dockerd ($DOCKER names
# the docker client to use, default docker).
#
#   sh docker/make-base-image.sh [NAME] [DEBIAN_MIRROR]
#   NAME           image to make (default sounding-base:bookworm)
#   DEBIAN_MIRROR  Debian archive to install from (default http://deb.debian.org/debian;
#                  an air-gapped site names its own mirror here)
#
# Then: docker build --build-arg BASE_IMAGE=NAME ... (README, "Container").
# Debian bookworm's python3 is 3.11, as in python:3.11-slim. The archives
# debootstrap downloaded, apt's package lists, manuals, translations and documentation
# other than the copyright files are left out of the image.
set -eu
name="${1:-sounding-base:bookworm}"
mirror="${2:-http://deb.debian.org/debian}"
suite="${SOUNDING_BASE_SUITE:-bookworm}"
root="$(mktemp -d "${TMPDIR:-/tmp}/sounding-base.XXXXXX")"
trap 'rm -rf "$root"' EXIT INT TERM
echo "make-base-image: debootstrap $suite from $mirror into $root" >&2
debootstrap --variant=minbase --include=python3,python3-venv \
    "$suite" "$root" "$mirror" >"$root.log" 2>&1 || {
    tail -n 20 "$root.log" >&2
    rm -f "$root.log"
    echo "make-base-image: debootstrap failed" >&2
    exit 1
}
rm -f "$root.log"
rm -rf "$root"/var/cache/apt/archives/*.deb "$root"/var/cache/apt/*.bin \
    "$root"/var/lib/apt/lists/* "$root"/var/log/* "$root"/tmp/* \
    "$root"/usr/share/man/* "$root"/usr/share/info/* "$root"/usr/share/locale/*
find "$root"/usr/share/doc -type f ! -name copyright -delete  # keep the licences
tar -C "$root" --numeric-owner -c . | "${DOCKER:-docker}" import \
    --change 'ENV LANG=C.UTF-8' \
    --change 'CMD ["python3"]' \
    --message "debootstrap --variant=minbase $suite with python3, python3-venv" \
    - "$name" >/dev/null
echo "make-base-image: made $name" >&2
