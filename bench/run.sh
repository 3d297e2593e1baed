#!/usr/bin/env bash
# heedmap side-by-side benchmark: heedmap's engine vs ONNX Runtime 1.30
# (Node, onnxruntime-node) vs PyTorch 1.13 (Debian python3-torch), 2 threads
# each, on full-size ResNet-18 and MobileNetV2 with random weights.
#
#   bash bench/run.sh [heedbench flags...]     (from anywhere in the repo)
#
# Full-size exports (~60 MB, made by testdata/reference/export_nets.py) and
# scratch files live in $HEEDMAP_BENCH_CACHE (default /tmp/heedmap-bench);
# a rerun reuses them. The table goes to stdout and to
# $HEEDMAP_BENCH_CACHE/results.md; progress goes to stderr. Extra arguments
# go to the driver (bench/cmd/heedbench), e.g. -iters1 16 -iters16 4,
# -occlusion=false, -skip-torch, -models resnet18.
set -euo pipefail

root=$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)
cache=${HEEDMAP_BENCH_CACHE:-/tmp/heedmap-bench}
python=${PYTHON:-/usr/bin/python3}
mkdir -p "$cache"

# 1. Networks: the committed reference script, full-size variants.
missing=()
for net in resnet18 mobilenet_v2; do
	[[ -s "$cache/nets/$net/model.onnx" && -s "$cache/nets/$net/input.pb" ]] || missing+=("$net")
done
if ((${#missing[@]})); then
	echo "exporting ${missing[*]} into $cache/nets (a few minutes)" >&2
	"$python" "$root/testdata/reference/export_nets.py" --full --out "$cache/nets" "${missing[@]}" >&2
fi

# 2. ONNX Runtime from npm. ONNXRUNTIME_NODE_INSTALL=skip skips the
# package's post-install download (GPU providers), which cannot work here;
# the CPU library ships inside the package.
if [[ ! -d "$root/bench/node/node_modules/onnxruntime-node" ]]; then
	echo "installing onnxruntime-node (npm ci)" >&2
	(cd "$root/bench/node" && ONNXRUNTIME_NODE_INSTALL=skip npm ci --no-audit --no-fund >&2)
fi

# 3. The driver: heedmap in-process, then ort.js and torch_bench.py as
# child processes, one after another.
(cd "$root" && go build -o "$cache/heedbench" ./bench/cmd/heedbench)
cd "$root"
"$cache/heedbench" -nets "$cache/nets" -work "$cache/run" -bench "$root/bench" -python "$python" "$@" | tee "$cache/results.md"
