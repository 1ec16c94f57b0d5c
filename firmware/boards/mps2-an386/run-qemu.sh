#!/usr/bin/env bash
# Boot a plumb-board-mps2 ELF in QEMU (mps2-an386, Cortex-M4F).
#
#   run-qemu.sh ELF [extra qemu args...]
#
# UART0 is connected to this script's stdin/stdout (raw bytes, no escape
# character, no terminal processing when stdin/stdout are pipes or files).
# The firmware ends the run through semihosting; QEMU's exit status is the
# firmware's (0 success, 1 failure).
#
# Environment:
#   PLUMB_QEMU_ICOUNT=1   deterministic time: 1 instruction = 1 ns of virtual
#                         time (-icount shift=0,align=off,sleep=off), so one
#                         SysTick tick = 40 instructions.
#   PLUMB_QEMU_SERIAL=... chardev spec for UART0 instead of "stdio", e.g.
#                         "tcp:127.0.0.1:4555,server=on,wait=on".
#   QEMU=...              QEMU binary (default qemu-system-arm).
set -euo pipefail

if [[ $# -lt 1 ]]; then
    echo "usage: $0 ELF [extra qemu args...]" >&2
    exit 2
fi
elf=$1
shift

args=(
    -machine mps2-an386
    -display none
    -monitor none
    -serial "${PLUMB_QEMU_SERIAL:-stdio}"
    -semihosting-config enable=on,target=native
)
if [[ "${PLUMB_QEMU_ICOUNT:-0}" == 1 ]]; then
    args+=(-icount shift=0,align=off,sleep=off)
fi

exec "${QEMU:-qemu-system-arm}" "${args[@]}" "$@" -kernel "$elf"
