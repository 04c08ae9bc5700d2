#!/bin/sh
# Installs the browser the web page's end-to-end test drives: Debian's Chromium
# (/usr/bin/chromium). Part of the README's test command; does nothing when it is there.
set -e
if [ -x /usr/bin/chromium ]; then
    exit 0
fi
if ! command -v apt-get >/dev/null 2>&1; then
    echo "tests/install-browser.sh: no apt-get here; install Chromium so that /usr/bin/chromium exists" >&2
    exit 1
fi
SUDO=""
if [ "$(id -u)" != "0" ]; then
    SUDO="sudo"
fi
export DEBIAN_FRONTEND=noninteractive
$SUDO apt-get install -y --no-install-recommends chromium \
    || { $SUDO apt-get update && $SUDO apt-get install -y --no-install-recommends chromium; }
