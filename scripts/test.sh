#!/usr/bin/env bash
# The whole test suite, as CI runs it. Installs what it needs first
# (scripts/setup.sh), then: formatting, lints, API docs, host tests (with the scikit-learn
# and published-table cross-checks), the no_std crates built alone for the
# Cortex-M4F target, the boards built and run under QEMU, and the detector's
# scores with the fast-math feature.
set -euo pipefail
cd "$(dirname "$0")/.."
scripts/setup.sh

export PLUMB_PYTHON="$PWD/.venv/bin/python"
step() { printf '\n== %s\n' "$*"; }

step "format"
cargo fmt --all -- --check

step "lints"
cargo clippy --workspace --all-targets --locked -- -D warnings

step "API documentation (every intra-doc link resolves)"
RUSTDOCFLAGS="-D warnings" cargo doc --workspace --no-deps --locked

step "no_std crates alone for thumbv7em-none-eabihf (default features off)"
cargo build --locked -p plumb-model --target thumbv7em-none-eabihf --no-default-features
cargo build --locked -p plumb-firmware --target thumbv7em-none-eabihf --no-default-features
cargo build --locked -p plumb-firmware --target thumbv7em-none-eabihf --features defmt,fast-math

step "boards: build, size, run under QEMU"
bash firmware/boards/check.sh

step "host tests, cross-checks and end-to-end runs"
cargo test --workspace --locked --release

step "detector scores with fast-math (NLL within its documented bound)"
cargo test --locked --release -p plumb-firmware --features fast-math --test fast_math
