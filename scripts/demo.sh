#!/usr/bin/env bash
# Command 1 of the README: set up (first time only), generate the demo map, process it, show where results are.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
exec .venv/bin/plcube demo --out "${PMAP_DEMO_OUT:-pmap_demo_output}" --overwrite "$@"
