#!/usr/bin/env bash
# Install everything and run the whole test suite (this is what CI runs).
set -euo pipefail
cd "$(dirname "$0")/.."
# Debian packages some tests need, installed when missing (never a downloaded browser or tool).
apt_install() {
    echo "test: installing $* with apt-get"
    local sudo=""
    [ "$(id -u)" -eq 0 ] || sudo="sudo"
    $sudo env DEBIAN_FRONTEND=noninteractive apt-get update -qq
    $sudo env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq "$@" >/dev/null
}
# The search page test drives Debian's Chromium.
if [ ! -x /usr/bin/chromium ] || [ ! -x /usr/bin/chromedriver ]; then
    apt_install chromium chromium-driver
fi
# Scanned PDF pages are read by Debian's Tesseract with its English data (test_loaders_ocr.py).
if ! tesseract --list-langs 2>/dev/null | grep -qx eng; then
    apt_install tesseract-ocr tesseract-ocr-eng
fi
# The container tests (tests/container) build and run the image with Debian's Docker;
# they start dockerd themselves when it is not running.
if [ ! -x /usr/sbin/dockerd ] || [ ! -x /usr/bin/docker-compose ] || [ ! -x /usr/sbin/debootstrap ]; then
    apt_install docker.io docker-compose debootstrap
fi
bash scripts/setup.sh --test
.venv/bin/ruff check indexer service sounding tests
.venv/bin/ruff format --check indexer service sounding tests
.venv/bin/mypy indexer
.venv/bin/python -m pytest -ra "$@"
