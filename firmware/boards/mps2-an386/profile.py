#!/usr/bin/env python3
"""Where the instructions of a detector update go, on the emulated Cortex-M4F.

Runs the bench program (`plumb-board-mps2-bench`, see bench.sh) under QEMU with
`-d in_asm,exec,nochain`: QEMU logs each translated block's instructions once
and every execution of a block, so instructions per function are exact
(blocks × their length), not sampled. The log is read as a stream (several
gigabytes would not fit on disk) and cut into one part per model at each entry
of `Detector::reset` (once per model load).

For each model: per function, the instructions executed, the entries (calls:
executions of the function's first block) and instructions per entry; and
instructions per update (all detector work divided by the number of updates
and scorings the bench runs: 256 + SAMPLES updates and SAMPLES scorings).

With `--feed ROWS` it profiles the endpoint program instead, fed those rows of
demo-logs/drift/bearing_wear.csv by `plumb feed` (score reports on), and gives
instructions per sample of everything the board does from the feed's reset on:
frame decoding, the detector, encoding and CRC of the answers, the UART.

usage (from firmware/boards/mps2-an386, after `cargo build --release` here and
`cargo build --release -p plumb` at the root):
  python3 profile.py [ELF]                   (about 15 s)
  python3 profile.py --feed 2500..3000 [ELF] (about a minute)
Needs qemu-system-arm, arm-none-eabi-nm and c++filt.
"""
import argparse
import collections
import os
import re
import subprocess
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))
ELF = os.path.join(HERE, "target", "thumbv7em-none-eabihf", "release", "plumb-board-mps2-bench")
SAMPLES = 2000  # src/bin/bench.rs
WARMUP = 256
# Functions of the bench program itself (sample generation, timing, output):
# not detector work.
HARNESS = re.compile(r"plumb_board_mps2_bench|write_dec|Ticks|stack..paint|"
                     r"__cortex_m_rt_main|core..iter|Reset|__pre_init|DefaultHandler|SysTick")


def demangle(names):
    p = subprocess.run(["c++filt"], input="\n".join(names), capture_output=True, text=True)
    out = p.stdout.split("\n") if p.returncode == 0 else names
    return {n: re.sub(r"::h[0-9a-f]{16}$", "", d) for n, d in zip(names, out)}


# Library routines (memory moves, integer and float helpers, libm): their
# instructions are shown per calling function, the last other function whose
# code ran before them.
LIBRARY = re.compile(r"^(__aeabi_|_ZN17compiler_builtins|_RNvNtCs[0-9A-Za-z]+_17compiler_builtins|"
                     r"memcpy|memset|memmove|memcmp)")


def read_log(stream, split_pc):
    """Block lengths, block symbols and block executions from a QEMU
    `in_asm,exec,nochain` log. Executions are counted per (block, caller):
    the caller is None except for blocks of a library routine, where it is
    the last function outside the routines that ran. The executions are cut
    into a new part at each execution of `split_pc`."""
    tb_len, tb_sym = {}, {}
    cur, sym = None, None
    parts = []
    execs = collections.Counter()
    caller = None
    for line in stream:
        c = line[0]
        if c == "T":  # "Trace 0: 0x... [cs_base/pc/flags/cflags] symbol"
            pc = int(line.split("[", 1)[1].split("/", 2)[1], 16)
            if pc == split_pc:
                execs = collections.Counter()
                parts.append(execs)
            own = tb_sym.get(pc) or ""
            if LIBRARY.search(own):
                execs[(pc, caller)] += 1
            else:
                caller = own
                execs[(pc, None)] += 1
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
    return parts, tb_len, tb_sym


def entries(elf):
    """Function entry addresses (thumb bit cleared) → symbol."""
    nm = subprocess.run(["arm-none-eabi-nm", elf], capture_output=True, text=True, check=True)
    out = {}
    for line in nm.stdout.splitlines():
        parts = line.split()
        if len(parts) == 3 and parts[1] in "tT":
            out[int(parts[0], 16) & ~1] = parts[2]
    return out


