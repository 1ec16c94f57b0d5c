#!/usr/bin/env bash
# Faults on the link, many samples: several emulated boards side by side, each
# running the soak test (`soak_faults_on_the_link`, see scripts/soak.sh) in
# segments of SAMPLES samples with a seed of its own per segment, until no
# time is left for another segment; one result line per segment, then the
# totals. At 1 % a board spends most of its time asleep waiting for bytes
# (a sample costs about 0.1 s of wall-clock time and 0.01–0.02 s of CPU), so
# boards side by side multiply the samples per hour on a small machine.
# Each segment boots a fresh board; the totals are sums over segments.
#
#   scripts/soak-parallel.sh BOARDS SAMPLES SECONDS
#
#   BOARDS    emulated boards at once (default 4)
#   SAMPLES   samples per segment (default 7500: the soak's rows of all five
#             drift logs once, with their events)
#   SECONDS   start no segment that would not end within this many seconds
#             of the start, at 0.15 s per sample (default 3600)
#
# Environment: PLUMB_SOAK_RATE (0.01), PLUMB_SOAK_CUT_EVERY_S (10),
# PLUMB_SOAK_WINDOW (1), PLUMB_SOAK_TARGET (qemu), PLUMB_SOAK_OUT (result
# file, default target/soak/parallel-DATE.txt), PLUMB_SOAK_SEED (first seed,
# default 1000; board b's segment s uses SEED + 1000 b + s).
set -euo pipefail
cd "$(dirname "$0")/.."

boards=${1:-4}
n=${2:-7500}
secs=${3:-3600}
export PLUMB_SOAK_RATE=${PLUMB_SOAK_RATE:-0.01}
export PLUMB_SOAK_CUT_EVERY_S=${PLUMB_SOAK_CUT_EVERY_S:-10}
export PLUMB_SOAK_WINDOW=${PLUMB_SOAK_WINDOW:-1}
export PLUMB_SOAK_SAMPLES=$n
seed0=${PLUMB_SOAK_SEED:-1000}
mkdir -p target/soak
out=${PLUMB_SOAK_OUT:-target/soak/parallel-$(date +%Y%m%d-%H%M%S).txt}
logs="${out%.txt}.logs"
mkdir -p "$logs"

bin=$(cargo test --release -p plumb-checks --test qemu --no-run 2>&1 |
    sed -n 's/.*Executable tests\/qemu.rs (\(.*\))/\1/p' | tail -1)
[[ -x "$bin" ]] || { echo "soak: no test binary" >&2; exit 2; }

start=$(date +%s)
segment_s=$(awk -v n="$n" 'BEGIN { printf "%d", n * 0.15 + 0.5 }')
echo "soak: $boards boards, segments of $n samples (budget ${segment_s} s each), for ${secs} s; lines in $out"

board() {
    local b=$1 s=0 status=0
    while (( $(date +%s) + segment_s <= start + secs )); do
        local seed=$((seed0 + 1000 * b + s))
        if ! PLUMB_SOAK_SEED=$seed PLUMB_SOAK_OUT="$logs/board$b.txt" "$bin" soak_faults_on_the_link --ignored --nocapture \
            --test-threads 1 >"$logs/board$b-seg$s.log" 2>&1; then
            echo "soak: board $b segment $s (seed $seed) FAILED: $logs/board$b-seg$s.log" >&2
            status=1
        fi
        s=$((s + 1))
    done
    return $status
}

status=0
pids=()
for ((b = 0; b < boards; b++)); do
    board "$b" &
    pids+=($!)
done
for p in "${pids[@]}"; do
    wait "$p" || status=1
done
# One file per board while they run (lines from several processes could
# interleave in one), gathered here.
cat "$logs"/board*.txt >>"$out" 2>/dev/null || true

echo
echo "totals over $(grep -c . "$out" 2>/dev/null || echo 0) segments in $out:"
awk '
    {
        for (i = 1; i <= NF; i++) {
            split($i, kv, "=")
            v[kv[1]] = kv[2]
        }
        samples += v["board_samples"]; want += v["samples"]; secs += v["seconds"]
        corrupt += v["accepted_corrupt_host"]; mism += v["report_mismatches"]
        undec += v["board_undecodable"]; ev += v["events_expected"]; lost += v["events_lost"]
        rec += v["events_recovered"]; cuts += v["cuts"]; resent += v["resent"]
    }
    END {
        printf "samples taken %d of %d, accepted corrupt %d, report mismatches %d, undecodable %d\n", samples, want, corrupt, mism, undec
        printf "events lost %d of %d (%d via resends), unplugs %d, samples resent %d, board-seconds %.0f\n", lost, ev, rec, cuts, resent, secs
    }' "$out"
exit $status
