#!/usr/bin/env bash
# Sets up what is missing, builds trackfactor and runs it on the built-in
# synthetic turntable scene. Output goes to ./out/demo (replaced on every
# run); extra arguments go to `trackfactor demo`.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
mkdir -p bin
go build -o bin/trackfactor ./cmd/trackfactor
exec ./bin/trackfactor demo -o out/demo --force "$@"
