"""Time a whole command from outside: wall seconds and peak memory over several runs.

Run:  .venv/bin/python -m benchmarks.timing [-n 5] [--warmup 1] [--vs "COMMAND B"] -- COMMAND ...
(the options before the command)

Each run starts the command as a fresh process (its start-up included) and waits for it
with ``os.wait4``, whose resource usage gives that process's peak resident memory (the
largest of it and the children it waited for; it cannot read below this timer's own size,
about 13 MiB, as the child starts as a copy of it). Prints the minimum, median and maximum of
the wall seconds and of the peak MiB. With ``--vs`` the two commands run in turn (A B A B
...) and the ratio A / B is taken pair by pair, so that a drift in the machine's speed
moves both. Only the standard library: anyone can rerun the figures in benchmarks/.
"""

from __future__ import annotations

import argparse
import os
import shlex
import statistics
import subprocess
import sys
import time


def once(command: list[str]) -> tuple[float, float, int]:
    """Wall seconds, peak MiB and exit code of one run of ``command``."""
    start = time.perf_counter()
    proc = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - start
    proc.returncode = os.waitstatus_to_exitcode(status)
    return wall, usage.ru_maxrss / 1024.0, proc.returncode  # ru_maxrss: KiB on Linux


def _spread(values: list[float]) -> str:
    return f"{statistics.median(values):.3f} [{min(values):.3f}, {max(values):.3f}]"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("-n", type=int, default=5, help="timed runs (default 5)")
    parser.add_argument("--warmup", type=int, default=1, help="untimed runs first (default 1)")
    parser.add_argument("--vs", default="", help="a second command, run in turn: ratio A / B")
    parser.add_argument("command", nargs=argparse.REMAINDER)
    args = parser.parse_args()
    a = args.command[1:] if args.command[:1] == ["--"] else args.command
    if not a:
        parser.error("no command given")
    b = shlex.split(args.vs) if args.vs else None
    for _ in range(args.warmup):
        once(a)
        if b:
            once(b)
    runs_a, runs_b = [], []
    for _ in range(args.n):
        runs_a.append(once(a))
        if b:
            runs_b.append(once(b))
    codes = sorted({r[2] for r in runs_a + runs_b})
    print(f"A: {shlex.join(a)}")
    print(f"  wall s, median [min, max]: {_spread([r[0] for r in runs_a])}")
    print(f"  peak MiB, median [min, max]: {_spread([r[1] for r in runs_a])}")
    if b:
        print(f"B: {shlex.join(b)}")
        print(f"  wall s, median [min, max]: {_spread([r[0] for r in runs_b])}")
        print(f"  peak MiB, median [min, max]: {_spread([r[1] for r in runs_b])}")
        ratios = [x[0] / y[0] for x, y in zip(runs_a, runs_b, strict=True)]
        print(f"  A / B wall, pair by pair, median [min, max]: {_spread(ratios)}")
    print(f"exit codes: {codes}")
    sys.exit(0)


if __name__ == "__main__":
    main()
