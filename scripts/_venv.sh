# Sourced by test.sh and demo.sh: make (if needed) and upgrade the virtual
# environment in $VENV. Run from the repository root.
VENV="${GUARDBAND_VENV:-.venv}"
if [ ! -x "$VENV/bin/python" ]; then
  python3 -m venv "$VENV"
fi
"$VENV/bin/python" -m pip install --quiet --upgrade pip >/dev/null
