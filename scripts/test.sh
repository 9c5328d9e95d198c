#!/usr/bin/env bash
# Install everything and run the whole test suite (this is what CI runs).
set -euo pipefail
cd "$(dirname "$0")/.."
# The search page test drives Debian's Chromium (never a downloaded browser).
if [ ! -x /usr/bin/chromium ] || [ ! -x /usr/bin/chromedriver ]; then
    echo "test: installing chromium and chromium-driver with apt-get"
    sudo=""
    [ "$(id -u)" -eq 0 ] || sudo="sudo"
    $sudo env DEBIAN_FRONTEND=noninteractive apt-get update -qq
    $sudo env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq \
        chromium chromium-driver >/dev/null
fi
# Scanned PDF pages are read by Debian's Tesseract with its English data (test_loaders_ocr.py).
if ! tesseract --list-langs 2>/dev/null | grep -qx eng; then
    echo "test: installing tesseract-ocr and tesseract-ocr-eng with apt-get"
    sudo=""
    [ "$(id -u)" -eq 0 ] || sudo="sudo"
    $sudo env DEBIAN_FRONTEND=noninteractive apt-get update -qq
    $sudo env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq \
        tesseract-ocr tesseract-ocr-eng >/dev/null
fi
# The container tests (tests/container) build and run the image with Debian's Docker;
# they start dockerd themselves when it is not running.
if [ ! -x /usr/sbin/dockerd ] || [ ! -x /usr/bin/docker-compose ] || [ ! -x /usr/sbin/debootstrap ]; then
    echo "test: installing docker.io, docker-compose and debootstrap with apt-get"
    sudo=""
    [ "$(id -u)" -eq 0 ] || sudo="sudo"
    $sudo env DEBIAN_FRONTEND=noninteractive apt-get update -qq
    $sudo env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq \
        docker.io docker-compose debootstrap >/dev/null
fi
bash scripts/setup.sh --test
.venv/bin/ruff check indexer service sounding tests
.venv/bin/ruff format --check indexer service sounding tests
.venv/bin/mypy indexer
.venv/bin/python -m pytest -ra "$@"
