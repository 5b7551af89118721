#!/usr/bin/env bash
# Set up a virtual environment (if needed) and run the whole test suite.
set -euo pipefail
cd "$(dirname "$0")/.."
source scripts/_venv.sh
"$VENV/bin/python" -m pip install --quiet -c constraints.txt -e ".[test]"
set +e
"$VENV/bin/python" -m pytest -q "$@"
rc=$?
set -e
if [ "$rc" -eq 5 ]; then
  echo "error: no tests were collected" >&2
  exit 1
fi
exit "$rc"
