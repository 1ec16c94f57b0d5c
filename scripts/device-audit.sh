#!/usr/bin/env bash
# Audit of the device code: no allocation, no recursion, and where panics
# could still be reached. What each step proves is written in RELIABILITY.md.
#
#   scripts/device-audit.sh
#
# 1. The no_std crates alone for the Cortex-M4F target (default features off,
#    so `alloc` is not linked), and a grep: no `extern crate alloc` outside
#    the model crate's `alloc` feature, no `std::` in either crate.
# 2. Clippy with the panic lints on (unwrap, expect, panic!, unreachable!,
#    todo!, unimplemented!, indexing and slicing): prints the count per lint;
#    each indexing site is argued in RELIABILITY.md.
# 3. The emulated board's endpoint image, built into a scratch folder, through
#    scripts/device-audit.py: call-graph cycles (recursion), allocator
#    symbols, functions that keep a call to a panic entry point.
# Needs the thumbv7em-none-eabihf target and arm-none-eabi-objdump (or
# llvm-objdump). Exit status 0 when there is no recursion and no allocation.
set -euo pipefail
cd "$(dirname "$0")/.."
target=thumbv7em-none-eabihf
scratch="${AUDIT_TARGET_DIR:-${TMPDIR:-/tmp}/plumb-device-audit}"

step() { printf '\n== %s\n' "$*"; }

step "no_std builds, and where alloc and std appear"
cargo build -q -p plumb-model -p plumb-firmware --target "$target" --no-default-features \
    --target-dir "$scratch"
if grep -rn "extern crate alloc\|alloc::" firmware/src; then
    echo "FAIL: alloc in the firmware crate"; exit 1
fi
if grep -rn "std::" firmware/src shared-model/src | grep -v "^\S*:\s*//"; then
    echo "FAIL: std in a no_std crate"; exit 1
fi
if ! grep -B1 "extern crate alloc" shared-model/src/lib.rs | grep -q 'cfg(feature = "alloc")'; then
    echo "FAIL: the model crate links alloc without its alloc feature"; exit 1
fi
echo "alloc only behind the model crate's alloc feature; no std:: in either crate"

step "panic lints (warnings counted, not denied)"
cargo clippy -q -p plumb-model -p plumb-firmware --lib --target "$target" --no-default-features \
    --target-dir "$scratch" -- \
    -W clippy::unwrap_used -W clippy::expect_used -W clippy::panic -W clippy::unreachable \
    -W clippy::todo -W clippy::unimplemented -W clippy::indexing_slicing 2>&1 |
    grep -E '^(warning|error)' | sort | uniq -c || echo "none"

step "call graph of the emulated board's endpoint image"
(cd firmware/boards/mps2-an386 && cargo build -q --release --target-dir "$scratch/board")
python3 scripts/device-audit.py "$scratch/board/$target/release/plumb-board-mps2"
