#!/usr/bin/env python3
"""Call-graph audit of a Cortex-M ELF: recursion and reachable panic sites.

    scripts/device-audit.py ELF [ROOT_SUBSTRING ...]

Disassembles ELF with arm-none-eabi-objdump (or llvm-objdump), builds the
graph of direct calls (`bl`, and `b`/`b.w` into another function: tail
calls), and prints

* every cycle (a strongly connected component of more than one function,
  or a function that calls itself with `bl`): recursion;
* indirect calls (`blx rN`, `bx rN`) in reachable functions, which the graph
  cannot follow;
* allocator symbols (`__rust_alloc` and kin): a `no_std` image without
  `alloc` has none;
* the functions reachable from the roots (default: every handler in the
  vector table: reset, exceptions, interrupts) that
  call a panic entry point of core, with the path that reaches each.

Exit status 1 when a cycle is reachable from a root or an allocator symbol
is present, else 0. Standard library only.
"""
import bisect
import re
import shutil
import subprocess
import sys
from collections import defaultdict, deque

PANIC = re.compile(
    r"core::panicking::|core::slice::index::|core::result::unwrap_failed|"
    r"core::option::(unwrap|expect)_failed|core::cell::panic_already|rust_begin_unwind"
)

ALLOC = re.compile(r"__rust_alloc|__rust_dealloc|__rust_realloc|__rg_alloc|alloc::alloc::|handle_alloc_error")


def objdump():
    tool = shutil.which("arm-none-eabi-objdump") or shutil.which("llvm-objdump")
    if tool is None:
        sys.exit("needs arm-none-eabi-objdump (binutils-arm-none-eabi) or llvm-objdump")
    return tool


def disassemble(elf):
    out = subprocess.run([objdump(), "-d", "-C", "--no-show-raw-insn", elf],
                         check=True, capture_output=True, text=True).stdout
    return out.splitlines()


def vector_table(elf):
    """Handler addresses in `.vector_table` (Thumb: odd words, bit 0 cleared)."""
    out = subprocess.run([objdump(), "-s", "-j", ".vector_table", elf],
                         capture_output=True, text=True).stdout
    words = []
    for line in out.splitlines():
        parts = line.split()
        if len(parts) >= 2 and re.fullmatch(r"[0-9a-f]+", parts[0]):
            for w in parts[1:5]:
                if re.fullmatch(r"[0-9a-f]{8}", w):
                    words.append(int.from_bytes(bytes.fromhex(w), "little"))
    return {w & ~1 for w in words[1:] if w & 1}


def graph(lines):
    """Nodes are function addresses (demangled names of two instances of one
    generic function are equal); `names` maps them back."""
    head = re.compile(r"^([0-9a-f]+) <(.+)>:$")
    call = re.compile(r"\s(bl|blx|b|b\.w|b\.n)\s+([0-9a-f]+) <")
    indirect = re.compile(r"\s(blx|bx)\s+r\d+")
    names = {}
    for line in lines:
        m = head.match(line)
        if m:
            names[int(m.group(1), 16)] = m.group(2)
    starts = sorted(names)

    def owner(addr):
        i = bisect.bisect_right(starts, addr) - 1
        return starts[i] if i >= 0 else None

    edges = defaultdict(set)
    self_calls = set()
    indirect_calls = defaultdict(int)
    cur = None
    for line in lines:
        m = head.match(line)
        if m:
            cur = int(m.group(1), 16)
            continue
        if cur is None:
            continue
        c = call.search(line)
        if c:
            op, addr = c.group(1), int(c.group(2), 16)
            if op in ("bl", "blx"):
                if addr == cur:
                    self_calls.add(cur)  # a call to its own entry
                elif owner(addr) != cur:
                    edges[cur].add(owner(addr))
            elif addr in names and addr != cur:
                edges[cur].add(addr)  # a tail call
            # any other branch stays inside the function
        elif indirect.search(line):
            indirect_calls[cur] += 1
    return names, edges, self_calls, indirect_calls


