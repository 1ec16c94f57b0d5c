#!/usr/bin/env python3
"""Where the instructions of a detector update go, on the emulated Cortex-M4F.

Runs the bench program (`plumb-board-mps2-bench`, see bench.sh) under QEMU with
`-d in_asm,exec,nochain`: QEMU logs each translated block's instructions once
and every execution of a block, so instructions per function are exact
(blocks × their length), not sampled. The log is read as a stream (several
gigabytes would not fit on disk) and cut into one part per model at each entry
of `Detector::check` (once per model load).

For each model: per function, the instructions executed, the entries (calls:
executions of the function's first block) and instructions per entry; and
instructions per update (all detector work divided by the number of updates
and scorings the bench runs: 256 + SAMPLES updates and SAMPLES scorings).

usage (from firmware/boards/mps2-an386, after `cargo build --release`):
  python3 profile.py [ELF]   (about 3 minutes; needs qemu-system-arm and arm-none-eabi-nm)
"""
import collections
import os
import re
import subprocess
import sys

HERE = os.path.dirname(os.path.abspath(__file__))
ELF = os.path.join(HERE, "target", "thumbv7em-none-eabihf", "release", "plumb-board-mps2-bench")
SAMPLES = 2000  # src/bin/bench.rs
WARMUP = 256
# Functions of the bench program itself (sample generation, timing, output):
# not detector work.
HARNESS = re.compile(r"plumb_board_mps2_bench|__aeabi_ul2f|write_dec|Ticks|stack..paint|"
                     r"__cortex_m_rt_main|core..iter|Reset|__pre_init|DefaultHandler|SysTick")


def demangle(names):
    p = subprocess.run(["c++filt"], input="\n".join(names), capture_output=True, text=True)
    out = p.stdout.split("\n") if p.returncode == 0 else names
    return {n: re.sub(r"::h[0-9a-f]{16}$", "", d) for n, d in zip(names, out)}


def main():
    elf = sys.argv[1] if len(sys.argv) > 1 else ELF
    # Function entry addresses (thumb bit cleared).
    nm = subprocess.run(["arm-none-eabi-nm", elf], capture_output=True, text=True, check=True)
    entry = {}
    for line in nm.stdout.splitlines():
        parts = line.split()
        if len(parts) == 3 and parts[1] in "tT":
            entry[int(parts[0], 16) & ~1] = parts[2]
    check = [a for a, n in entry.items() if "8Detector5check" in n]
    if len(check) != 1:
        sys.exit("Detector::check not found in the ELF")
    check = check[0]

    qemu = subprocess.Popen(
        ["qemu-system-arm", "-machine", "mps2-an386", "-display", "none", "-monitor", "none",
         "-serial", "null", "-semihosting-config", "enable=on,target=native",
         "-d", "in_asm,exec,nochain", "-D", "/dev/stdout", "-kernel", elf],
        stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, errors="replace",
        bufsize=1 << 20)
    tb_len, tb_sym = {}, {}
    cur, sym = None, None
    parts = []  # one Counter of block executions per model
    execs = collections.Counter()
    for line in qemu.stdout:
        c = line[0]
        if c == "T":  # "Trace 0: 0x... [cs_base/pc/flags/cflags] symbol"
            pc = int(line.split("[", 1)[1].split("/", 2)[1], 16)
            if pc == check:
                execs = collections.Counter()
                parts.append(execs)
            execs[pc] += 1
            cur = None
        elif c == "0":  # "0x000013b4:  f000 fef0  bl ..." inside an IN: block
            pc = int(line[2:10], 16)
            if cur is None:
                cur = pc
                tb_sym[pc] = sym
                tb_len[pc] = 0
            tb_len[cur] += 1
        elif c == "I" and line.startswith("IN:"):
            sym = line[3:].strip()
            cur = None
    qemu.wait()

    names = demangle(sorted({s for s in tb_sym.values() if s}))
    models = ["synthetic (32, 8, 4)", "synthetic (64, 16, 8)", "built-in (24, 6, 8)"]
    for name, ex in zip(models, parts):
        per_fn = collections.Counter()
        calls = collections.Counter()
        for pc, n in ex.items():
            f = names.get(tb_sym.get(pc), tb_sym.get(pc) or "?")
            per_fn[f] += n * tb_len.get(pc, 0)
            if pc in entry:
                calls[f] += n
        work = {f: v for f, v in per_fn.items() if not HARNESS.search(f)}
        total = sum(work.values())
        print(f"\n## {name}: {WARMUP + SAMPLES} updates and {SAMPLES} scorings")
        print(f"detector instructions {total}, per call of update or score "
              f"{total / (WARMUP + 2 * SAMPLES):.0f}\n")
        print("| function | instructions | share | entries | per entry |")
        print("|---|---|---|---|---|")
        for f, v in sorted(work.items(), key=lambda kv: -kv[1]):
            if v < total * 0.002:
                continue
            e = calls.get(f, 0)
            per = f"{v / e:.0f}" if e else "-"
            print(f"| `{f}` | {v} | {100 * v / total:.1f} % | {e} | {per} |")


if __name__ == "__main__":
    main()
