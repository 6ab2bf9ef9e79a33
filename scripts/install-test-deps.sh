#!/usr/bin/env bash
# Installs everything the test suite needs on a fresh Debian machine (run as root):
# Debian packages where missing (ngspice, poppler-utils, qpdf, postgresql, hdf5-tools,
# chromium and its driver for the browser tests), then this package with its test extras.
# Safe to run again: it installs nothing that is already there.
set -euo pipefail
cd "$(dirname "$0")/.."

need=()
command -v ngspice >/dev/null 2>&1 || need+=(ngspice)
command -v pdfsig >/dev/null 2>&1 || need+=(poppler-utils)
command -v qpdf >/dev/null 2>&1 || need+=(qpdf)
command -v h5dump >/dev/null 2>&1 || need+=(hdf5-tools)
ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1 || need+=(postgresql)
command -v chromium >/dev/null 2>&1 || need+=(chromium)
command -v chromedriver >/dev/null 2>&1 || need+=(chromium-driver)
if [ ${#need[@]} -gt 0 ]; then
  echo "installing Debian packages: ${need[*]}"
  export DEBIAN_FRONTEND=noninteractive
  apt-get update -qq
  apt-get install -y -qq --no-install-recommends "${need[@]}"
fi

python3 -m pip install -q --disable-pip-version-check -e '.[test]'
