#!/usr/bin/env bash
# Command 2 of the README: set up (with test tools and Xvfb/Mesa), lint, run the whole test suite.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh --test
.venv/bin/ruff check pmap tests scripts
export QT_QPA_PLATFORM=${QT_QPA_PLATFORM:-xcb}
export MPLBACKEND=Agg
if command -v xvfb-run >/dev/null && [[ -z "${DISPLAY:-}" ]]; then
    exec xvfb-run -a -s "-screen 0 1600x1000x24" .venv/bin/python -m pytest "$@"
else
    exec .venv/bin/python -m pytest "$@"
fi
