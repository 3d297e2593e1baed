#!/usr/bin/env bash
# The one test command: installs what the tests need on a fresh Debian
# machine (ONNX conformance data, headless Chromium for the report test),
# then runs vet, gofmt and every Go test.
# Usage: bash scripts/test.sh
set -euo pipefail
cd "$(dirname "$0")/.."

need=()
[ -d /usr/share/libonnx-testdata/data/node ] || need+=(libonnx-testdata)
command -v chromium >/dev/null 2>&1 || need+=(chromium)
if [ ${#need[@]} -gt 0 ]; then
	if [ "$(id -u)" = 0 ]; then
		echo "installing Debian packages: ${need[*]}"
		apt-get update -qq
		DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends "${need[@]}" >/dev/null
	else
		echo "not root: cannot install ${need[*]}; tests that need them will skip with a message" >&2
	fi
fi

unformatted=$(gofmt -l $(git ls-files '*.go' 2>/dev/null || find . -name '*.go'))
if [ -n "$unformatted" ]; then
	echo "gofmt would change:" $unformatted >&2
	exit 1
fi
go vet ./...
go test -count=1 ./... 2>&1 | tee /tmp/heedmap-test.log
