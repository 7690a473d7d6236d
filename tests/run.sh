#!/usr/bin/env bash
# Install everything the test suite needs on a fresh machine, then run the whole suite.
# Extra arguments go to pytest (e.g. `bash tests/run.sh -k variogram`).
set -euo pipefail
cd "$(dirname "$0")/.."

# Real-browser tests drive Debian's Chromium (no browser download is possible here).
if [ ! -x /usr/bin/chromium ]; then
  SUDO=""
  if [ "$(id -u)" -ne 0 ]; then SUDO="sudo"; fi
  $SUDO apt-get update -qq
  $SUDO apt-get install -y -qq --no-install-recommends chromium fonts-dejavu-core
fi

python3 -m pip install --quiet --disable-pip-version-check -e '.[test,dask]'
# pytest exits 5 when it collected no test: that is a failure here too.
python3 -m pytest "$@"
