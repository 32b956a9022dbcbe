"""What one system call made between two runs does to the next run's time (issue 18, item 5).

A launcher must do some kernel work between two runs: reset the peak-RSS mark
(``/proc/self/clear_refs``), read its children list (leftover processes),
append the run's journal line, now and then read the load average. This script
times bare ``posix_spawn`` + ``wait4`` runs of ``/bin/true`` in a small process
(``python -I -S``) with exactly one such call made before each spawn, outside
the timed window, and compares the median with runs made with nothing between
them. Variants run in separate processes, interleaved round by round, with the
load average recorded; the ratio is what to read.

    python experiments/bench/spawn_after.py [--runs 3000] [--rounds 3] [--json]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile

ONE = r"""
import os, statistics, sys, time
n, mode, journal = int(sys.argv[1]), sys.argv[2], sys.argv[3]
env = {"PATH": "/usr/bin:/bin"}
me = os.getpid()
refs = os.open("/proc/self/clear_refs", os.O_WRONLY)
kids = os.open(f"/proc/{me}/task/{me}/children", os.O_RDONLY)
jfd = os.open(journal, os.O_WRONLY | os.O_CREAT | os.O_APPEND)
line = b"x" * 300 + b"\n"
walls = []
for _ in range(n):
    if mode == "clear_refs":
        os.write(refs, b"5")
    elif mode == "children":
        os.pread(kids, 4096, 0)
    elif mode == "loadavg":
        with open("/proc/loadavg") as f:
            f.read()
    elif mode == "journal":
        os.write(jfd, line)
    t0 = time.perf_counter_ns()
    pid = os.posix_spawn("/bin/true", ["/bin/true"], env)
    os.wait4(pid, 0)
    walls.append(time.perf_counter_ns() - t0)
print(statistics.median(walls))
"""

MODES = ("nothing", "clear_refs", "children", "loadavg", "journal")


def one(mode: str, runs: int, journal: str) -> float:
    p = subprocess.run([sys.executable, "-I", "-S", "-c", ONE, str(runs), mode, journal],
                       capture_output=True, text=True, check=True)
    return float(p.stdout)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=3000, help="runs per process")
    ap.add_argument("--rounds", type=int, default=3, help="processes per variant")
    ap.add_argument("--json", action="store_true", help="print the figures as JSON")
    a = ap.parse_args(argv)
    load0 = os.getloadavg()[0]
    med = {m: [] for m in MODES}
    with tempfile.TemporaryDirectory(prefix="spawn-after-") as tmp:
        journal = os.path.join(tmp, "journal")
        for _ in range(a.rounds):
            for m in MODES:
                med[m].append(one(m, a.runs, journal))
    load1 = os.getloadavg()[0]
    ratios = {m: [x / y for x, y in zip(med[m], med["nothing"])] for m in MODES[1:]}
    out = {"runs": a.runs, "load_average_1min": [load0, load1],
           "median_wall_ms": {m: [x / 1e6 for x in v] for m, v in med.items()},
           "ratio_to_nothing": ratios}
    if a.json:
        print(json.dumps(out, indent=2))
        return 0
    print(f"{a.runs} runs of /bin/true per process, {a.rounds} processes per variant; load "
          f"average {load0:.1f} -> {load1:.1f} on {os.cpu_count()} CPUs")
    print(f"nothing between runs: median wall {statistics.median(med['nothing']) / 1e6:.4f} ms")
    for m, r in ratios.items():
        print(f"{m:10s} before each spawn: median wall x{statistics.median(r):.3f} "
              f"(rounds {', '.join(f'x{x:.3f}' for x in r)})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
