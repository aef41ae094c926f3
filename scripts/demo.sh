#!/usr/bin/env bash
# Sets up a fresh machine and runs the demo: both demo tables tuned end to end.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
exec .venv/bin/grovekeeper demo "$@"
