#!/usr/bin/env bash
# The full test suite: sets up what is missing, fetches the open reference
# data (Debian's opencv-doc photographs and calibration), then runs every
# test, the browser test of the report included. Pass -short for the quick
# inner loop (go test -short ./...). Extra arguments go to go test.
set -euo pipefail
cd "$(dirname "$0")/.."

short=0
args=()
for a in "$@"; do
	if [[ $a == -short ]]; then short=1; else args+=("$a"); fi
done

if ((short)); then
	bash scripts/setup.sh
	exec go test -short "${args[@]}" ./...
fi

TF_SETUP_EXTRA="chromium fonts-dejavu-core python3-numpy" bash scripts/setup.sh
bash scripts/fetch-testdata.sh
go vet ./...
go test -timeout 60m "${args[@]}" ./...
if [[ -f scripts/fuzz.sh ]]; then
	TF_FUZZ_TIME=${TF_FUZZ_TIME:-5s} bash scripts/fuzz.sh
fi
