#!/usr/bin/env bash
# Lint, types, then tests: what CI runs, in the same order. Extra arguments go to pytest.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
.venv/bin/ruff check .
.venv/bin/mypy
exec .venv/bin/python -m pytest "$@"
