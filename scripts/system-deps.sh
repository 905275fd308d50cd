#!/usr/bin/env bash
# System packages the suite needs beyond Python: Debian's chromium for the browser test.
# Installs through apt when run as root and the package is missing; otherwise says what is missing.
set -u
if command -v chromium >/dev/null 2>&1 || [ -x /usr/bin/chromium ]; then
  exit 0
fi
if [ "$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then
  echo "installing chromium through apt for the browser test"
  apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null \
    || echo "apt could not install chromium; the browser test will be skipped and say so"
else
  echo "chromium is not installed and apt is not available as root; the browser test will be skipped"
fi
exit 0
