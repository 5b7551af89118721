#!/usr/bin/env bash
# Set up a virtual environment (if needed) and run the bundled demo:
# check, plan, verify and replay on the invented tablet-blend protocol.
set -euo pipefail
cd "$(dirname "$0")/.."
source scripts/_venv.sh
"$VENV/bin/python" -m pip install --quiet -c constraints.txt -e .
"$VENV/bin/guardband" demo --out "${1:-guardband-demo}"
