#!/usr/bin/env bash
# Rebuilds default.plumb, the model compiled into plumb-board-mps2 when
# PLUMB_MODEL is not set, by fitting the demo scenario's training logs:
#
#   plumb fit demo-logs/train --out firmware/boards/mps2-an386/default.plumb --quiet
#
# The fit is deterministic (same logs and options, same bytes), so running
# this again changes the file only when the fit or the logs changed. The
# end-to-end tests (tests/tests/qemu.rs) use this model.
set -euo pipefail
root=$(cd "$(dirname "${BASH_SOURCE[0]}")/../../.." && pwd)
cd "$root"
cargo run --release --quiet -p plumb -- \
    fit demo-logs/train --out firmware/boards/mps2-an386/default.plumb --quiet
echo "wrote firmware/boards/mps2-an386/default.plumb ($(stat -c %s firmware/boards/mps2-an386/default.plumb) bytes)"
