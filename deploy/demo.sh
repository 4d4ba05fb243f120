#!/usr/bin/env bash
# The demo: Harbour Lane Veterinary Practice's morning mail through a real mailweir daemon.
# On first use this makes .venv beside the checkout and installs mailweir into it.
# Extra arguments go to `mailweir demo` (e.g. --exit to stop when done, --http-port N).
set -euo pipefail
cd "$(dirname "$0")/.."
if [ ! -x .venv/bin/python ]; then
  python3 -m venv .venv
fi
stale=0
for source in pyproject.toml setup.py model/_*.c store/_*.c; do
  if [ "$source" -nt .venv/.mailweir-demo-installed ]; then stale=1; fi
done
if [ ! -f .venv/.mailweir-demo-installed ] || [ "$stale" = 1 ]; then
  echo "Installing mailweir into .venv (first run only) ..."
  .venv/bin/python -m pip install -q --disable-pip-version-check -e .
  touch .venv/.mailweir-demo-installed
fi
exec .venv/bin/mailweir demo "$@"
