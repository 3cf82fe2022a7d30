"""Instruction counts per source line, inlined code included, from a callgrind profile.

`callgrind_annotate` charges an inlined call to the innermost line (`core/src/time.rs`,
`slice/index.rs`), which hides where a flat profile's cost comes from. This script
charges every instruction to the line of the *outermost* function it was inlined into
(a line of `Engine::step`, say), so each line's figure includes what it calls inline.

Usage (from the repository root; needs valgrind and binutils' addr2line):

    cargo bench --bench simulate --no-run
    SPILLWAY_BENCH_DAYS=1 SPILLWAY_BENCH_ONLY=Spillway valgrind --tool=callgrind \\
        --dump-instr=yes --callgrind-out-file=cg.out target/release/deps/simulate-HASH
    python3 benches/profile_lines.py cg.out target/release/deps/simulate-HASH Engine::step 40

prints the total for functions whose name contains the third argument, then its most
expensive lines. Instruction counts are repeatable run to run, unlike wall time on this
machine class.
"""

import collections
import re
import subprocess
import sys


def self_costs(profile, binary):
    """Instructions executed at each address of `binary` (calls excluded)."""
    costs = collections.Counter()
    names, current, addr, line, skip = {}, None, 0, 0, False

    def position(token, previous):
        if token == "*":
            return previous
        if token[0] in "+-":
            return previous + int(token, 0)
        return int(token, 0)

    for raw in open(profile):
        raw = raw.rstrip("\n")
        if not raw:
            continue
        for key in ("ob=", "cob="):
            if raw.startswith(key):
                m = re.match(r"c?ob=\((\d+)\)(?: (.*))?", raw)
                if m.group(2):
                    names[m.group(1)] = m.group(2)
                if key == "ob=":
                    current = names.get(m.group(1))
                break
        else:
            if raw.startswith("calls="):
                skip = True  # the next cost line is the call's inclusive cost
                continue
            if raw[0].isdigit() or raw[0] in "+-*":
                parts = raw.split()
                if len(parts) >= 3:
                    addr, line = position(parts[0], addr), position(parts[1], line)
                    if skip:
                        skip = False
                    elif current and current.endswith(binary.split("/")[-1]):
                        costs[addr] += int(parts[2])
                continue
            skip = False
    return costs


def outermost_frames(binary, addresses):
    """For each address, its inline chain's outermost (function, file:line)."""
    out = subprocess.run(
        ["addr2line", "-e", binary, "-i", "-f", "-C", "-a"] + [hex(a) for a in addresses],
        capture_output=True,
        text=True,
        check=True,
    ).stdout.split("\n")
    frames, current, i = {}, None, 0
    while i < len(out):
        if out[i].startswith("0x"):
            current = int(out[i], 16)
            i += 1
        elif out[i]:
            frames[current] = (out[i], out[i + 1] if i + 1 < len(out) else "")
            i += 2
        else:
            i += 1
    return frames


def main():
    profile, binary, function = sys.argv[1], sys.argv[2], sys.argv[3]
    top = int(sys.argv[4]) if len(sys.argv) > 4 else 40
    costs = self_costs(profile, binary)
    frames = outermost_frames(binary, sorted(costs))
    lines, total = collections.Counter(), 0
    for addr, cost in costs.items():
        name, location = frames.get(addr, ("", ""))
        if function not in name:
            continue
        total += cost
        lines[re.sub(r" \(discriminator \d+\)", "", location).split("/")[-1]] += cost
    print(f"{total:,} instructions in functions matching {function!r}")
    for location, cost in lines.most_common(top):
        print(f"{cost:>14,}  {location}")


if __name__ == "__main__":
    main()
