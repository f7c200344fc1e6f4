#!/usr/bin/env bash
# Install Debian's chromium + chromedriver for tests/test_browser.py when they are missing.
# Never downloads a browser any other way. Needs root (or sudo) for apt-get.
set -uo pipefail

if [ -x /usr/bin/chromium ] && [ -x /usr/bin/chromedriver ]; then
  echo "browser: $(/usr/bin/chromium --version 2>/dev/null | head -n 1)"
  exit 0
fi
SUDO=""
if [ "$(id -u)" != "0" ]; then
  if command -v sudo >/dev/null 2>&1; then SUDO="sudo -n"; else
    echo "browser: chromium is missing and we are not root; tests/test_browser.py will be skipped" >&2
    exit 0
  fi
fi
echo "browser: installing chromium and chromium-driver (apt-get)"
export DEBIAN_FRONTEND=noninteractive
$SUDO apt-get update -q && $SUDO apt-get install -y -q chromium chromium-driver \
  || echo "browser: apt-get failed; tests/test_browser.py will be skipped" >&2
exit 0
