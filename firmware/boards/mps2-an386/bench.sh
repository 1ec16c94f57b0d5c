#!/usr/bin/env bash
# Figures for BENCHMARKS.md ("On the emulated Cortex-M4F"): instructions per
# sample on the emulated Cortex-M4F, image sizes, and the stack high-water
# mark of the real endpoint. Figures, not tests: nothing here fails on a
# number.
#
#   firmware/boards/mps2-an386/bench.sh
#
# 1. plumb-board-mps2-bench under QEMU with -icount shift=0,align=off,sleep=off
#    (1 instruction = 1 ns of virtual time; SysTick at 25 MHz: 1 tick = 40
#    instructions), for synthetic models (d, m, k) = (32, 8, 4), (64, 16, 8)
#    and the built-in model; deterministic, whatever the host.
# 2. arm-none-eabi-size of the endpoint image (text = flash, bss = RAM), and
#    the endpoint's code: text minus the built-in model file.
# 3. Stack high-water mark by painting, with the real endpoint running:
#    `plumb feed` of a drift log, and `plumb upload` of a model (the upload is
#    decoded over the running model in the one detector place, then switched
#    to).
set -euo pipefail
here=$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)
root=$(cd "$here/../../.." && pwd)
elf_dir="$here/target/thumbv7em-none-eabihf/release"

(cd "$here" && cargo build --release --quiet)
(cd "$root" && cargo build --release --quiet -p plumb --bin plumb)
plumb="$root/target/release/plumb"

echo "== instructions per sample (QEMU -icount shift=0; 1 tick = 40 instructions)"
out=$(PLUMB_QEMU_ICOUNT=1 timeout 300 "$here/run-qemu.sh" "$elf_dir/plumb-board-mps2-bench" </dev/null)
echo "$out"
echo
echo "| model | d | m | k | whitened | slow charts | multiply-adds 2dm+3km (whitened: + d²) | instructions per update | per multiply-add | instructions per scoring alone | per multiply-add |"
echo "|---|---|---|---|---|---|---|---|---|---|---|"
grep '^bench model=' <<<"$out" | while read -r line; do
    f() { sed -n "s/.* $1=\([0-9]*\).*/\1/p" <<<"$line"; }
    name=$(sed -n 's/^bench model=\([a-z]*\).*/\1/p' <<<"$line")
    macs=$(f macs) up=$(f update_instructions_per_sample) sc=$(f score_instructions_per_sample)
    printf '| %s | %s | %s | %s | %s | %s | %s | %s | %s | %s | %s |\n' "$name" "$(f d)" "$(f m)" "$(f k)" "$(f whitened)" "$(f slow)" "$macs" \
        "$up" "$(awk -v a="$up" -v b="$macs" 'BEGIN{printf "%.1f", a/b}')" \
        "$sc" "$(awk -v a="$sc" -v b="$macs" 'BEGIN{printf "%.1f", a/b}')"
done

echo
echo "== image sizes (text = flash, bss = RAM; data = 0)"
arm-none-eabi-size "$elf_dir/plumb-board-mps2" "$elf_dir/plumb-board-mps2-echo" "$elf_dir/plumb-board-mps2-bench"
# The endpoint's text includes the built-in model file (include_bytes! in
# .rodata): data, not code. The file is $PLUMB_MODEL when set (relative to
# this folder, as in build.rs), else default.plumb.
builtin=${PLUMB_MODEL:-default.plumb}
[[ $builtin == /* ]] || builtin="$here/$builtin"
text=$(arm-none-eabi-size "$elf_dir/plumb-board-mps2" | awk 'NR == 2 { print $1 }')
model_bytes=$(stat -c %s "$builtin")
echo "endpoint code (text minus the built-in model of $model_bytes bytes): $((text - model_bytes)) bytes (goal: at most 24,576)"

echo
echo "== stack high-water mark with the real endpoint (painting)"
exec_cmd="$here/run-qemu.sh $elf_dir/plumb-board-mps2"
model="$here/default.plumb"
feed=$("$plumb" feed "$model" "$root/demo-logs/drift/bearing_wear.csv" --rows 2500..4000 --exec "$exec_cmd" | grep '^text line=' || true)
echo "feed 1500 samples: $feed"
upload=$("$plumb" upload "$model" --verbose --exec "$exec_cmd" | grep '^text line=' || true)
echo "upload + switch:   $upload"
