#!/usr/bin/env bash
# Installs Debian's headless Chromium and its WebDriver (chromedriver) for the
# review page's browser test (tests/review_browser.rs), when they are missing.
# Uses only the system package manager; no browser build is downloaded.
set -euo pipefail
if command -v chromium >/dev/null 2>&1 && command -v chromedriver >/dev/null 2>&1; then
  exit 0
fi
if [ "$(id -u)" -ne 0 ]; then
  SUDO=sudo
else
  SUDO=
fi
export DEBIAN_FRONTEND=noninteractive
$SUDO apt-get update -qq
$SUDO apt-get install -y -qq --no-install-recommends chromium chromium-driver fonts-dejavu-core >/dev/null
command -v chromium >/dev/null && command -v chromedriver >/dev/null
echo "installed $(chromium --version 2>/dev/null | head -1) and $(chromedriver --version | head -1)"
