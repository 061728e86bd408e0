#!/usr/bin/env bash
# Run the test suite in the project's virtual environment (created if missing).
set -euo pipefail
here="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
bash "$here/scripts/setup_env.sh" test
cd "$here"
exec "${DESPECK_VENV:-$here/.venv}/bin/python" -m pytest -q "$@"
