#!/usr/bin/env bash
# Set everything up (including headless Chromium for the report test), then run the test suite.
set -euo pipefail
cd "$(dirname "$0")/.."
CLEARAUDIT_WITH_BROWSER=1 bash scripts/setup.sh
exec .venv/bin/python -m pytest -n 2 -q "$@"
