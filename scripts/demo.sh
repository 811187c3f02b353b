#!/usr/bin/env bash
# Install aggpub into .venv and release the invented demo town into ./demo-release.
set -euo pipefail
cd "$(dirname "$0")/.."
PY=${PYTHON:-python3}
if [ ! -x .venv/bin/python ]; then
  "$PY" -m venv .venv
fi
.venv/bin/python -m pip install --quiet --upgrade pip >/dev/null
.venv/bin/python -m pip install --quiet -e .
.venv/bin/aggpub demo --out demo-release --overwrite "$@"
.venv/bin/aggpub check demo-release
