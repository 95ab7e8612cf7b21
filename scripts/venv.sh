# Sourced by scripts/test.sh and scripts/lint.sh: make .venv and install rolewatch with its
# test extras into it (editable), so both commands run on a fresh machine.
PYTHON="${PYTHON:-python3}"
if [ ! -x .venv/bin/python ]; then
  "$PYTHON" -m venv .venv
fi
.venv/bin/python -m pip install --quiet --upgrade pip
.venv/bin/python -m pip install --quiet -e '.[test,scale]'
