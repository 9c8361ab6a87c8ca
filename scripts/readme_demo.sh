#!/usr/bin/env bash
# Print the README's usage sessions with real output: every command, its output and its
# exit status, run in a scratch folder on a copy of sample_images.
#     bash scripts/readme_demo.sh [--train]      (--train adds the 2-minute training session)
set -u
repo=$(cd "$(dirname "$0")/.." && pwd)
scratch=$(mktemp -d)
trap 'rm -rf "$scratch"' EXIT
cp -r "$repo/sample_images" "$scratch/sample_images"
rm -f "$scratch/sample_images/README.md"
cd "$scratch" || exit 1

show() {  # show CMD...: print it as typed, run it, print its exit status
    echo "\$ $*"
    "$@" 2>&1
    echo "[exit $?]"
    echo
}

show rowcast compress sample_images -o samples.rowcast
show rowcast list samples.rowcast
show rowcast verify samples.rowcast --against sample_images
show rowcast decompress samples.rowcast -o restored

echo "--- errors"
show rowcast compress sample_images -o samples.rowcast
python - <<'EOF'
from PIL import Image
Image.new("CMYK", (16, 16), (40, 90, 30, 12)).save("sample_images/gate/proof.tif")
Image.new("F", (16, 16), 0.5).save("sample_images/gate/depth.tif")
EOF
show rowcast compress sample_images -o more.rowcast
show rowcast compress sample_images -o more.rowcast --leave-out-refused --exclude '*.json'
rm sample_images/gate/proof.tif sample_images/gate/depth.tif
python - <<'EOF'
import tifffile
path = "sample_images/soil-probe/raw_1400.tif"
a = tifffile.imread(path)
a[0, 0] ^= 1
tifffile.imwrite(path, a)
EOF
show rowcast verify samples.rowcast --against sample_images
cp "$repo/sample_images/soil-probe/raw_1400.tif" sample_images/soil-probe/

if [ "${1:-}" = "--train" ]; then
    echo "--- training: all folders but orchard-south, which is held out"
    mkdir train && cp -r sample_images/* train/ && rm -r train/orchard-south
    show python -m rowcast.train train runs/orchard --minutes 2 --resume default --lr 3e-4 \
        --held-out sample_images/orchard-south --export orchard.safetensors
    show rowcast compress sample_images/orchard-south -o south.rowcast
    show rowcast compress sample_images/orchard-south -o south-own.rowcast --model orchard.safetensors
fi
