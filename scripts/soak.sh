#!/usr/bin/env bash
# Faults on the link, long version (not in CI): streams samples of the demo
# drift logs through the emulated board (QEMU, mps2-an386) over a link that
# drops, flips, duplicates and inserts bytes in both directions and is
# "unplugged" mid-frame now and then (cuts lose the bytes, pauses hold them
# back), and records for each run one line of figures:
#
#   accepted_corrupt_host   frames the host accepted that the board never sent (goal 0)
#   report_mismatches       board reports that differ from the host detector on the exact
#                           sample sequence: a damaged message taken by the board (goal 0)
#   board_undecodable       board frames whose CRC passed but which did not decode (goal 0)
#   events_lost             drift raised/cleared and fault events never received, after
#                           resends (goal 0)
#   recovery_*_ms           per unplug, median/max ms from the replug to the first frame
#                           the host accepted and to the first sample the board took
#   storm_recovery_ms       after a storm (PLUMB_SOAK_STORM_S), ms to the first frame
#
# The emulated UART moves about 20 kB/s and a 24-feature sample frame is
# about 104 bytes, so the sample counts are scaled to finish in minutes; the
# count is in each line. The test itself is `soak_faults_on_the_link` in
# tests/tests/qemu.rs (ignored in CI; a 1 % run of 200 samples,
# `one_percent_faults_and_unplugs_lose_no_event`, runs in CI).
#
#   scripts/soak.sh [SAMPLES]     default 2000 per run
#
# Environment: PLUMB_SOAK_OUT (result file, default target/soak/soak-DATE.txt),
# PLUMB_SOAK_SEED, PLUMB_SOAK_WINDOW (samples in flight, default 1: each
# sample carries its index, so the board takes each once and in order
# whatever the window; with more in flight a lost frame sends the whole
# window again, and at 1 % one in flight is twice as fast, RELIABILITY.md),
# PLUMB_SOAK_TARGET (qemu, the default, or process: the firmware's endpoint
# run in the test process instead of the emulated board, the same code
# without the UART, for many more samples per hour).
set -euo pipefail
cd "$(dirname "$0")/.."

n=${1:-2000}
export PLUMB_SOAK_WINDOW=${PLUMB_SOAK_WINDOW:-1}
mkdir -p target/soak
out=${PLUMB_SOAK_OUT:-target/soak/soak-$(date +%Y%m%d-%H%M%S).txt}
export PLUMB_SOAK_OUT=$out

# Build once, then run the test binary itself (edits made meanwhile do not
# rebuild it between runs).
bin=$(cargo test --release -p plumb-checks --test qemu --no-run 2>&1 |
    sed -n 's/.*Executable tests\/qemu.rs (\(.*\))/\1/p' | tail -1)
[[ -x "$bin" ]] || { echo "soak: no test binary" >&2; exit 2; }

status=0
run() {
    printf '\n== %s\n' "$*"
    env "$@" "$bin" soak_faults_on_the_link --ignored --nocapture --test-threads 1 || status=1
}

# A clean link, for the throughput the faults are measured against.
run PLUMB_SOAK_RATE=0 PLUMB_SOAK_CUT_EVERY_S=0 PLUMB_SOAK_SAMPLES="$n"
# 1 % of the bytes damaged, an unplug every 10 s on average (0.1-2 s long).
run PLUMB_SOAK_RATE=0.01 PLUMB_SOAK_CUT_EVERY_S=10 PLUMB_SOAK_SAMPLES="$n"
# 10 %: a 60 s storm with unplugs, then a clean link (almost no 104-byte
# frame survives 10 %: the run measures what gets through, that nothing
# damaged is taken, and the recovery after the storm).
run PLUMB_SOAK_RATE=0.1 PLUMB_SOAK_STORM_S=60 PLUMB_SOAK_CUT_EVERY_S=10 \
    PLUMB_SOAK_SAMPLES="$n"

printf '\nresults (one line per run) in %s\n' "$out"
cat "$out"
exit $status
