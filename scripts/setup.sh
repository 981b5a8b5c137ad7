#!/usr/bin/env bash
# Set up PV Workbench on a fresh Debian-like machine: system packages (offline coastlines,
# Chromium for the browser tests, poppler for looking at PDFs) when run as root, then a .venv
# with the package and everything the tests, the app and the benchmarks need.
set -euo pipefail
cd "$(dirname "$0")/.."
if command -v apt-get >/dev/null 2>&1 && [ "$(id -u)" = "0" ]; then
  need=""
  for pkg in python-cartopy-data chromium poppler-utils fonts-dejavu-core; do
    dpkg -s "$pkg" >/dev/null 2>&1 || need="$need $pkg"
  done
  if [ -n "$need" ]; then
    export DEBIAN_FRONTEND=noninteractive
    apt-get update -qq
    apt-get install -y -qq --no-install-recommends $need >/dev/null
  fi
elif ! [ -x /usr/bin/chromium ]; then
  echo "note: install the Debian packages python-cartopy-data chromium poppler-utils for the browser tests" >&2
fi
PY=${PYTHON:-python3}
[ -x .venv/bin/python ] || "$PY" -m venv .venv
.venv/bin/python -m pip install -q --upgrade pip
.venv/bin/python -m pip install -q -e ".[test]"
