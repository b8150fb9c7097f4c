#!/usr/bin/env bash
# Installs what `ingot check --on m0plus|m3|m4|m7|m33` and its tests need:
# QEMU's Arm system emulator (MPS2 boards), Arm binutils (size, nm) and the
# Rust Cortex-M targets. Fails loudly when a source is unreachable.
set -euo pipefail

need_apt=()
command -v qemu-system-arm >/dev/null 2>&1 || need_apt+=(qemu-system-arm)
command -v arm-none-eabi-size >/dev/null 2>&1 || need_apt+=(binutils-arm-none-eabi)
if ((${#need_apt[@]})); then
    if ! apt-get update; then
        echo "install-emulation: apt-get update failed (Debian mirrors unreachable?)" >&2
        exit 1
    fi
    if ! DEBIAN_FRONTEND=noninteractive apt-get install -y "${need_apt[@]}"; then
        echo "install-emulation: apt-get install ${need_apt[*]} failed" >&2
        exit 1
    fi
fi

for t in thumbv6m-none-eabi thumbv7m-none-eabi thumbv7em-none-eabihf thumbv8m.main-none-eabihf; do
    if ! rustup target add "$t"; then
        echo "install-emulation: rustup target add $t failed (static.rust-lang.org unreachable?)" >&2
        exit 1
    fi
done

qemu-system-arm --version | head -n 1
for m in mps2-an385 mps2-an386 mps2-an500 mps2-an505; do
    if ! qemu-system-arm -machine help | grep -q "^$m "; then
        echo "install-emulation: this qemu-system-arm has no $m board" >&2
        exit 1
    fi
done
arm-none-eabi-size --version | head -n 1
