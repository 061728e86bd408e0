#!/usr/bin/env bash
# Create (or reuse) the virtual environment .venv and install despeck into it.
# The CPU build of torch goes in first, so that the package's "torch>=2.2"
# requirement is already met and pip never fetches a multi-GB CUDA build.
# Usage: source scripts/setup_env.sh [extra]   (extra: "test" adds the test tools)
set -euo pipefail
here="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
venv="${DESPECK_VENV:-$here/.venv}"
extra="${1:-}"
py="${PYTHON:-python3}"
if [ ! -x "$venv/bin/python" ]; then
    echo "despeck set-up: creating virtual environment in $venv" >&2
    "$py" -m venv "$venv"
fi
vpy="$venv/bin/python"
export PIP_DISABLE_PIP_VERSION_CHECK=1
if ! "$vpy" -c "import torch" >/dev/null 2>&1; then
    echo "despeck set-up: installing the CPU build of torch" >&2
    # A CPU wheel of this version lies on local disk here; elsewhere pip finds it on
    # the registry. TORCH_SPEC lets another machine pick its own CPU build.
    "$vpy" -m pip install -q "${TORCH_SPEC:-torch==2.13.0}" 2>&1 \
        | grep -v "is ignored: it is neither a file nor a directory" >&2 || true
    "$vpy" -c "import torch" || { echo "despeck set-up: could not install torch" >&2; exit 1; }
fi
target="$here"
[ -n "$extra" ] && target="$here[$extra]"
stamp="$venv/.despeck-installed-${extra:-base}"
if [ ! -f "$stamp" ] || [ "$here/pyproject.toml" -nt "$stamp" ]; then
    echo "despeck set-up: installing despeck${extra:+ with [$extra]}" >&2
    "$vpy" -m pip install -q -e "$target" 2>&1 | grep -v "is ignored: it is neither a file nor a directory" >&2 || true
    "$vpy" -c "import despeck, torch, rasterio" || { echo "despeck set-up: install failed" >&2; exit 1; }
    touch "$stamp"
fi
