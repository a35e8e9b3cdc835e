#!/bin/sh
# Whole-process timing of `convchain run` on the reference chain (reference-chain.toml, 10 MHz grid) with every
# artefact (report.json, waveforms.csv, plots, WAV files, report.md, report.html), for 1 s and 0.1 s of signal,
# then with --no-wav --no-plots: the median wall time of RUNS runs (default 5) each, and the peak resident memory
# of the last one. Run from the repository root after `cargo build --release`:  sh benches/whole-run.sh [RUNS]
# (CONVCHAIN_BIN=path/to/convchain times another build.)
set -e
bin=${CONVCHAIN_BIN:-./target/release/convchain}
runs=${1:-5}
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
cp benches/reference-chain.toml "$tmp/ref-1s.toml"
sed 's/duration = "1 s"/duration = "100 ms"/' benches/reference-chain.toml > "$tmp/ref-100ms.toml"
median() { sort -n | awk '{v[NR]=$1} END {m=int((NR+1)/2); printf "%.3f", v[m]}'; }
for case in "ref-1s" "ref-100ms"; do
    for opts in "" "--no-wav --no-plots"; do
        : > "$tmp/times"
        i=0
        while [ $i -lt "$runs" ]; do
            start=$(date +%s.%N)
            # shellcheck disable=SC2086
            $bin run "$tmp/$case.toml" --out "$tmp/out" --force -q $opts
            end=$(date +%s.%N)
            echo "$end - $start" | bc >> "$tmp/times"
            i=$((i + 1))
        done
        rss=""
        if [ -x /usr/bin/time ]; then
            # shellcheck disable=SC2086
            rss=$(/usr/bin/time -f "%M" $bin run "$tmp/$case.toml" --out "$tmp/out" --force -q $opts 2>&1 | tail -1)
            rss=", peak RSS $rss KB"
        fi
        echo "$case ${opts:-(all artefacts)}: median $(median < "$tmp/times") s over $runs runs$rss"
    done
done
