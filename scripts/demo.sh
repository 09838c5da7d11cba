#!/usr/bin/env bash
# Install volmag into .venv and compute the demagnetising tensor of the demo sample.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup-env.sh
exec .venv/bin/volmag run cases/drilled_sample.toml --out out/drilled_sample.h5 "$@"
