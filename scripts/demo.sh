#!/usr/bin/env bash
# The whole job on the bundled samples (fictional Oskarvel Delta scenes):
#   1. describe the 1-look scene;
#   2. despeckle it with the bundled starter model, tile by tile;
#   3. benchmark the starter model against the classical filters and write a report.
# Creates/uses .venv; outputs go to demo_output/ (replaced on each run).
set -euo pipefail
here="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
bash "$here/scripts/setup_env.sh"
venv="${DESPECK_VENV:-$here/.venv}"
despeck="$venv/bin/despeck"
out="$here/demo_output"
samples="$here/sample_patches"
mkdir -p "$out"
cd "$here"

echo "== 1/3  the scene"
"$despeck" info "$samples/oskarvel_1look.tif"

echo "== 2/3  despeckle with the starter model"
"$despeck" apply "$samples/oskarvel_1look.tif" "$samples/oskarvel_4look_db.tif" --out-dir "$out" --overwrite

echo "== 3/3  compare with classical filters (report)"
"$despeck" bench "$out/report" --scenes "$samples/oskarvel_bench.yaml" --overwrite \
    --method model:"$here/despeck/weights/starter.safetensors" \
    --method boxcar --method lee --method enhanced-lee --method kuan --method frost \
    --method gamma-map --method refined-lee --method improved-sigma --method nonlocal

echo
echo "Despeckled scenes: $out/"
ls -1 "$out"/*.tif | sed 's/^/  /'
echo "Report:            $out/report/report.md  (figures beside it)"
