"""CPU time the launcher and the harness spend per run (issue 18, item 5).

Wall-clock ratios (``overhead.py``) need a quiet machine; CPU time spent by
each of our own processes moves far less with the load of other users, so it
is the figure to compare two versions of the per-run path on a shared machine.

Each round runs two whole experiments of ``/bin/true`` through
`run_experiment` (as ``benchharness run`` makes them: queued runs, journal,
in-flight record, runs.csv), one of ``--runs`` runs and one of ``--runs // 10``,
and takes the **slope** between them, so what an experiment pays once (folder,
plan, host facts, the launcher's start-up, the final export) drops out:

* **launcher**: its CPU time from ``/proc/PID/schedstat`` (nanoseconds on a CPU,
  the runs themselves not included), read after the last run, before it exits;
* **harness**: ``time.process_time`` of this process (all its threads: the
  journal's fsync thread too);
* **bare loop**: for reference, the CPU time of a bare ``posix_spawn`` +
  ``wait4`` loop of ``--runs`` runs in a small separate process (what the
  launcher cannot do without: the spawn and the reap).

Rounds alternate the order of the two sizes; the median slope is reported, with
the load average beside it.

    python experiments/bench/overhead_cpu.py [--runs 3000] [--rounds 5] [--json]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

TRUE = "/bin/true"


def schedstat_ns(pid: int) -> int:
    """Nanoseconds ``pid`` has spent on a CPU (first field of /proc/PID/schedstat)."""
    with open(f"/proc/{pid}/schedstat") as f:
        return int(f.read().split()[0])


def experiment_cpu(n: int, workdir: str) -> tuple[float, float]:
    """(launcher CPU s, harness CPU s) of one experiment of ``n`` runs of /bin/true."""
    from benchharness.experiment.file import Experiment
    from benchharness.execute.envs import clean_environment
    from benchharness.execute.local import LocalExecutor
    from benchharness.execute.runner import Progress, run_experiment

    env = clean_environment({"PATH": "/usr/bin:/bin", "HOME": os.environ.get("HOME", "/")})
    text = (f"experiment: overhead\ncommand: [{TRUE}]\nfactors:\n  kind: [a, b]\n"
            f"replicates: {max(1, n // 2)}\nseed: 1\nenv:\n  PATH: {env['PATH']}\n"
            f"  HOME: {env['HOME']}\nclean_env: true\n")
    exp = Experiment.from_text(text)
    out = Path(workdir) / f"run-{time.time_ns()}"
    ex = LocalExecutor(wait=False)
    c0 = time.process_time()
    run_experiment(exp, out=out, executor=ex, progress=Progress())
    harness = time.process_time() - c0
    launcher = schedstat_ns(ex.launcher_pid) / 1e9
    ex.close()
    return launcher, harness


BARE_LOOP = r"""
import os, sys, time
n, prog = int(sys.argv[1]), sys.argv[2]
env = dict(a.split("=", 1) for a in sys.argv[3:])
spawn, wait4 = os.posix_spawn, os.wait4
c0 = time.process_time()
for _ in range(n):
    wait4(spawn(prog, [prog], env), 0)
print(time.process_time() - c0)
"""


def bare_cpu(n: int) -> float:
    """CPU s of a bare ``posix_spawn`` + ``wait4`` loop of ``n`` runs in a small
    separate process (``python -I -S``), its start-up not counted."""
    import subprocess

    from benchharness.execute.envs import clean_environment

    env = clean_environment({"PATH": "/usr/bin:/bin", "HOME": os.environ.get("HOME", "/")})
    p = subprocess.run([sys.executable, "-I", "-S", "-B", "-c", BARE_LOOP, str(n), TRUE,
                        *(f"{k}={v}" for k, v in env.items())],
                       capture_output=True, text=True, check=True)
    return float(p.stdout)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=3000, help="runs of the larger experiment")
    ap.add_argument("--rounds", type=int, default=5, help="pairs of experiments")
    ap.add_argument("--json", action="store_true", help="print the figures as JSON")
    a = ap.parse_args(argv)
    big, small = a.runs, max(2, a.runs // 10)
    load0 = os.getloadavg()[0]
    launcher, harness, bare = [], [], []
    with tempfile.TemporaryDirectory() as tmp:
        experiment_cpu(20, tmp)  # imports and first-use costs
        for i in range(a.rounds):
            sizes = (big, small) if i % 2 == 0 else (small, big)
            got = {n: experiment_cpu(n, tmp) for n in sizes}
            launcher.append((got[big][0] - got[small][0]) / (big - small) * 1e6)
            harness.append((got[big][1] - got[small][1]) / (big - small) * 1e6)
            bare.append(bare_cpu(big) / big * 1e6)
    load1 = os.getloadavg()[0]
    out = {"runs": [small, big], "load_average_1min": [load0, load1],
           "launcher_us_per_run": statistics.median(launcher),
           "harness_us_per_run": statistics.median(harness),
           "bare_loop_us_per_run": statistics.median(bare),
           "rounds": {"launcher": launcher, "harness": harness, "bare_loop": bare}}
    if a.json:
        print(json.dumps(out, indent=2))
        return 0
    print(f"/bin/true, experiments of {small} and {big} runs, {a.rounds} pairs; load average "
          f"{load0:.1f} -> {load1:.1f} on {os.cpu_count()} CPUs")
    for name, xs in (("launcher", launcher), ("harness", harness), ("bare loop", bare)):
        print(f"{name:9s} CPU per run {statistics.median(xs):6.1f} us "
              f"(rounds {', '.join(f'{x:.1f}' for x in xs)})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
