#!/usr/bin/env bash
# Formatting, lint and type checks (settings in pyproject.toml). Installs rolewatch with its
# test extras into .venv first, like scripts/test.sh. Fails on any finding.
set -euo pipefail
cd "$(dirname "$0")/.."
source scripts/venv.sh
.venv/bin/ruff format --check service tests scripts
.venv/bin/ruff check service tests scripts
.venv/bin/mypy
