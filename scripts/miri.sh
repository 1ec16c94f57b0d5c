#!/usr/bin/env bash
# Optional (not in CI): the no_std crates' tests under Miri, the interpreter
# that checks for undefined behaviour (our crates forbid `unsafe`; Miri
# checks the unsafe code of the dependencies they drive: heapless, postcard,
# crc, serde, libm).
#
#   scripts/miri.sh [EXTRA_TEST_ARGS...]
#
# Needs the nightly toolchain with Miri: rustup +nightly component add miri.
# Isolation is off because proptest looks up the working directory for its
# failure files. Property tests with the default configuration run 8 cases
# (PROPTEST_CASES); the tests skipped below are slow under the interpreter
# (hours for the simulations; the chart recursion and power-cut tests were
# stopped unfinished after 7 and 8 minutes): long simulations, exhaustive
# loops and property tests with many fixed cases. The fuzz targets cover most
# of these properties natively, and CI runs every one of them (RELIABILITY.md).
set -euo pipefail
cd "$(dirname "$0")/.."

slow=(
    # firmware/tests/detector.rs: thousands of samples through models up to
    # (64, 16, 8) against an f64 reference; 3,400 samples through the states;
    # run-length simulations (thousands of runs)
    f32_scores_match_f64_reference
    states_prime_raise_hold_and_clear_once
    cusum_run_lengths_match_lucas_crosier
    one_sided_cusum_matches_brook_evans
    ewma_run_lengths_match_lucas_saccucci
    # firmware/tests/detector.rs: a 1500-case property (the detector fuzz
    # target checks the same natively), and the residual and slow charts
    # against an f64 recursion through three model sizes, twice each
    any_input_never_panics_and_faults_leave_stats
    residual_chart_is_an_ewma_of_each_scaled_residual
    # firmware/tests/fast_math.rs: 200 001 to 400 001 points each
    micromath_error_against_libm_is_as_documented
    cube_root_within_two_ulp_of_libm
    # shared-model/tests/wire.rs: exhaustive loops, 512-case properties
    every_input_up_to_two_bytes
    every_three_byte_input_over_edge_values
    every_single_bit_flip_is_rejected
    any_bytes_any_chunking_never_panic_and_agree
    a_frame_inside_garbage_is_recovered
    any_two_bit_flips_are_rejected
    # shared-model/tests/format.rs: 2000-case properties
    arbitrary_bytes_never_panic
    mutated_payload_with_fixed_crc_gives_model_or_error
    arbitrary_payloads_decode_alike_in_place
    # firmware/tests/endpoint.rs: every bit flip of every frame, 256-case
    # properties, and a power cut at each of 343 steps of an upload, each
    # followed by a boot
    power_cut_at_every_step_of_an_upload_boots_a_whole_model
    no_single_bit_flip_is_accepted
    garbage_is_never_accepted
    requests_inside_garbage_are_handled
)
skip=()
for t in "${slow[@]}"; do skip+=(--skip "$t"); done

export MIRIFLAGS="${MIRIFLAGS:--Zmiri-disable-isolation}"
export PROPTEST_CASES="${PROPTEST_CASES:-8}"
# One crate at a time, the model crate first: its results come sooner.
status=0
for p in plumb-model plumb-firmware; do
    cargo +nightly miri test --no-fail-fast -p "$p" -- "${skip[@]}" "$@" || status=1
done
exit "$status"
