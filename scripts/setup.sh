#!/usr/bin/env bash
# Creates .venv (if missing) and installs Grovekeeper with its test tools into it.
set -euo pipefail
cd "$(dirname "$0")/.."
if [ ! -x .venv/bin/python ]; then
  python3 -m venv .venv
fi
.venv/bin/python -m pip install --quiet --upgrade pip
.venv/bin/python -m pip install --quiet -e '.[test]'
