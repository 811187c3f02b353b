#!/usr/bin/env bash
# Install aggpub with its test dependencies into .venv and run the whole test suite.
# Exit non-zero on any failure, and also when no test ran (pytest exit code 5).
set -euo pipefail
cd "$(dirname "$0")/.."
PY=${PYTHON:-python3}
if [ ! -x .venv/bin/python ]; then
  "$PY" -m venv .venv
fi
.venv/bin/python -m pip install --quiet --upgrade pip >/dev/null
# AGGPUB_EXTRAS adds optional extras, e.g. AGGPUB_EXTRAS=spark (CI sets it; needs Java 17 for Spark)
EXTRAS="test${AGGPUB_EXTRAS:+,$AGGPUB_EXTRAS}"
.venv/bin/python -m pip install --quiet -e ".[$EXTRAS]"
set +e
.venv/bin/python -m pytest -q "$@"
code=$?
set -e
if [ "$code" -eq 5 ]; then
  echo "no tests ran: failing" >&2
  exit 1
fi
exit "$code"
