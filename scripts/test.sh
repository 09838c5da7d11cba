#!/usr/bin/env bash
# Install volmag into .venv and run the test suite (slow studies: add --runslow).
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup-env.sh
exec .venv/bin/python -m pytest -q "$@"
