#!/usr/bin/env bash
# Build every board crate in release, print the image sizes, and prove the
# emulator path: boot the mps2-an386 echo program in QEMU, push binary data
# through its UART and check the echo byte for byte and the exit status; then
# boot the detector endpoint, send it two requests and the end-of-run marker,
# and check its report line. (The full end-to-end runs of the endpoint are
# cargo tests: tests/tests/qemu.rs.)
#
#   firmware/boards/check.sh [--install-deps]
#
# --install-deps (implied when CI=true) installs what is missing:
# the thumbv7em-none-eabihf Rust target, qemu-system-arm and
# binutils-arm-none-eabi (Debian packages; needs root).
#
# Exit status 0 only if every build and every emulator check passed.
set -euo pipefail

here=$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)
target=thumbv7em-none-eabihf
qemu_timeout=${PLUMB_QEMU_TIMEOUT:-60}

install_deps=0
if [[ "${1:-}" == "--install-deps" || "${CI:-}" == "true" ]]; then
    install_deps=1
fi

log() { printf '== %s\n' "$*"; }
fail() { printf 'FAIL: %s\n' "$*" >&2; exit 1; }

# ---------------------------------------------------------------- tools
missing_pkgs=()
command -v qemu-system-arm >/dev/null || missing_pkgs+=(qemu-system-arm)
command -v arm-none-eabi-size >/dev/null || missing_pkgs+=(binutils-arm-none-eabi)
if ((${#missing_pkgs[@]})); then
    if ((install_deps)); then
        log "installing ${missing_pkgs[*]}"
        apt-get update -qq
        DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends "${missing_pkgs[@]}" >/dev/null
    else
        fail "missing ${missing_pkgs[*]}: run with --install-deps or 'apt-get install ${missing_pkgs[*]}'"
    fi
fi
if ! rustup target list --installed 2>/dev/null | grep -qx "$target"; then
    if ((install_deps)); then
        log "adding Rust target $target"
        rustup target add "$target"
    else
        fail "Rust target $target missing: run with --install-deps or 'rustup target add $target'"
    fi
fi

# ---------------------------------------------------------------- builds
# Each board is its own cargo project; cargo reads a board's
# .cargo/config.toml (target, runner) only when run from inside it.
build() {
    local dir=$1 bin=$2 start=$SECONDS
    log "build $dir (release)"
    (cd "$here/$dir" && cargo build --release --manifest-path "$here/$dir/Cargo.toml" --target-dir "$here/$dir/target")
    log "built $dir in $((SECONDS - start)) s"
    elf="$here/$dir/target/$target/release/$bin"
    [[ -f "$elf" ]] || fail "no ELF at $elf"
}

build mps2-an386 plumb-board-mps2
mps2_endpoint_elf=$elf
mps2_elf="$here/mps2-an386/target/$target/release/plumb-board-mps2-echo"
[[ -f "$mps2_elf" ]] || fail "no ELF at $mps2_elf"
build blackpill-f411 plumb-board-f411
f411_elf=$elf

# The real board with signature checks too (the emulator board is built and
# run that way by tests/tests/qemu.rs); a throwaway public key is enough.
log "build blackpill-f411 (release, --features trusted-key)"
key_dir=$(mktemp -d)
printf 'plumb-ed25519-public %s\n' "$(printf 'ab%.0s' $(seq 32))" >"$key_dir/check.pub"
(cd "$here/blackpill-f411" && PLUMB_TRUSTED_KEY="$key_dir/check.pub" cargo build --release \
    --features trusted-key --target-dir "$here/blackpill-f411/target/trusted-key")
rm -rf "$key_dir"
f411_trusted_elf="$here/blackpill-f411/target/trusted-key/$target/release/plumb-board-f411"
[[ -f "$f411_trusted_elf" ]] || fail "no ELF at $f411_trusted_elf"

log "image sizes (text = flash code + rodata, data = flash + RAM, bss = RAM)"
arm-none-eabi-size "$mps2_endpoint_elf" "$mps2_elf" "$f411_elf" "$f411_trusted_elf"

# ---------------------------------------------------------------- emulator
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

# 1000 deterministic pseudo-random bytes without 0x04 (the end byte), led by
# bytes a terminal multiplexer or line discipline would eat or act on:
# Ctrl-A x, Ctrl-A c, Ctrl-A Ctrl-A, 0x00, Ctrl-C, Ctrl-Z, Ctrl-Q/S, DEL, CR,
# LF, 0xFF.
make_input() {
    local out=$1 n=$2 seed=12345 b i esc chunk=""
    printf '\001x\001c\001\001\000\003\032\021\023\177\r\n\377' >"$out"
    for ((i = $(stat -c %s "$out"); i < n; i++)); do
        seed=$(((seed * 1103515245 + 12345) & 0x7fffffff))
        b=$(((seed >> 16) & 0xff))
        ((b == 4)) && b=5
        printf -v esc '\\%03o' "$b"
        chunk+=$esc
    done
    printf '%b' "$chunk" >>"$out"
}

greeting='plumb-board-mps2 echo: send bytes, 0x04 ends'

run_echo() {
    local label=$1 icount=$2 n=1000
    local data="$work/data.bin" input="$work/input.bin" out="$work/out-$label.bin" err="$work/err-$label.txt"
    make_input "$data" "$n"
    [[ $(stat -c %s "$data") -eq $n ]] || fail "test input has wrong size"
    { cat "$data"; printf '\004'; } >"$input"

    log "QEMU echo run ($label): $n bytes + 0x04"
    local rc=0 start=$SECONDS
    PLUMB_QEMU_ICOUNT=$icount timeout "$qemu_timeout" \
        "$here/mps2-an386/run-qemu.sh" "$mps2_elf" <"$input" >"$out" 2>"$err" || rc=$?
    log "QEMU exited with status $rc after $((SECONDS - start)) s"
    if ((rc == 124)); then
        fail "QEMU timed out after ${qemu_timeout} s ($label)"
    fi
    if ((rc != 0)); then
        cat "$err" >&2
        fail "QEMU exit status $rc, expected 0 ($label)"
    fi

    # Layout: greeting line, the echoed bytes, one report line.
    local glen=$((${#greeting} + 1))
    [[ "$(head -c "$glen" "$out")" == "$greeting" ]] || fail "greeting missing ($label)"
    if ! tail -c +"$((glen + 1))" "$out" | head -c "$n" | cmp -s - "$data"; then
        tail -c +"$((glen + 1))" "$out" | head -c "$n" | cmp - "$data" || true
        fail "echo differs from input ($label)"
    fi
    local report
    report=$(tail -c +"$((glen + n + 1))" "$out")
    printf '   %s\n' "$report"
    [[ "$report" == "plumb-echo-done "*$'\n' || "$report" == "plumb-echo-done "* ]] || fail "report line missing ($label)"
    field() { sed -n "s/.* $1=\([0-9]*\).*/\1/p" <<<"$report"; }
    [[ "$(field echoed)" == "$n" ]] || fail "board reports echoed=$(field echoed), expected $n ($label)"
    [[ "$(field overruns)" == 0 ]] || fail "board reports UART overruns ($label)"
    local hwm size
    hwm=$(field stack_hwm) size=$(field stack_size)
    ((hwm > 0 && hwm < size)) || fail "implausible stack high-water mark $hwm of $size ($label)"
    if ((icount)); then
        # Deterministic time: the calibration loop must measure exactly its
        # instruction count / 40 ticks (give or take the measurement overhead).
        local got expect over
        got=$(field calib_ticks) expect=$(field calib_expect) over=$(field tick_overhead)
        ((got >= expect && got <= expect + over + 1)) ||
            fail "calibration: $got ticks, expected $expect (+$over) under -icount shift=0 ($label)"
    fi
    log "echo OK ($label): $n bytes byte-for-byte, exit status 0"
}

run_echo wallclock 0
run_echo icount 1

# The endpoint: GreetingQuery and StatusQuery frames (bytes as in
# shared-model/PROTOCOL.md, "Examples"), then 16 zero bytes, the emulator
# board's end-of-run marker.
run_endpoint() {
    local out="$work/endpoint.bin" err="$work/endpoint-err.txt" rc=0
    log "QEMU endpoint run: greeting query, status query, end marker"
    printf '\006\010\277\147\331\334\000\006\001\033\337\005\245\000' >"$work/req.bin"
    head -c 16 /dev/zero >>"$work/req.bin"
    timeout "$qemu_timeout" "$here/mps2-an386/run-qemu.sh" "$mps2_endpoint_elf" \
        <"$work/req.bin" >"$out" 2>"$err" || rc=$?
    ((rc != 124)) || fail "QEMU timed out after ${qemu_timeout} s (endpoint)"
    ((rc == 0)) || { cat "$err" >&2; fail "QEMU exit status $rc, expected 0 (endpoint)"; }
    local report
    report=$(tr -c '[:print:]\n' '.' <"$out" | grep -o 'plumb-board-mps2 done.*' || true)
    printf '   %s\n' "$report"
    [[ -n "$report" ]] || fail "endpoint report line missing"
    [[ "$report" == *" frames_ok=2 "* ]] || fail "endpoint did not take both requests"
    [[ "$report" == *" crc_errors=0 "* ]] || fail "endpoint saw CRC errors"
    log "endpoint OK: greeting, two requests answered, clean exit"
}

run_endpoint

log "all board checks passed"
