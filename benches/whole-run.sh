#!/bin/sh
# Whole-process timing of `convchain run` on the reference chain (reference-chain.toml, 10 MHz grid) with every
# artefact (report.json, waveforms.csv and .npy, plots, WAV files, report.md, report.html), for 1 s and 0.1 s of
# signal, then with --no-wav --no-plots: the median wall time of RUNS runs (default 5) each, and the peak
# resident memory of the last one. Then the numpy/scipy timing peer (benches/peer/reference_chain.py, the same
# chain computing its output and SINAD, writing nothing) alternated run by run with convchain's every-artefact
# run: both medians, the peer's time after its imports, and the ratios. Run from the repository root after
# `cargo build --release`:  sh benches/whole-run.sh [RUNS]
# (CONVCHAIN_BIN=path/to/convchain times another build; PEER=0 skips the peer; PYTHON picks the interpreter.)
set -e
bin=${CONVCHAIN_BIN:-./target/release/convchain}
runs=${1:-5}
py=${PYTHON:-python3}
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
cp benches/reference-chain.toml "$tmp/ref-1s.toml"
sed 's/duration = "1 s"/duration = "100 ms"/' benches/reference-chain.toml > "$tmp/ref-100ms.toml"
median() { sort -n | awk '{v[NR]=$1} END {m=int((NR+1)/2); printf "%.3f", v[m]}'; }
now() { date +%s.%N; }
echo "load average: $(cut -d' ' -f1-3 /proc/loadavg)"
for case in "ref-1s" "ref-100ms"; do
    for opts in "" "--no-wav --no-plots"; do
        : > "$tmp/times"
        i=0
        while [ $i -lt "$runs" ]; do
            start=$(now)
            # shellcheck disable=SC2086
            $bin run "$tmp/$case.toml" --out "$tmp/out" --force -q $opts
            end=$(now)
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
[ "${PEER:-1}" = 0 ] && exit 0
if ! $py -c "import numpy, scipy.signal" 2>/dev/null; then
    echo "peer: SKIPPED ($py cannot import numpy and scipy.signal)"
    exit 0
fi
for case in "ref-1s:1" "ref-100ms:0.1"; do
    name=${case%%:*}
    dur=${case#*:}
    : > "$tmp/cc"
    : > "$tmp/peer"
    : > "$tmp/peer-inner"
    i=0
    while [ $i -lt "$runs" ]; do
        start=$(now)
        $bin run "$tmp/$name.toml" --out "$tmp/out" --force -q
        end=$(now)
        echo "$end - $start" | bc >> "$tmp/cc"
        start=$(now)
        line=$($py benches/peer/reference_chain.py "$dur")
        end=$(now)
        echo "$end - $start" | bc >> "$tmp/peer"
        echo "$line" | sed 's/.*; \([0-9.]*\) s after the imports/\1/' >> "$tmp/peer-inner"
        i=$((i + 1))
    done
    cc=$(median < "$tmp/cc")
    peer=$(median < "$tmp/peer")
    inner=$(median < "$tmp/peer-inner")
    ratio() { awk -v a="$1" -v b="$2" 'BEGIN {printf "%.2f", a / b}'; }
    echo "$name side by side ($runs alternated runs): convchain every artefact $cc s; numpy/scipy peer $peer s" \
        "whole process, $inner s after its imports; peer / convchain = $(ratio "$peer" "$cc")x (whole" \
        "process), $(ratio "$inner" "$cc")x (peer after its imports)"
done
echo "load average: $(cut -d' ' -f1-3 /proc/loadavg)"
