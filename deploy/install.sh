#!/bin/sh
# Install rolewatch into a virtual environment, or start it from there. The container image
# runs exactly these steps (deploy/Containerfile), and CI runs them in a throwaway venv
# (tests/operations/test_deploy.py), so the image's recipe is tested without a container
# engine.
#
#   install.sh install [SOURCE]   create $ROLEWATCH_VENV (default /opt/rolewatch) and
#                                 pip-install SOURCE into it (default: this repository;
#                                 a wheel file or "rolewatch" with --find-links work too).
#                                 $ROLEWATCH_PIP_OPTIONS adds pip options.
#   install.sh start              check the store, then run `rolewatch serve` in the
#                                 foreground (settings from ROLEWATCH_* and ROLEWATCH_CONFIG).
set -eu

VENV="${ROLEWATCH_VENV:-/opt/rolewatch}"
PYTHON="${PYTHON:-python3}"

case "${1:-}" in
  install)
    SOURCE="${2:-$(cd "$(dirname "$0")/.." && pwd)}"
    if [ ! -x "$VENV/bin/python" ]; then
      "$PYTHON" -m venv ${ROLEWATCH_VENV_OPTIONS:-} "$VENV"
    fi
    # shellcheck disable=SC2086  # word splitting of the options is wanted
    "$VENV/bin/python" -m pip install --quiet --no-cache-dir ${ROLEWATCH_PIP_OPTIONS:-} "$SOURCE"
    "$VENV/bin/rolewatch" --help >/dev/null
    echo "rolewatch installed in $VENV" >&2
    ;;
  start)
    # exec: the server gets SIGTERM directly and shuts down gracefully (exit 0).
    exec "$VENV/bin/rolewatch" serve
    ;;
  *)
    echo "usage: $0 install [SOURCE] | start" >&2
    exit 2
    ;;
esac
