"""The floor of per-run cost for a launcher written in Python (issue 18, item 5).

`overhead.py` compares a whole experiment of ``/bin/true`` runs with a bare
``posix_spawn`` + ``wait4`` loop. This script measures what part of that gap no
Python launcher can avoid: a **minimal loop** that does, per run, only the system
calls a run needs to be measured and recorded as benchharness records it, and
nothing else (no harness process, no requests, no checks, no progress):

* reset the peak-RSS mark (a write of ``5`` to ``/proc/self/clear_refs``), so
  ``max_rss_kib`` is the run's own;
* spawn in a process group of its own with default signal handling
  (``posix_spawn(setpgroup=0, setsigdef=...)``), between two reads of the boot
  clock (the start time that ties the run to the machine's clock);
* wait on a ``pidfd`` with ``poll`` (a launcher must also watch the output and
  request pipes while it waits, which ``wait4`` alone cannot), then reap with
  ``wait4`` for the run's resource usage;
* append one JSON line for the run to a journal file with one ``write``.

It is timed against bare runs in the same small process (``python -I -S``,
nothing imported but ``os``, ``time``, ``json``, ``select`` and ``signal``),
alternating run by run (a busy machine's drift hits both alike), in ``--rounds``
processes of ``--runs`` pairs each; the median round is reported with the load
average. Each run is timed around the spawn and the wait (``wall_s``: medians
and 10th percentiles compared), and each kind's whole per-run segment is summed
(throughput: total per run).

    python experiments/bench/overhead_floor.py [--runs 2000] [--rounds 6] [--json]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile

LOOPS = r"""
import json, os, select, signal, sys, time
n, journal = int(sys.argv[1]), sys.argv[2]
prog = "/bin/true"
env = {"PATH": "/usr/bin:/bin", "HOME": "/"}
clock = time.perf_counter_ns
spawn, wait4 = os.posix_spawn, os.wait4
sigdef = (signal.SIGPIPE, signal.SIGXFSZ)
boot = time.CLOCK_BOOTTIME
try:
    refs = os.open("/proc/self/clear_refs", os.O_WRONLY | os.O_CLOEXEC)
except OSError:
    refs = None
jfd = os.open(journal, os.O_WRONLY | os.O_APPEND | os.O_CREAT | os.O_CLOEXEC, 0o644)
poller = select.poll()
pidfd_open, poll, write, dumps = os.pidfd_open, poller.poll, os.write, json.dumps
bare_w, floor_w = [], []
bare_t = floor_t = 0
for i in range(n):
    s0 = clock()                      # a bare run
    t0 = clock()
    pid = spawn(prog, [prog], env)
    wait4(pid, 0)
    t1 = clock()
    bare_w.append(t1 - t0)
    s1 = clock()
    bare_t += s1 - s0
    if refs is not None:              # a run as a minimal launcher makes it
        write(refs, b"5")
    lo = time.clock_gettime_ns(boot)
    t0 = clock()
    pid = spawn(prog, [prog], env, setpgroup=0, setsigdef=sigdef)
    pfd = pidfd_open(pid)
    poller.register(pfd, select.POLLIN)
    hi = time.clock_gettime_ns(boot)
    poll()
    t1 = clock()
    _, status, ru = wait4(pid, 0)
    poller.unregister(pfd)
    os.close(pfd)
    floor_w.append(t1 - t0)
    write(jfd, (dumps({"run": i, "position": i, "block": 1, "replicate": 1,
                       "levels": {"kind": "a"}, "status": "ok", "exit_code": status >> 8,
                       "wall_s": (t1 - t0) / 1e9, "user_s": ru.ru_utime,
                       "sys_s": ru.ru_stime, "max_rss_kib": ru.ru_maxrss,
                       "start": [lo, hi]}) + "\n").encode())
    floor_t += clock() - s1
os.close(jfd)
print(bare_t, floor_t, len(bare_w), *bare_w, *floor_w)
"""


def block(n: int, journal: str) -> dict:
    """One process making ``n`` bare runs and ``n`` floor runs, alternating run by run."""
    p = subprocess.run([sys.executable, "-I", "-S", "-B", "-c", LOOPS, str(n), journal],
                       capture_output=True, text=True, check=True)
    nums = [int(x) for x in p.stdout.split()]
    bt, ft, k = nums[:3]
    bw, fw = nums[3:3 + k], nums[3 + k:]
    return {"total_ratio": ft / bt,
            "median_wall_ratio": statistics.median(fw) / statistics.median(bw),
            "p10_wall_ratio": statistics.quantiles(fw, n=10)[0]
            / statistics.quantiles(bw, n=10)[0],
            "bare_total_per_run_ms": bt / 1e6 / k, "floor_total_per_run_ms": ft / 1e6 / k,
            "load_1m": os.getloadavg()[0]}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=2000, help="runs per block (default 2000)")
    ap.add_argument("--rounds", type=int, default=6, help="pairs of blocks (default 6)")
    ap.add_argument("--json", action="store_true", help="print the figures as JSON")
    a = ap.parse_args(argv)
    load0 = os.getloadavg()[0]
    pairs = []
    with tempfile.TemporaryDirectory(prefix="floor-") as tmp:
        journal = os.path.join(tmp, "runs.jsonl")
        for _ in range(a.rounds):
            pairs.append(block(a.runs, journal))
            os.unlink(journal)
    load1 = os.getloadavg()[0]
    mid = sorted(pairs, key=lambda p: p["total_ratio"])[len(pairs) // 2]
    out = {"runs": a.runs, "load_average_1min": [load0, load1], "median_round": mid,
           "p10_wall_ratios": [round(p["p10_wall_ratio"], 4) for p in pairs],
           "total_ratios": [round(p["total_ratio"], 3) for p in pairs],
           "median_wall_ratios": [round(p["median_wall_ratio"], 4) for p in pairs],
           "median_of_median_wall_ratios": statistics.median(p["median_wall_ratio"]
                                                             for p in pairs)}
    if a.json:
        print(json.dumps(out, indent=2))
        return 0
    print(f"{a.runs} pairs of /bin/true runs per round, {a.rounds} rounds; load average "
          f"{load0:.1f} -> {load1:.1f} on {os.cpu_count()} CPUs")
    print(f"minimal Python launcher loop vs bare posix_spawn + wait4: total per run "
          f"x{mid['total_ratio']:.3f} (median round; rounds "
          f"{', '.join(f'x{x:.3f}' for x in out['total_ratios'])}), "
          f"{mid['floor_total_per_run_ms']:.3f} vs {mid['bare_total_per_run_ms']:.3f} ms; "
          f"median wall_s x{out['median_of_median_wall_ratios']:.3f} (rounds "
          f"{', '.join(f'x{x:.3f}' for x in out['median_wall_ratios'])}); 10th percentile "
          f"wall_s {', '.join(f'x{x:.3f}' for x in out['p10_wall_ratios'])}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
