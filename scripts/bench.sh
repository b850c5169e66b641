#!/usr/bin/env bash
# Runs the benchmarks and prints summary tables:
#   1. tracking: frames per second of the whole tracking stage (track.Run on
#      a folder of PNG frames, decoding included) against the plain
#      detect-and-track loop on the same frames (issue 3's goal: the
#      default tracker at >= 1.6x the plain loop), with CPU time per frame,
#      kept tracks per frame pair and end-point errors against the known
#      warp;
#   2. factor: `go test -run xxx -bench . ./factor`, one line per benchmark;
#   3. headline: one table of the headline figures — tracking, SVD, the
#      missing-data solver, bundle adjustment, peak memory of track and run
#      (TF_BENCH_LARGE=1 adds 1000- and 3000-frame sequences and the large
#      solver sizes).
# Each section is a function; add yours to the list at the end.
#
# Environment: TF_BENCHTIME (go test -benchtime for tracking, default 10x),
# TF_BENCHCOUNT (repetitions, default 3; the table shows the median),
# TF_FACTOR_BENCH (benchmark pattern for ./factor, default .),
# TF_FACTOR_BENCHTIME (default: go test's own, 1s).
#
# Frames per second depend on what else runs on the machine: the CPU
# column (all threads, user + system) is steadier when the machine is
# shared.
#
# Usage: scripts/bench.sh   (from anywhere inside the repo)
set -euo pipefail
cd "$(dirname "$0")/.."

# median_table reads `go test -bench` output and prints, per benchmark
# name, the median of each metric over the repetitions as
# "name<TAB>unit=value<TAB>…".
median_table() {
	awk '
	/^Benchmark/ {
		name = $1; sub(/-[0-9]+$/, "", name)
		if (!(name in seen)) { seen[name] = 1; order[++n] = name }
		for (i = 3; i + 1 <= NF; i += 2) {
			u = $(i + 1); k = name SUBSEP u
			if (!((name, u) in nv)) { units[name] = units[name] " " u }
			vals[k, ++nv[name, u]] = $i
		}
	}
	END {
		for (j = 1; j <= n; j++) {
			name = order[j]; line = name
			m = split(units[name], us, " ")
			for (q = 1; q <= m; q++) {
				u = us[q]; c = nv[name, u]
				for (a = 1; a <= c; a++) v[a] = vals[name SUBSEP u, a] + 0
				for (a = 1; a <= c; a++) for (b = a + 1; b <= c; b++) if (v[b] < v[a]) { t = v[a]; v[a] = v[b]; v[b] = t }
				med = (c % 2) ? v[(c + 1) / 2] : (v[c / 2] + v[c / 2 + 1]) / 2
				line = line "\t" u "=" med
			}
			print line
		}
	}'
}

