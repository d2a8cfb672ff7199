#!/usr/bin/env bash
# Installs Debian's Chromium for the real-browser test (tests/test_browser.py).
# Playwright drives it through executable_path=/usr/bin/chromium; never run
# `playwright install` (it downloads its own browser builds).
set -euo pipefail
if [ -x /usr/bin/chromium ]; then
    echo "chromium already installed: $(/usr/bin/chromium --version 2>/dev/null || true)"
    exit 0
fi
SUDO=""
if [ "$(id -u)" != "0" ]; then
    SUDO="sudo"
fi
export DEBIAN_FRONTEND=noninteractive
$SUDO apt-get update
$SUDO apt-get install -y --no-install-recommends chromium fonts-dejavu-core
/usr/bin/chromium --version || true
