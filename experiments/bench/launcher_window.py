"""What each part of the launcher's timed window costs (issue 18, item 5).

The launcher (``benchharness/execute/launcher.py``) is driven in this process,
one run of ``/bin/true`` at a time, alternating run by run with a bare
``posix_spawn`` + ``wait4`` run timed around the two calls (so a drift of a busy
machine hits both alike). Each **variant** switches one part of a run's request
on, and the ratio of the launcher's recorded median ``wall_s`` to the bare runs'
median shows what that part adds to the measured time:

* ``base``: a run with nothing extra (pipes, process group, pidfd, poll);
* ``inflight``: with the in-flight record (a resume's way to find the run);
* ``timeout``: with a time limit (the wait gets a far timeout);
* ``sample``: with the per-run conditions (load average, CPU clock).

Each variant runs in a fresh process (``--rounds`` times, median reported), with
the load average beside it.

    python experiments/bench/launcher_window.py [--runs 2000] [--rounds 3] [--json]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]

ONE = r"""
import os, sys, statistics, tempfile, time
sys.path.insert(0, sys.argv[3])
say = os.dup(1)                       # the launcher takes fds 1 and 2 for its runs
from benchharness.execute import launcher as L
n, variant = int(sys.argv[1]), sys.argv[2]
r1, w1 = os.pipe()
r2, w2 = os.pipe()
os.set_blocking(r2, False)
la = L.Launcher(r1, w2)
env = {"PATH": "/usr/bin:/bin"}
req = {"op": "run", "argv": ["/bin/true"], "env": env, "shell_command": None, "cwd": None,
       "timeout_s": None, "cpus": None, "nice": None, "no_aslr": False,
       "capture_bytes": 65536, "kill_grace_s": 0.5, "linger_s": 0.1, "notify": False}
if variant == "inflight":
    fd, path = tempfile.mkstemp()
    os.write(fd, b" " * 4096)
    os.close(fd)
    req["inflight"] = (path, 1, "boot", os.stat(path).st_ino)
elif variant == "timeout":
    req["timeout_s"] = 100.0
elif variant == "sample":
    req["sample"] = True
bare, timed = [], []
# The launcher learns of its run's exit by SIGCHLD (a signalfd); a bare run's
# exit here queues one too, which a real launcher (no other children) never
# sees: it is taken away before the launcher's run, outside both timings.
drain = getattr(la, "drain_signals", lambda: None)
for _ in range(n):
    t0 = time.perf_counter_ns()
    pid = os.posix_spawn("/bin/true", ["/bin/true"], env)
    os.wait4(pid, 0)
    bare.append(time.perf_counter_ns() - t0)
    drain()
    timed.append(la.run(dict(req))["wall_ns"])
    la.close_run_fds()
    try:
        os.read(r2, 1 << 16)
    except BlockingIOError:
        pass
os.write(say, f"{statistics.median(bare)} {statistics.median(timed)}\n".encode())
"""

VARIANTS = ("base", "inflight", "timeout", "sample")


def one(variant: str, runs: int) -> float:
    p = subprocess.run([sys.executable, "-I", "-c", ONE, str(runs), variant, str(ROOT)],
                       capture_output=True, text=True, check=True)
    bare, timed = (float(x) for x in p.stdout.split())
    return timed / bare


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=2000, help="pairs of runs per process")
    ap.add_argument("--rounds", type=int, default=3, help="processes per variant")
    ap.add_argument("--json", action="store_true", help="print the figures as JSON")
    a = ap.parse_args(argv)
    load0 = os.getloadavg()[0]
    ratios = {v: [] for v in VARIANTS}
    for _ in range(a.rounds):       # variants interleaved round by round
        for v in VARIANTS:
            ratios[v].append(one(v, a.runs))
    load1 = os.getloadavg()[0]
    out = {"runs": a.runs, "load_average_1min": [load0, load1],
           "median_wall_ratio": {v: statistics.median(r) for v, r in ratios.items()},
           "rounds": ratios}
    if a.json:
        print(json.dumps(out, indent=2))
        return 0
    print(f"{a.runs} pairs of /bin/true runs per process, {a.rounds} processes per variant; "
          f"load average {load0:.1f} -> {load1:.1f} on {os.cpu_count()} CPUs")
    for v, r in ratios.items():
        print(f"{v:9s} median wall_s x{statistics.median(r):.3f} the bare runs' "
              f"(rounds {', '.join(f'x{x:.3f}' for x in r)})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
