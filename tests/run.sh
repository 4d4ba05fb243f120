#!/usr/bin/env bash
# Run the test suite.  On first use this makes .venv beside the checkout and installs mailweir
# with its test extras into it; later runs reinstall only when the build's files changed
# (pyproject.toml, setup.py, the C sources model/_*.c and store/_*.c).
# Extra arguments go to pytest, e.g.  bash tests/run.sh -m "not slow" tests/model
set -euo pipefail
cd "$(dirname "$0")/.."
if [ ! -x .venv/bin/python ]; then
  python3 -m venv .venv
fi
stale=0
for source in pyproject.toml setup.py model/_*.c store/_*.c; do
  if [ "$source" -nt .venv/.mailweir-installed ]; then stale=1; fi
done
if [ ! -f .venv/.mailweir-installed ] || [ "$stale" = 1 ]; then
  .venv/bin/python -m pip install -q --disable-pip-version-check --upgrade pip
  .venv/bin/python -m pip install -q --disable-pip-version-check -e ".[test]"
  touch .venv/.mailweir-installed
fi
exec .venv/bin/python -m pytest "$@"
