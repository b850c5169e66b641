#!/usr/bin/env bash
# Fuzzes every reader of user files, one target at a time, each for a
# bounded time: TF_FUZZ_TIME per target (default 60s; scripts/test.sh runs
# it with 5s), minimising each new input for at most TF_FUZZ_MINIMIZE_TIME
# (default 5s; the JSON targets run a few milliseconds per input, so Go's
# default of 60s would spend a short run minimising).
#
#   bash scripts/fuzz.sh                        # every target, 60s each
#   TF_FUZZ_TIME=10m bash scripts/fuzz.sh       # longer
#   bash scripts/fuzz.sh FuzzReadPLY FuzzReadJSON   # only these
#
# A failing input is written by go test into the package's
# testdata/fuzz/<Target>/ folder, where every later `go test` runs it as a
# regression test; commit it with the fix. All targets run even when one
# fails; the script exits non-zero when any failed.
set -uo pipefail
cd "$(dirname "$0")/.."

time=${TF_FUZZ_TIME:-60s}
minimize=${TF_FUZZ_MINIMIZE_TIME:-5s}

# package target — what each reads
targets=(
	"./track FuzzReadCSV"                 # track CSV (ours or another tracker's)
	"./track FuzzCheckComplete"           # PNG/JPEG completeness check run before every frame is decoded
	"./export FuzzReadPLY"                # PLY point clouds
	"./export FuzzValidate"               # reconstruction.json against the schema
	"./export FuzzReadJSON"               # reconstruction.json into a document
	"./factor FuzzParseIntrinsics"        # intrinsics: our JSON/YAML, OpenCV FileStorage YAML
	"./cmd/trackfactor FuzzConfigFile"    # --config files (YAML, TOML)
	"./pipeline FuzzReconstructCSV"       # a track file through the whole reconstruction (trackfactor factor)
)

want=("$@")
failed=()
ran=0
for t in "${targets[@]}"; do
	read -r pkg name <<<"$t"
	if ((${#want[@]})); then
		keep=0
		for w in "${want[@]}"; do [[ $w == "$name" ]] && keep=1; done
		((keep)) || continue
	fi
	ran=$((ran + 1))
	echo "== $name ($pkg) for $time"
	if ! go test -run '^$' -fuzz "^${name}\$" -fuzztime "$time" -fuzzminimizetime "$minimize" "$pkg"; then
		failed+=("$name")
	fi
done
if ((ran == 0)); then
	echo "fuzz.sh: no target named ${want[*]}; the targets are: $(printf '%s\n' "${targets[@]}" | awk '{print $2}' | tr '\n' ' ')" >&2
	exit 2
fi
if ((${#failed[@]})); then
	echo "fuzz.sh: failed: ${failed[*]} (the failing inputs are in the packages' testdata/fuzz folders)" >&2
	exit 1
fi
echo "fuzz.sh: $ran targets, no failure"