def sccs(nodes, edges):
    """Tarjan's algorithm, iterative."""
    index, low, on, stack, out = {}, {}, set(), [], []
    counter = [0]
    for root in nodes:
        if root in index:
            continue
        work = [(root, iter(sorted(edges.get(root, ()))))]
        index[root] = low[root] = counter[0]
        counter[0] += 1
        stack.append(root)
        on.add(root)
        while work:
            v, it = work[-1]
            advanced = False
            for w in it:
                if w not in index:
                    index[w] = low[w] = counter[0]
                    counter[0] += 1
                    stack.append(w)
                    on.add(w)
                    work.append((w, iter(sorted(edges.get(w, ())))))
                    advanced = True
                    break
                if w in on:
                    low[v] = min(low[v], index[w])
            if advanced:
                continue
            work.pop()
            if work:
                low[work[-1][0]] = min(low[work[-1][0]], low[v])
            if low[v] == index[v]:
                comp = []
                while True:
                    w = stack.pop()
                    on.discard(w)
                    comp.append(w)
                    if w == v:
                        break
                out.append(comp)
    return out


def reach(roots, edges):
    parent = {r: None for r in roots}
    todo = deque(roots)
    while todo:
        v = todo.popleft()
        for w in sorted(edges.get(v, ())):
            if w not in parent:
                parent[w] = v
                todo.append(w)
    return parent


def main():
    if len(sys.argv) < 2:
        sys.exit(__doc__)
    elf = sys.argv[1]
    wanted = sys.argv[2:]
    names, edges, self_calls, indirect = graph(disassemble(elf))
    name = lambda a: names.get(a, hex(a))
    funcs = sorted(names)
    if wanted:
        roots = [f for f in funcs if any(w in names[f] for w in wanted)]
    else:
        roots = sorted(a for a in vector_table(elf) if a in names)
    if not roots:
        sys.exit(f"no function matches {wanted}")
    parent = reach(roots, edges)
    print(f"{len(funcs)} functions, {sum(len(v) for v in edges.values())} direct call edges; "
          f"roots: {', '.join(map(name, roots))}; {len(parent)} functions reachable")

    cycles = [c for c in sccs(funcs, edges) if len(c) > 1]
    cycles += [[f] for f in sorted(self_calls)]
    # A panic raised while a panic is formatted: core's panic path only.
    panic_path = [c for c in cycles if all(PANIC.search(name(f)) for f in c)]
    cycles = [c for c in cycles if c not in panic_path]
    live = [c for c in cycles if any(f in parent for f in c)]
    print(f"\ncycles (recursion) outside the panic path: {len(cycles)} in the image, "
          f"{len(live)} reachable from the roots")
    for c in live:
        print("  reachable:", " -> ".join(sorted(map(name, c))))
    for c in cycles:
        if c not in live:
            print("  unreachable:", " -> ".join(sorted(map(name, c))))
    for c in panic_path:
        print("  (panic path only:", " -> ".join(sorted(map(name, c))) + ")")

    alloc = sorted(n for n in names.values() if ALLOC.search(n))
    print(f"\nallocator symbols: {len(alloc)}")
    for n in alloc:
        print("  ", n)

    print("\nindirect calls (blx rN, bx rN) in reachable functions:")
    for f in sorted((f for f in parent if indirect.get(f)), key=name):
        print(f"  {indirect[f]:3d}  {name(f)}")
    elsewhere = sorted(name(f) for f in indirect if f not in parent)
    print(f"  (and in {len(elsewhere)} functions not reached by direct calls: "
          f"{', '.join(elsewhere) or 'none'})")

    print("\nreachable functions that call a panic entry point:")
    for f in sorted(parent, key=name):
        if PANIC.search(name(f)):
            continue
        hits = sorted({name(t) for t in edges.get(f, ()) if PANIC.search(name(t))})
        if hits:
            via = []
            v = f
            while v is not None:
                via.append(name(v))
                v = parent[v]
            print(f"  {name(f)}\n      calls {', '.join(hits)}\n      via {' <- '.join(via)}")
    return 1 if live or alloc else 0


if __name__ == "__main__":
    sys.exit(main())
