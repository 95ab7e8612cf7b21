#!/usr/bin/env bash
# Install rolewatch with its test dependencies into .venv and run the whole test suite.
# PostgreSQL tests run when ROLEWATCH_TEST_POSTGRES_URL is set; browser tests when
# Debian's chromium and chromium-driver are installed. Extra arguments go to pytest.
set -euo pipefail
cd "$(dirname "$0")/.."
source scripts/venv.sh
status=0
.venv/bin/python -m pytest "$@" || status=$?
if [ "$status" -eq 5 ]; then
  echo "pytest collected no tests: that is a failure, not a pass" >&2
  exit 1
fi
exit "$status"
