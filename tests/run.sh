#!/usr/bin/env bash
# Run the test suite.  On first use this makes .venv beside the checkout and installs mailweir
# with its test extras into it; later runs reinstall only when pyproject.toml changed.
# Extra arguments go to pytest, e.g.  bash tests/run.sh -m "not slow" tests/model
set -euo pipefail
cd "$(dirname "$0")/.."
if [ ! -x .venv/bin/python ]; then
  python3 -m venv .venv
fi
if [ ! -f .venv/.mailweir-installed ] || [ pyproject.toml -nt .venv/.mailweir-installed ]; then
  .venv/bin/python -m pip install -q --disable-pip-version-check --upgrade pip
  .venv/bin/python -m pip install -q --disable-pip-version-check -e ".[test]"
  touch .venv/.mailweir-installed
fi
exec .venv/bin/python -m pytest "$@"
