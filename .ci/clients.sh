#!/usr/bin/env bash
# System tools for the real-language checks in tests/test_emit_clients.py, for a fresh
# Debian 12 machine, run as root before the tests (the Python side is `pip install .[clients]`).
#   jags         - JAGS 4.3 and its `jags` command-line program, which the tests drive
#                  with a script file (no Python bindings needed);
#   r-cran-brms  - R and brms 2.18, which read the emitted brms-style prior() statements
#                  (about 160 packages, 170 MB; it installed in 21 s on the development machine);
#   g++          - httpstan (PyStan) compiles each Stan program to C++ with it.
set -euo pipefail
export DEBIAN_FRONTEND=noninteractive
apt-get update -qq
apt-get install -y -qq --no-install-recommends jags r-cran-brms g++
