#!/usr/bin/env bash
# Install headless Chromium and its WebDriver (Debian packages chromium, chromium-driver) for the
# HTML report test, only when /usr/bin/chromium or /usr/bin/chromedriver is missing.
# Uses apt-get only; runs as root, or through sudo when that is available without a password.
set -euo pipefail
if [[ -x /usr/bin/chromium && -x /usr/bin/chromedriver ]]; then
    exit 0
fi
if ! command -v apt-get >/dev/null 2>&1; then
    echo "install-chromium: apt-get not found; install chromium and chromium-driver by hand" >&2
    exit 1
fi
SUDO=""
if [[ "$(id -u)" != "0" ]]; then
    if command -v sudo >/dev/null 2>&1 && sudo -n true 2>/dev/null; then
        SUDO="sudo -n"
    else
        echo "install-chromium: not root and no password-less sudo; install chromium and chromium-driver by hand" >&2
        exit 1
    fi
fi
export DEBIAN_FRONTEND=noninteractive
$SUDO apt-get update -qq
$SUDO apt-get install -y -qq --no-install-recommends chromium chromium-driver >/dev/null
if [[ ! -x /usr/bin/chromium || ! -x /usr/bin/chromedriver ]]; then
    echo "install-chromium: apt-get finished but /usr/bin/chromium or /usr/bin/chromedriver is missing" >&2
    exit 1
fi
echo "install-chromium: $(/usr/bin/chromium --version 2>/dev/null || echo chromium installed)"
