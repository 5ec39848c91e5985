#!/usr/bin/env bash
# Set everything up, then audit the bundled sample corridor into out/sample/.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
.venv/bin/clearaudit audit sample_clouds/tarnwick_velloran_230kv.laz \
  --line sample_clouds/tarnwick_velloran_230kv.line.toml --out out/sample --overwrite "$@"
echo "Open out/sample/report.html, or run: .venv/bin/clearaudit view out/sample"
