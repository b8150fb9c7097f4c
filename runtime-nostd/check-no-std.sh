#!/usr/bin/env bash
# Build ingot-rt for bare-metal Cortex-M targets (no std, no alloc).
# CI installs the targets; locally: rustup target add thumbv7em-none-eabihf
set -euo pipefail
cd "$(dirname "$0")/.."
for t in thumbv7em-none-eabihf thumbv6m-none-eabi; do
    if [ "$t" = thumbv7em-none-eabihf ] || rustup target list --installed | grep -qx "$t"; then
        echo "== cargo build -p ingot-rt --target $t"
        cargo build -p ingot-rt --lib --release --target "$t"
    fi
done
