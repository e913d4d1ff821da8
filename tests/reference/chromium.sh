#!/usr/bin/env bash
# Makes sure Debian's chromium and poppler-utils (pdftotext and pdftoppm, to read the printed
# PDF's pages back) are installed for the browser check of the HTML report
# (tests/report_browser.rs): does nothing when /usr/bin/chromium and /usr/bin/pdftotext exist,
# otherwise installs the packages with apt-get, which needs root and a reachable Debian mirror.
# Fails, saying why, when it cannot; the browser test then fails too rather than skip.
# Usage: tests/reference/chromium.sh
set -euo pipefail

if [ -x /usr/bin/chromium ] && [ -x /usr/bin/pdftotext ] && [ -x /usr/bin/pdftoppm ]; then
    exit 0
fi
if ! command -v apt-get >/dev/null 2>&1; then
    echo "chromium.sh: /usr/bin/chromium or poppler-utils is missing and apt-get is not available" \
        "to install them; install a Chromium browser at /usr/bin/chromium (or set SLUICE_CHROMIUM" \
        "to one) and poppler-utils" >&2
    exit 1
fi
if [ "$(id -u)" -ne 0 ]; then
    echo "chromium.sh: /usr/bin/chromium or poppler-utils is missing; installing them needs root:" \
        "run 'apt-get install -y chromium poppler-utils' as root, then tests/run again" >&2
    exit 1
fi
echo "chromium.sh: installing Debian's chromium and poppler-utils for the browser check of the HTML report" >&2
export DEBIAN_FRONTEND=noninteractive
# Wait (up to 10 minutes) for another install that holds the package manager's lock.
if ! { apt-get -o DPkg::Lock::Timeout=600 update -qq &&
       apt-get -o DPkg::Lock::Timeout=600 install -y -qq --no-install-recommends chromium poppler-utils; } >&2; then
    echo "chromium.sh: apt-get could not install chromium and poppler-utils (messages above); check that a" \
        "Debian mirror is reachable, then run tests/run again" >&2
    exit 1
fi
if [ ! -x /usr/bin/chromium ] || [ ! -x /usr/bin/pdftotext ] || [ ! -x /usr/bin/pdftoppm ]; then
    echo "chromium.sh: apt-get finished but /usr/bin/chromium or poppler-utils is still missing" >&2
    exit 1
fi
