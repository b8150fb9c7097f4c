#!/usr/bin/env bash
# Instructions per MAC for each ingot-rt kernel, measured with callgrind.
#
# Method: the bench binary's `run NAME ITERS` mode sets up one kernel (same
# deterministic data every time) and calls it ITERS times. We run it under
# `valgrind --tool=callgrind` twice, with ITERS=0 and ITERS=N, and take the
# difference of the total instruction counts ("Collected"): set-up, process
# start and exit cancel, leaving the cost of exactly N kernel calls, which
# we divide by N * MACs (MACs as printed by `kernels list`; for pooling, add
# and pixel quantization they count taps/elements). Every instruction of the
# call is included: argument validation, im2col gather, dot products,
# requantization and stores.
#
# Usage: runtime-nostd/benches/callgrind.sh [N]   (default N=3)
set -euo pipefail
N="${1:-3}"
cd "$(dirname "$0")/../.."
if ! command -v valgrind >/dev/null 2>&1; then
    echo "valgrind missing; installing it with apt-get" >&2
    apt-get update -qq && apt-get install -y -qq valgrind >/dev/null
fi
BIN=$(cargo bench -p ingot-rt --bench kernels --no-run --message-format=json 2>/dev/null |
    sed -n 's/.*"executable":"\([^"]*kernels-[^"]*\)".*/\1/p' | tail -1)
if [ -z "$BIN" ] || [ ! -x "$BIN" ]; then
    echo "could not build the bench binary" >&2
    exit 1
fi
count() {
    valgrind --tool=callgrind --callgrind-out-file=/dev/null "$BIN" run "$1" "$2" 2>&1 |
        sed -n 's/.*Collected : *\([0-9]*\).*/\1/p'
}
printf '%-24s %12s %16s %10s\n' kernel MACs instr/call instr/MAC
"$BIN" list | while read -r name macs; do
    base=$(count "$name" 0)
    full=$(count "$name" "$N")
    awk -v n="$name" -v m="$macs" -v b="$base" -v f="$full" -v k="$N" 'BEGIN {
        per = (f - b) / k;
        printf "%-24s %12d %16.0f %10.3f\n", n, m, per, per / m
    }'
done
