#!/usr/bin/env python3
"""Time two commands alternately (A, B, A, B, ...) and compare their whole-process wall times.

    python3 paired.py RUNS 'COMMAND A' 'COMMAND B'

Prints one line: median seconds of A, median seconds of B, the median over pairs of
time(B) / time(A), and the lowest and highest of those per-pair ratios. Each command runs once
untimed first (warm caches). Alternating the two commands exposes both to the same drift of a
shared machine, so the per-pair ratio is steadier than a ratio of two separate series.
Output of the commands is discarded; a command that fails stops the measurement.
"""
import shlex
import statistics
import subprocess
import sys
import time


def wall(cmd):
    t0 = time.perf_counter()
    subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=True)
    return time.perf_counter() - t0


def main():
    if len(sys.argv) != 4:
        sys.exit(__doc__)
    runs = int(sys.argv[1])
    a, b = shlex.split(sys.argv[2]), shlex.split(sys.argv[3])
    wall(a)
    wall(b)
    ta, tb = [], []
    for _ in range(runs):
        ta.append(wall(a))
        tb.append(wall(b))
    ratios = [y / x for x, y in zip(ta, tb)]
    print(
        "%.4f %.4f %.2f %.2f %.2f"
        % (statistics.median(ta), statistics.median(tb), statistics.median(ratios), min(ratios), max(ratios))
    )


if __name__ == "__main__":
    main()
