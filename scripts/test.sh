#!/usr/bin/env bash
# Run the test suite in the project's virtual environment (created if missing).
set -euo pipefail
here="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
bash "$here/scripts/setup_env.sh" test
# One test reads our GeoTIFFs back with GDAL's own gdalinfo (Debian gdal-bin), a reader
# outside the project. Install it when we can (root with apt-get: ~10 s, 49 packages on
# Debian 12); if that fails the test shows up as skipped with the reason, never silently.
if ! command -v gdalinfo >/dev/null 2>&1 && command -v apt-get >/dev/null 2>&1 && [ "$(id -u)" = 0 ]; then
    echo "test.sh: installing gdal-bin for the gdalinfo check" >&2
    export DEBIAN_FRONTEND=noninteractive
    if ! compgen -G "/var/lib/apt/lists/*_Packages*" >/dev/null; then
        apt-get update -q >/dev/null 2>&1 || true
    fi
    apt-get install -y -q gdal-bin >/dev/null 2>&1 \
        || { apt-get update -q >/dev/null 2>&1 && apt-get install -y -q gdal-bin >/dev/null 2>&1; } \
        || echo "test.sh: could not install gdal-bin; the gdalinfo test will be skipped" >&2
fi
cd "$here"
exec "${DESPECK_VENV:-$here/.venv}/bin/python" -m pytest -q "$@"
