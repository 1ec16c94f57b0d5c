#!/usr/bin/env bash
# Runs every fuzz target in fuzz/ for a fixed budget, one after another, one
# job each, and prints executions per target and any crash.
#
#   scripts/fuzz.sh [SECONDS_PER_TARGET]      (default 60)
#
# Environment:
#   FUZZ_TARGETS    targets to run, space-separated (default: all six)
#   FUZZ_RUNS       stop a target after this many executions (default 10^7)
#   FUZZ_SANITIZER  cargo-fuzz sanitizer: none (default) or address
#   FUZZ_JOBS       parallel fuzzing processes per target (default 1); each
#                   runs FUZZ_RUNS / FUZZ_JOBS executions on the shared corpus
#   FUZZ_TRACE_CMP  1 (default) or 0: 0 builds without libFuzzer's comparison
#                   tracing (faster per input, less guidance past
#                   comparisons; for long runs on a grown corpus)
#
# Needs the nightly toolchain and cargo-fuzz (`cargo install cargo-fuzz`).
# New corpus entries go to fuzz/corpus-work/<target> (not committed); the
# committed seeds in fuzz/corpus/<target> are only read. Crashes land in
# fuzz/artifacts/<target>/; reproduce one with
#   cargo +nightly fuzz run -s none <target> fuzz/artifacts/<target>/crash-...
# Exit status: 0 when no target crashed, 1 otherwise.
set -uo pipefail
cd "$(dirname "$0")/.."

secs="${1:-60}"
targets="${FUZZ_TARGETS:-model_decode frame_decoder detector csv_reader array_reader endpoint}"
runs="${FUZZ_RUNS:-10000000}"
sanitizer="${FUZZ_SANITIZER:-none}"
jobs="${FUZZ_JOBS:-1}"
build_flags=()
[ "${FUZZ_TRACE_CMP:-1}" = 0 ] && build_flags+=(--no-trace-compares)

if ! cargo +nightly fuzz --version >/dev/null 2>&1; then
    echo "cargo-fuzz is missing: cargo install cargo-fuzz" >&2
    exit 2
fi

# Build once, then run the binaries: `cargo fuzz run` would rebuild whatever
# changed in the tree between two targets.
cargo +nightly fuzz build -s "$sanitizer" "${build_flags[@]}" || exit 2
host="$(rustc +nightly -vV | sed -n 's/^host: //p')"
bin="fuzz/target/$host/release"

logs="fuzz/corpus-work/logs"
mkdir -p "$logs"
summary=()
failed=0
for t in $targets; do
    mkdir -p "fuzz/corpus-work/$t" "fuzz/artifacts/$t"
    log="$logs/$t.log"
    printf '\n== %s: up to %s s or %s executions\n' "$t" "$secs" "$runs"
    start=$(date +%s)
    # Longest input: a few frames or operations are enough for the stream
    # targets, and a long input only slows every execution down.
    case "$t" in
        frame_decoder | endpoint) max_len=1024 ;;
        *) max_len=4096 ;;
    esac
    if [ "$jobs" -gt 1 ]; then
        # libFuzzer writes one fuzz-N.log per job into the working directory.
        jobdir="$logs/$t.jobs"
        rm -rf "$jobdir" && mkdir -p "$jobdir"
        root="$PWD"
        (cd "$jobdir" && "$root/$bin/$t" "$root/fuzz/corpus-work/$t" "$root/fuzz/corpus/$t" \
            -max_len="$max_len" -max_total_time="$secs" -runs=$((runs / jobs)) \
            -jobs="$jobs" -workers="$jobs" -print_final_stats=1 \
            -artifact_prefix="$root/fuzz/artifacts/$t/") >"$log" 2>&1
        status=$?
        cat "$jobdir"/fuzz-*.log >>"$log"
        execs=$(sed -n 's/^stat::number_of_executed_units: *//p' "$jobdir"/fuzz-*.log |
            awk '{ s += $1 } END { print s + 0 }')
    else
        "$bin/$t" "fuzz/corpus-work/$t" "fuzz/corpus/$t" -max_len="$max_len" \
            -max_total_time="$secs" -runs="$runs" -print_final_stats=1 \
            -artifact_prefix="fuzz/artifacts/$t/" >"$log" 2>&1
        status=$?
        execs=$(sed -n 's/^stat::number_of_executed_units: *//p' "$log" | tail -1)
    fi
    elapsed=$(( $(date +%s) - start ))
    execs="${execs:-0}"
    rate=$(( execs / (elapsed > 0 ? elapsed : 1) ))
    # Slow units (a unit over 10 s of wall clock, e.g. while the fuzzer was
    # paused) are written out too but are not failures.
    crash=$(sed -n 's/.*Test unit written to \(.*\)$/\1/p' "$log" | grep -v '/slow-unit-' | tail -1)
    if [ -z "$crash" ] && grep -q 'libFuzzer: run interrupted' "$log"; then
        # Stopped from outside (Ctrl-C, SIGINT): no finding, not the whole budget.
        summary+=("$(printf '%-14s %12s execs %7s s %8s/s  interrupted' "$t" "$execs" "$elapsed" "$rate")")
    elif [ "$status" -ne 0 ] || [ -n "$crash" ]; then
        failed=1
        grep -m1 -A4 "panicked at" "$log" || tail -20 "$log"
        summary+=("$(printf '%-14s %12s execs %7s s %8s/s  CRASH %s' "$t" "$execs" "$elapsed" "$rate" "${crash:-see $log}")")
    else
        summary+=("$(printf '%-14s %12s execs %7s s %8s/s  ok' "$t" "$execs" "$elapsed" "$rate")")
    fi
done

printf '\n== summary (sanitizer: %s, comparison tracing: %s, corpus: %s)\n' "$sanitizer" \
    "$([ ${#build_flags[@]} -eq 0 ] && echo on || echo off)" "fuzz/corpus-work"
printf '%s\n' "${summary[@]}"
exit "$failed"