tracking() {
	bash scripts/fetch-testdata.sh
	local raw
	raw=$(go test -run xxx -bench 'BenchmarkTrack640x480|BenchmarkPlainLoop' \
		-benchtime "${TF_BENCHTIME:-10x}" -count "${TF_BENCHCOUNT:-3}" ./track)
	echo "== tracking, 640x480, 1000 corners, forward-backward on, 20 frames (median of ${TF_BENCHCOUNT:-3})"
	printf '%s\n' "$raw" | median_table | awk -F'\t' '
	function get(line, unit,   i, f, kv) {
		f = split(line, kv, "\t")
		for (i = 2; i <= f; i++) if (index(kv[i], unit "=") == 1) return substr(kv[i], length(unit) + 2)
		return ""
	}
	{
		name = $1; sub(/^Benchmark/, "", name)
		rows[++n] = name; line[name] = $0
		if (name ~ /^PlainLoop\//) { seq = name; sub(/^PlainLoop\//, "", seq); plain[seq] = get($0, "frames/s") }
	}
	END {
		printf "%-32s %9s %8s %10s %11s %9s %9s %9s %9s\n", "case", "frames/s", "x plain", "cpu-ms/fr", "tracks/pair", "life-med", "life-p99", "pair-med", "pair-p99"
		for (j = 1; j <= n; j++) {
			name = rows[j]; l = line[name]
			seq = name; sub(/^Track640x480\//, "", seq); sub(/^PlainLoop\//, "", seq); sub(/\/.*/, "", seq)
			fps = get(l, "frames/s"); ratio = (plain[seq] > 0) ? sprintf("%.2f", fps / plain[seq]) : "-"
			med = get(l, "median-px"); p99 = get(l, "p99-px"); pm = get(l, "pair-median-px"); pp = get(l, "pair-p99-px")
			printf "%-32s %9.1f %8s %10.2f %11.1f %9s %9s %9s %9s\n", name, fps, ratio, get(l, "cpu-ms/frame"), get(l, "tracks/pair"),
				(med == "" ? "-" : sprintf("%.4f", med)), (p99 == "" ? "-" : sprintf("%.4f", p99)),
				(pm == "" ? "-" : sprintf("%.4f", pm)), (pp == "" ? "-" : sprintf("%.4f", pp))
		}
		print "life: end-point error against the known warp over the life of each track (drift included); pair: the error of the motion of one frame pair (what the plain loop can be held to); px"
	}'
	echo
}

factor() {
	local args=(-run xxx -bench "${TF_FACTOR_BENCH:-.}")
	if [[ -n ${TF_FACTOR_BENCHTIME:-} ]]; then args+=(-benchtime "$TF_FACTOR_BENCHTIME"); fi
	local raw
	raw=$(go test "${args[@]}" ./factor)
	echo "== factor (go test ${args[*]} ./factor)"
	printf '%s\n' "$raw" | median_table | awk -F'\t' '{
		name = $1; sub(/^Benchmark/, "", name); extra = ""
		for (i = 2; i <= NF; i++) {
			split($i, kv, "=")
			if (kv[1] == "ns/op") ms = sprintf("%12.3f ms/op", kv[2] / 1e6)
			else extra = extra sprintf("  %s %g", kv[1], kv[2])
		}
		printf "%-40s %s%s\n", name, ms, extra
	}'
	echo
}


# headline: one table of the headline figures (issue 8) on this machine —
# tracking frames/s against the plain loop, the rank-3 SVD truncated and
# full, the missing-data solver and bundle adjustment to convergence, and
# the peak resident memory (/usr/bin/time -v) of `trackfactor track` and
# `trackfactor run` on 640×480 synthetic sequences of 100 frames (and
# 1000 and 3000 with TF_BENCH_LARGE=1, which also adds the large solver
# sizes; a large run is given TF_BENCH_RUN_TIMEOUT, default 30m) — each
# with how it grows with the work.
headline() {
	local large=${TF_BENCH_LARGE:-0}
	bash scripts/fetch-testdata.sh
	[[ -x /usr/bin/time ]] || TF_SETUP_EXTRA="time" bash scripts/setup.sh
	local tmp
	tmp=$(mktemp -d)
	trap 'rm -rf "$tmp"' EXIT
	# metric RAW NAME UNIT: the value before UNIT on benchmark NAME's line.
	metric() {
		printf '%s\n' "$1" | awk -v n="$2" -v u="$3" '
			{ name = $1; sub(/-[0-9]+$/, "", name) }
			name == n { for (i = 3; i <= NF; i++) if ($i == u) { printf "%g\n", $(i - 1); exit } }'
	}
	# times: "72x2000" as "72 × 2000".
	times() { printf '%s' "${1/x/ × }"; }
	local rows=()
	row() { rows+=("$(printf '| %s | %s | %s | %s |' "$@")"); }

	local tr
	tr=$(go test -run '^$' -bench '^BenchmarkTrack640x480$/^(warp|turntable)$/^default$' -benchtime "${TF_BENCHTIME:-10x}" ./track)
	tr+=$'\n'$(go test -run '^$' -bench '^BenchmarkPlainLoop$/^(warp|turntable)$' -benchtime "${TF_BENCHTIME:-10x}" ./track)
	local seq fps plain pairs
	for seq in warp turntable; do
		fps=$(metric "$tr" "BenchmarkTrack640x480/$seq/default" frames/s)
		plain=$(metric "$tr" "BenchmarkPlainLoop/$seq" frames/s)
		pairs=$(metric "$tr" "BenchmarkTrack640x480/$seq/default" tracks/pair)
		row "tracking ($seq, default options)" "20 frames 640×480, ${pairs} tracks/pair" \
			"$(awk -v a="$fps" -v b="$plain" 'BEGIN { printf "%.1f frames/s, %.2f× the plain loop (%.1f frames/s)", a, a / b, b }')" \
			"linear in frames × live tracks (plus a fixed cost per frame: decoding, pyramids)"
	done

	local svdsizes=(1000x5000)
	((large)) && svdsizes+=(2000x20000)
	local sv s tt tf
	sv=$(go test -run '^$' -bench "^BenchmarkSVD(Truncated|Full)($(
		IFS='|'
		echo "${svdsizes[*]}"
	))\$" -benchtime 1x ./factor)
	for s in "${svdsizes[@]}"; do
		tt=$(metric "$sv" "BenchmarkSVDTruncated$s" ns/op)
		tf=$(metric "$sv" "BenchmarkSVDFull$s" ns/op)
		row "rank-3 SVD of the measurement matrix, truncated vs full" "$(times "$s") (2F × P)" \
			"$(awk -v a="$tt" -v b="$tf" 'BEGIN { if (b == "") printf "%.0f ms truncated (full: skipped)", a / 1e6; else printf "%.0f ms truncated, %.0f ms full (%.1f× faster)", a / 1e6, b / 1e6, b / a }')" \
			"truncated: linear in 2F × P (a few passes over the matrix); full: 2F × P × min(2F, P)"
	done

	local md size
	md=$(go test -run '^$' -bench '^BenchmarkMissingData$' -benchtime 1x ./pipeline)
	for size in $(printf '%s\n' "$md" | awk '/^BenchmarkMissingData\//{ n = $1; sub(/^BenchmarkMissingData\//, "", n); sub(/-[0-9]+$/, "", n); print n }'); do
		row "missing-data solver to convergence (VarPro, restarts, robust rounds)" "$(times "$size") frames × tracks, half seen, $(metric "$md" "BenchmarkMissingData/$size" coordinates) coordinates" \
			"$(metric "$md" "BenchmarkMissingData/$size" ms/solve) ms ($(metric "$md" "BenchmarkMissingData/$size" runs) runs, $(metric "$md" "BenchmarkMissingData/$size" ms/iter) ms per iteration)" \
			"per iteration: linear in observations + (8F)³ for the dense camera system (used up to 200 frames)"
	done

	# Long sequences: the dense camera step against the matrix-free PCG one
	# (factor/missing_cg.go) on turntable-like tracks.
	local ml name
	ml=$(TF_BENCH_LARGE=$large go test -run '^$' -bench '^BenchmarkIncompleteLong$' -benchtime 1x ./factor)
	for name in $(printf '%s\n' "$ml" | awk '/^BenchmarkIncompleteLong\// && !/SKIP/ { n = $1; sub(/^BenchmarkIncompleteLong\//, "", n); sub(/-[0-9]+$/, "", n); print n }'); do
		local cgs
		cgs=$(metric "$ml" "BenchmarkIncompleteLong/$name" cg/solve)
		row "missing-data solver, long sequence, ${name#*/} camera step" "$(times "${name%%/*}") frames × tracks (tracks of ~40 frames)" \
			"$(metric "$ml" "BenchmarkIncompleteLong/$name" median-s) s ($(metric "$ml" "BenchmarkIncompleteLong/$name" iters) iterations, $(metric "$ml" "BenchmarkIncompleteLong/$name" ms/iter) ms each${cgs:+, $cgs CG iterations per step})" \
			"dense: (8F)³ per iteration; pcg: linear in observations per CG iteration, CG iterations grow slowly with F"
	done

	local basizes=(72x2000)
	((large)) && basizes+=(300x20000)
	local ba
	ba=$(TF_BENCH_LARGE=$large go test -run '^$' -bench "^BenchmarkAdjust($(
		IFS='|'
		echo "${basizes[*]}"
	))\$" -benchtime 1x ./factor/bundle)
	for s in "${basizes[@]}"; do
		row "bundle adjustment to convergence (Schur, robust loss)" "$(times "$s") cameras × points, 30 % seen" \
			"$(metric "$ba" "BenchmarkAdjust$s" ms/converged) ms ($(metric "$ba" "BenchmarkAdjust$s" iters) iterations, $(metric "$ba" "BenchmarkAdjust$s" ms/iter) ms each)" \
			"per iteration: linear in observations + (6F)³ for the dense reduced camera system (used up to 200 cameras)"
	done

	local bl
	bl=$(TF_BENCH_LARGE=$large go test -run '^$' -bench '^BenchmarkAdjustLong$' -benchtime 1x ./factor/bundle)
	for name in $(printf '%s\n' "$bl" | awk '/^BenchmarkAdjustLong\// && !/SKIP/ { n = $1; sub(/^BenchmarkAdjustLong\//, "", n); sub(/-[0-9]+$/, "", n); print n }'); do
		local cgi
		cgi=$(metric "$bl" "BenchmarkAdjustLong/$name" cg/iter)
		row "bundle adjustment, long sequence, ${name#*/} reduced system" "$(times "${name%%/*}") cameras × points (arcs of 40–90 cameras)" \
			"$(metric "$bl" "BenchmarkAdjustLong/$name" ms/converged) ms ($(metric "$bl" "BenchmarkAdjustLong/$name" iters) iterations, $(metric "$bl" "BenchmarkAdjustLong/$name" ms/iter) ms each${cgi:+, $cgi CG iterations per step})" \
			"dense: (6F)³ per iteration; pcg: linear in observations per CG iteration, CG iterations grow with F / arc length"
	done

	go build -o "$tmp/trackfactor" ./cmd/trackfactor
	local lengths=(100)
	((large)) && lengths+=(1000 3000)
	local n log code rss wall what
	for n in "${lengths[@]}"; do
		TF_RENDER_DIR="$tmp/seq$n" TF_RENDER_FRAMES=$n go test -count=1 -run '^TestRenderBenchFrames$' ./pipeline >/dev/null
		for what in track run; do
			log="$tmp/time-$what-$n"
			code=0
			if [[ $what == track ]]; then
				/usr/bin/time -v -o "$log" "$tmp/trackfactor" track -q -o "$tmp/t$n.csv" "$tmp/seq$n" 2>"$log.err" || code=$?
			else
				timeout "${TF_BENCH_RUN_TIMEOUT:-30m}" /usr/bin/time -v -o "$log" "$tmp/trackfactor" run -q -o "$tmp/out$n" "$tmp/seq$n" 2>"$log.err" || code=$?
			fi
			rss=$(awk -F': ' '/Maximum resident set size/ { printf "%.0f", $2 / 1024 }' "$log" 2>/dev/null)
			wall=$(awk -F': ' '/Elapsed \(wall clock\)/ { print $2 }' "$log" 2>/dev/null)
			local val="peak ${rss:-?} MiB, ${wall:-?} wall"
			if ((code == 124)); then
				val="did not finish within ${TF_BENCH_RUN_TIMEOUT:-30m}"
			elif ((code != 0)); then
				val="$val; exit $code: $(tail -n 1 "$log.err" | cut -c1-160)"
			fi
			if [[ $what == track ]]; then
				row "peak memory, trackfactor track" "$n frames 640×480 (1° per frame)" "$val" \
					"the tracks only (32 B per observation stored, about 190 B measured with slice growth and GC headroom; 409 MiB at 3000 frames): frames are decoded, tracked and released"
			else
				row "peak memory, trackfactor run" "$n frames 640×480 (1° per frame)" "$val" \
					"linear in observations above 500 frames; up to there + 40·(6F)² B for bundle adjustment's dense systems (and 48·(8F)² B for the missing-data solver up to 200 frames): pipeline/limits.go"
			fi
		done
	done

	echo "== headline figures ($(nproc) cores; other work on the machine slows the timings)"
	echo "| figure | work | on this machine | grows with |"
	echo "| --- | --- | --- | --- |"
	printf '%s\n' "${rows[@]}"
	echo
	rm -rf "$tmp"
	trap - EXIT
}

# TF_BENCH_SECTIONS picks sections (default: all), e.g. TF_BENCH_SECTIONS=headline.
for section in ${TF_BENCH_SECTIONS:-tracking factor headline}; do
	"$section"
done
