#!/usr/bin/env bash
# A real browser for tests/test_report.py, which renders a reviewer's report in headless
# Chromium to a screenshot; for a fresh Debian 12 machine, run as root before the tests.
#   chromium             - Debian's Chromium (its --headless mode needs no display server);
#   fonts-dejavu-core    - a font for the page's text (figures carry their text as paths).
set -euo pipefail
export DEBIAN_FRONTEND=noninteractive
apt-get update -qq
apt-get install -y -qq --no-install-recommends chromium fonts-dejavu-core
chromium --version
