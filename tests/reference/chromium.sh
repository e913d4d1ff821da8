#!/usr/bin/env bash
# Makes sure Debian's chromium is installed for the browser check of the HTML report
# (tests/report_browser.rs): does nothing when /usr/bin/chromium exists, otherwise installs the
# `chromium` package with apt-get, which needs root and a reachable Debian mirror. Fails, saying
# why, when it cannot; the browser test then fails too rather than skip.
# Usage: tests/reference/chromium.sh
set -euo pipefail

if [ -x /usr/bin/chromium ]; then
    exit 0
fi
if ! command -v apt-get >/dev/null 2>&1; then
    echo "chromium.sh: /usr/bin/chromium is missing and apt-get is not available to install it;" \
        "install a Chromium browser at /usr/bin/chromium (or set SLUICE_CHROMIUM to one)" >&2
    exit 1
fi
if [ "$(id -u)" -ne 0 ]; then
    echo "chromium.sh: /usr/bin/chromium is missing; installing it needs root:" \
        "run 'apt-get install -y chromium' as root, then tests/run again" >&2
    exit 1
fi
echo "chromium.sh: installing Debian's chromium for the browser check of the HTML report" >&2
export DEBIAN_FRONTEND=noninteractive
# Wait (up to 10 minutes) for another install that holds the package manager's lock.
if ! { apt-get -o DPkg::Lock::Timeout=600 update -qq &&
       apt-get -o DPkg::Lock::Timeout=600 install -y -qq --no-install-recommends chromium; } >&2; then
    echo "chromium.sh: apt-get could not install chromium (messages above); check that a" \
        "Debian mirror is reachable, then run tests/run again" >&2
    exit 1
fi
if [ ! -x /usr/bin/chromium ]; then
    echo "chromium.sh: apt-get finished but /usr/bin/chromium is still missing" >&2
    exit 1
fi
