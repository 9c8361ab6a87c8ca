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
Image.new("RGBA", (16, 16), (40, 90, 30, 128)).save("sample_images/gate/overlay.png")
EOF
show rowcast compress sample_images -o more.rowcast
rm sample_images/gate/overlay.png
python - <<'EOF'
import numpy as np
from PIL import Image
path = "sample_images/gate/gate_night.png"
a = np.asarray(Image.open(path)).copy()
a[0, 0] ^= 1
Image.fromarray(a).save(path)
EOF
show rowcast verify samples.rowcast --against sample_images
cp "$repo/sample_images/gate/gate_night.png" sample_images/gate/

if [ "${1:-}" = "--train" ]; then
    echo "--- training: all folders but orchard-south, which is held out"
    mkdir train && cp -r sample_images/* train/ && rm -r train/orchard-south
    show python -m rowcast.train train runs/orchard --minutes 2 --resume default --lr 3e-4 \
        --held-out sample_images/orchard-south --export orchard.safetensors
    show rowcast compress sample_images/orchard-south -o south.rowcast
    show rowcast compress sample_images/orchard-south -o south-own.rowcast --model orchard.safetensors
fi
