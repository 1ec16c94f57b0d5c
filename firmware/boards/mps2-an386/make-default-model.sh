#!/usr/bin/env bash
# Rebuilds default.plumb, the model compiled into plumb-board-mps2 when
# PLUMB_MODEL is not set: the demo scenario's model, fitted on its training
# logs and calibrated on its generated nominal set (10^6 rows in 8 logs,
# made on demand by `plumb demo`, which this runs first; the demo's own
# default is now 2 x 10^6 rows, and the built-in model stays the one the
# board figures in BENCHMARKS.md were measured with):
#
#   plumb demo --no-report --quiet --nominal-rows 1000000 --robot-rows 0
#   plumb fit demo-logs/train --holdout demo-logs/generated/calibration \
#       --out firmware/boards/mps2-an386/default.plumb --quiet
#
# Calibrated on logs of several robots and days, the model's residual chart
# is on (with one held-out log it would be off), so the end-to-end tests
# (tests/tests/qemu.rs) see the board flag through it.
set -euo pipefail
root=$(cd "$(dirname "${BASH_SOURCE[0]}")/../../.." && pwd)
cd "$root"
cargo build --release --quiet -p plumb
target/release/plumb demo --no-report --quiet --nominal-rows 1000000 --robot-rows 0
target/release/plumb fit demo-logs/train --holdout demo-logs/generated/calibration \
    --out firmware/boards/mps2-an386/default.plumb --quiet
echo "wrote firmware/boards/mps2-an386/default.plumb ($(stat -c %s firmware/boards/mps2-an386/default.plumb) bytes)"
