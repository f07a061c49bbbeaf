#!/usr/bin/env bash
# Install Debian's chromium (used headless by tests/test_report.py to load the
# HTML report) when it is missing. Non-interactive; safe to run repeatedly.
set -euo pipefail

if command -v chromium >/dev/null 2>&1 || command -v chromium-browser >/dev/null 2>&1; then
    exit 0
fi

SUDO=""
if [ "$(id -u)" -ne 0 ]; then
    if command -v sudo >/dev/null 2>&1; then
        SUDO="sudo -n"
    else
        echo "install_browser.sh: chromium is missing and this user cannot install packages; the browser test will be skipped" >&2
        exit 0
    fi
fi

export DEBIAN_FRONTEND=noninteractive
$SUDO apt-get update -qq
$SUDO apt-get install -y -qq chromium >/dev/null
command -v chromium >/dev/null 2>&1