def table(ex, tb_len, tb_sym, entry, names, per, skip=None):
    """Per function: instructions, share, entries and instructions per entry;
    returns the total. `per` divides the instructions for the last column
    but one; functions matching `skip` are left out."""
    per_fn = collections.Counter()
    calls = collections.Counter()
    for (pc, caller), n in ex.items():
        f = names.get(tb_sym.get(pc), tb_sym.get(pc) or "?")
        if caller is not None:
            f = f"{f}` from `{names.get(caller, caller)}"
        per_fn[f] += n * tb_len.get(pc, 0)
        if pc in entry:
            calls[f] += n
    work = {f: v for f, v in per_fn.items() if not (skip and skip.search(f.split("` from `")[-1]))}
    total = sum(work.values())
    print(f"| function | instructions | share | {per[0]} | entries | per entry |")
    print("|---|---|---|---|---|---|")
    for f, v in sorted(work.items(), key=lambda kv: -kv[1]):
        if v < total * 0.005:
            continue
        e = calls.get(f, 0)
        pe = f"{v / e:.0f}" if e else "-"
        print(f"| `{f}` | {v} | {100 * v / total:.1f} % | {v / per[1]:.0f} | {e} | {pe} |")
    return total


def split_pc(entry, pattern):
    found = [a for a, n in entry.items() if pattern in n]
    if len(found) != 1:
        sys.exit(f"{pattern} not found once in the ELF")
    return found[0]


def bench(elf):
    entry = entries(elf)
    qemu = subprocess.Popen(
        ["qemu-system-arm", "-machine", "mps2-an386", "-display", "none", "-monitor", "none",
         "-serial", "null", "-semihosting-config", "enable=on,target=native",
         "-d", "in_asm,exec,nochain", "-D", "/dev/stdout", "-kernel", elf],
        stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, errors="replace",
        bufsize=1 << 20)
    # One part per model: Detector::reset runs once per model load.
    parts, tb_len, tb_sym = read_log(qemu.stdout, split_pc(entry, "8Detector5reset"))
    qemu.wait()
    names = demangle(sorted({s for s in tb_sym.values() if s}))
    # In the order bench.rs loads them.
    models = ["synthetic (32, 8, 4)", "synthetic (64, 16, 8)",
              "synthetic (32, 8, 4), whitened", "synthetic (64, 16, 8), whitened",
              "synthetic (32, 8, 4), whitened, 8 slow charts",
              "synthetic (64, 16, 8), whitened, 16 slow charts", "built-in (24, 6, 8)"]
    calls = WARMUP + 2 * SAMPLES
    for name, ex in zip(models, parts):
        print(f"\n## {name}: {WARMUP + SAMPLES} updates and {SAMPLES} scorings\n")
        total = table(ex, tb_len, tb_sym, entry, names, ("per call", calls), HARNESS)
        print(f"\ndetector instructions {total}, per call of update or score "
              f"{total / calls:.0f}")


def feed(elf, rows):
    """The endpoint program fed rows of a drift log by `plumb feed` (score
    reports on): everything it executes from the feed's reset on."""
    root = os.path.dirname(os.path.dirname(os.path.dirname(HERE)))
    plumb = os.path.join(root, "target", "release", "plumb")
    entry = entries(elf)
    with tempfile.TemporaryDirectory() as tmp:
        fifo = os.path.join(tmp, "log")
        os.mkfifo(fifo)
        cmd = f"{HERE}/run-qemu.sh {elf} -d in_asm,exec,nochain -D {fifo}"
        run = subprocess.Popen(
            [plumb, "feed", os.path.join(HERE, "default.plumb"),
             os.path.join(root, "demo-logs", "drift", "bearing_wear.csv"),
             "--rows", rows, "--exec", cmd], stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
            text=True)
        with open(fifo, errors="replace") as log:
            # Cut at each statistics reset: the last one is the feed's own,
            # just before its first sample.
            parts, tb_len, tb_sym = read_log(log, split_pc(entry, "8Detector5reset"))
        out = run.communicate()[0]
    m = re.search(r"samples=(\d+)", out)
    if not m or not parts:
        sys.exit("the endpoint run did not finish: " + out[-500:])
    n = int(m.group(1))
    names = demangle(sorted({s for s in tb_sym.values() if s}))
    print(f"## endpoint, `plumb feed` of {n} samples (rows {rows} of bearing_wear.csv)\n")
    total = table(parts[-1], tb_len, tb_sym, entry, names, ("per sample", n))
    print(f"\nall instructions from the reset on {total}, per sample {total / n:.0f}")


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--feed", metavar="ROWS",
                    help="profile the endpoint program fed these rows instead of the bench")
    ap.add_argument("elf", nargs="?", help="the program (default: bench or endpoint of this board)")
    args = ap.parse_args()
    release = os.path.join(HERE, "target", "thumbv7em-none-eabihf", "release")
    if args.feed:
        feed(args.elf or os.path.join(release, "plumb-board-mps2"), args.feed)
    else:
        bench(args.elf or ELF)


if __name__ == "__main__":
    main()
