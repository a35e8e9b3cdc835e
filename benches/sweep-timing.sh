#!/bin/sh
# Timing of a sweep: 200 frequencies (1 kHz .. 19 kHz, log) of the reference chain (reference-chain.toml) with
# 20 ms of signal each (settle 2 ms), on 1 thread and on 2 threads. The two sweep.csv files must be identical.
# Run from the repository root after `cargo build --release`:  sh benches/sweep-timing.sh
set -e
bin=./target/release/convchain
tmp=$(mktemp -d)
sed 's/duration = "1 s"/duration = "20 ms"/; s/settle = "10 ms"/settle = "2 ms"/' benches/reference-chain.toml \
    > "$tmp/reference-20ms.toml"
for t in 1 2; do
    start=$(date +%s.%N)
    $bin sweep "$tmp/reference-20ms.toml" --vary "source.frequency=1 kHz..19 kHz" --points 200 --log \
        --threads $t --quiet --out "$tmp/threads-$t"
    end=$(date +%s.%N)
    echo "threads $t: $(echo "$end - $start" | bc) s for 200 points"
done
cmp "$tmp/threads-1/sweep.csv" "$tmp/threads-2/sweep.csv" && echo "sweep.csv identical"
rm -rf "$tmp"
