"""Harness overhead: /bin/true through benchharness vs a bare posix_spawn + wait4 loop.

Side by side in the same process (a shared machine drifts within seconds, so
the methods alternate and each is compared with the bare loop next to it):

* **bare**: ``os.posix_spawn`` + ``os.wait4`` in this process, each run timed with
  ``time.perf_counter_ns`` around the two calls (its own per-run measurement);
* **executor**: `LocalExecutor.execute` one run at a time (launcher process,
  pipes, bounded capture, pidfd wait; no ``on_start`` callback, as the runner
  calls it), alternating run by run with bare runs;
* **runner**: a whole experiment through `benchharness.execute.runner.run_experiment`,
  as ``benchharness run`` does it: its own launcher, plan, results folder, host
  facts, provenance, the journal with group-commit fsync, the in-flight record,
  runs.csv export. Its reference is an **independent** bare loop: a separate
  small process (``python -I -S``, only ``os`` and ``time``) that makes the same
  number of ``posix_spawn`` + ``wait4`` runs of /bin/true with the same
  environment and times each itself. Experiments and bare blocks alternate
  (ABBA over ``--rounds`` pairs, so a drift of the machine's speed hits both
  sides alike), each pair is compared on its own, and the median pair is
  reported. A reference measured inside the launcher would carry the launcher's
  own costs (its process, its caches, its position between two runs) and hide
  them. Interpreter start-up and imports (once per command) are not counted on
  either side.

Reported per method: total wall time per run and its ratio to bare (target
<= 1.15 for the runner), the median ``wall_s`` it recorded vs the bare loop's
median (target <= 1.02 for the runner: it measures the process, not itself), and CPU time
per run spent by the harness and the launcher (less sensitive to a busy machine
than wall time).

    python experiments/bench/overhead.py [--runs 2000] [--rounds 3] [--json]
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

from benchharness.execute.base import RunSpec  # noqa: E402
from benchharness.execute.local import LocalExecutor  # noqa: E402

TRUE = "/bin/true"
TICK = os.sysconf("SC_CLK_TCK")


def proc_cpu_s(pid: int) -> float:
    with open(f"/proc/{pid}/stat") as f:
        fields = f.read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / TICK


class Alternating:
    """An executor that does one timed bare run before each real run."""

    def __init__(self, inner, env):
        self.inner = inner
        self.env = env
        self.bare_walls = []     # the bare loop's own per-run measurement
        self.bare_segments = 0   # ns spent in bare segments, loop overhead included
        self.bare_cpu = 0.0

    def bare_once(self, env):
        c0 = time.process_time()
        s0 = time.perf_counter_ns()
        t0 = time.perf_counter_ns()
        pid = os.posix_spawn(TRUE, [TRUE], env)
        os.wait4(pid, 0)
        t1 = time.perf_counter_ns()
        self.bare_walls.append((t1 - t0) / 1e9)
        self.bare_segments += time.perf_counter_ns() - s0
        self.bare_cpu += time.process_time() - c0

    def execute(self, spec, on_start=None, **kw):
        # the same environment as the measured run: exec and the dynamic
        # loader take longer with a bigger one
        self.bare_once(dict(spec.env))
        return self.inner.execute(spec, on_start=on_start, **kw)

    def prepare_request(self, spec, notify=False):
        return self.inner.prepare_request(spec, notify)

    @property
    def records_inflight(self):
        # the runner then lets the launcher record the in-flight run itself
        return getattr(self.inner, "records_inflight", False)

    @property
    def launcher_pid(self):
        # left out of the host check's busy-process sample (it is ours)
        return getattr(self.inner, "launcher_pid", None)

    @property
    def supports_while_running(self):
        # the runner then prepares the next run while this one executes
        return getattr(self.inner, "supports_while_running", False)

    def close(self):
        pass


def executor_loop(ex, n, env):
    alt = Alternating(ex, env)
    spec = RunSpec(argv=(TRUE,), env=env)
    walls = []
    c0 = time.process_time() + proc_cpu_s(ex.launcher_pid)
    t_start = time.perf_counter_ns()
    for _ in range(n):
        walls.append(alt.execute(spec).wall_s)
    total = time.perf_counter_ns() - t_start - alt.bare_segments
    cpu = time.process_time() + proc_cpu_s(ex.launcher_pid) - c0 - alt.bare_cpu
    return alt, total / 1e9, walls, cpu


BARE_LOOP = r"""
import os, sys, time
n = int(sys.argv[1]); prog = sys.argv[2]
env = dict(a.split("=", 1) for a in sys.argv[3:])
walls = []
spawn, wait4, clock = os.posix_spawn, os.wait4, time.perf_counter_ns
start = clock()
for _ in range(n):
    t0 = clock()
    pid = spawn(prog, [prog], env)
    wait4(pid, 0)
    walls.append(clock() - t0)
total = clock() - start
print(total, *walls)
"""


def bare_block(n, env):
    """The independent reference: ``n`` bare ``posix_spawn`` + ``wait4`` runs of
    /bin/true in a separate small process (``python -I -S``, nothing imported
    but ``os`` and ``time``), each timed by that loop itself.

    Returns (loop total ns, per-run walls in s). The process's start-up is not
    counted (it times its own loop), as the runner's start-up is not.
    """
    import subprocess

    p = subprocess.run([sys.executable, "-I", "-S", "-B", "-c", BARE_LOOP, str(n), TRUE,
                        *(f"{k}={v}" for k, v in env.items())],
                       capture_output=True, text=True, check=True)
    nums = [int(x) for x in p.stdout.split()]
    return nums[0], [w / 1e9 for w in nums[1:]]


def runner_once(n, env, workdir):
    """One experiment of n runs of /bin/true, as `benchharness run` makes it.

    Returns (harness total ns, recorded walls, harness+launcher CPU s without
    the runs' own CPU). Counted: from starting the launcher to its exit, with
    the folder, plan, host facts, provenance, journal and runs.csv; not
    counted: the interpreter's start-up and imports (once per command).
    """
    from benchharness.experiment.file import Experiment
    from benchharness.execute.runner import Progress, run_experiment

    text = (f"experiment: overhead\ncommand: [{TRUE}]\nfactors:\n  kind: [a, b]\n"
            f"replicates: {max(1, n // 2)}\nseed: 1\nenv:\n  PATH: {env['PATH']}\n"
            f"  HOME: {env['HOME']}\nclean_env: true\n")
    exp = Experiment.from_text(text)
    out = Path(workdir) / f"run-{time.time_ns()}"
    before = os.times()
    t_start = time.perf_counter_ns()
    ex = LocalExecutor(wait=False)  # started as `benchharness run` starts its own
    outcome = run_experiment(exp, out=out, executor=ex, progress=Progress())
    ex.close()
    total = time.perf_counter_ns() - t_start
    after = os.times()
    walls = [float(w) for w in outcome.runs["wall_s"]]
    # harness and (reaped) launcher CPU, minus the measured runs' own CPU
    runs_cpu = float(outcome.runs["user_s"].sum() + outcome.runs["sys_s"].sum())
    cpu = (after.user + after.system + after.children_user + after.children_system
           - before.user - before.system - before.children_user - before.children_system
           - runs_cpu)
    return total, walls, cpu


def _p10(xs):
    return statistics.quantiles(xs, n=10)[0]


def runner_rounds(n, rounds, env, workdir):
    """``rounds`` pairs of (experiment, independent bare block), alternating
    which goes first (ABBA), each pair compared on its own."""
    out = []
    for i in range(rounds):
        if i % 2 == 0:
            bare_total, bare_walls = bare_block(n, env)
            total, walls, cpu = runner_once(n, env, workdir)
        else:
            total, walls, cpu = runner_once(n, env, workdir)
            bare_total, bare_walls = bare_block(n, env)
        k = len(walls)
        out.append({"bare_total_per_run_ms": bare_total / 1e6 / len(bare_walls),
                    "total_per_run_ms": total / 1e6 / k,
                    "total_ratio": (total / k) / (bare_total / len(bare_walls)),
                    "bare_median_wall_ms": statistics.median(bare_walls) * 1e3,
                    "median_wall_ms": statistics.median(walls) * 1e3,
                    "median_wall_ratio": statistics.median(walls)
                    / statistics.median(bare_walls),
                    # the 10th percentiles: runs that waited for no one (robust to load)
                    "p10_wall_ratio": _p10(walls) / _p10(bare_walls),
                    "bare_cpu_per_run_ms": None,
                    "cpu_per_run_ms": cpu / k * 1e3,
                    "load_1m": os.getloadavg()[0]})
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=2000, help="runs per method (default 2000)")
    ap.add_argument("--rounds", type=int, default=6,
                    help="experiment + bare-loop pairs for the runner (default 6, "
                         "alternating which goes first; the median pair is reported)")
    ap.add_argument("--no-executor", action="store_true",
                    help="skip the one-run-at-a-time method")
    ap.add_argument("--json", action="store_true", help="print the figures as JSON")
    args = ap.parse_args(argv)
    from benchharness.execute.envs import clean_environment

    # the environment the experiment's runs get (exec and the dynamic loader
    # take longer with a bigger one), so both methods start the same process
    env = clean_environment({"PATH": "/usr/bin:/bin", "HOME": os.environ.get("HOME", "/")})
    n = args.runs
    try:
        import benchharness.execute.runner  # noqa: F401
        have_runner = True
    except ImportError:
        have_runner = False
    load0 = os.getloadavg()
    results = {}
    with tempfile.TemporaryDirectory() as tmp:
        if not args.no_executor:
            with LocalExecutor() as ex:
                executor_loop(ex, 50, env)  # warm up every path once
                results["executor"] = executor_loop(ex, n, env)
        if have_runner:
            runner_once(20, env, tmp)  # imports and first-use costs
            bare_block(20, env)
            results["runner"] = runner_rounds(n, args.rounds, env, tmp)
    load1 = os.getloadavg()
    out = {"runs_per_method": n, "load_average_1min": [load0[0], load1[0]],
           "cpus": os.cpu_count()}
    if "executor" in results:
        alt, total, walls, cpu = results["executor"]
        bare_total = alt.bare_segments / 1e9 / len(alt.bare_walls)
        bare_median = statistics.median(alt.bare_walls)
        t = total / len(walls)
        m = statistics.median(walls)
        out["executor"] = {"bare_total_per_run_ms": bare_total * 1e3,
                           "bare_median_wall_ms": bare_median * 1e3,
                           "bare_cpu_per_run_ms": alt.bare_cpu / len(alt.bare_walls) * 1e3,
                           "total_per_run_ms": t * 1e3, "total_ratio": t / bare_total,
                           "median_wall_ms": m * 1e3, "median_wall_ratio": m / bare_median,
                           "cpu_per_run_ms": cpu / len(walls) * 1e3}
    if "runner" in results:
        rounds = results["runner"]
        mid = sorted(rounds, key=lambda r: r["total_ratio"])[len(rounds) // 2]
        out["runner"] = dict(mid, rounds=[round(r["total_ratio"], 3) for r in rounds],
                             median_wall_rounds=[round(r["median_wall_ratio"], 4)
                                                 for r in rounds],
                             p10_wall_rounds=[round(r["p10_wall_ratio"], 4) for r in rounds],
                             loads=[round(r["load_1m"], 1) for r in rounds],
                             median_of_median_wall_ratios=statistics.median(
                                 r["median_wall_ratio"] for r in rounds))
    if args.json:
        print(json.dumps(out, indent=2))
        return 0
    print(f"{n} runs of {TRUE} per method, side by side with a bare posix_spawn+wait4 loop; "
          f"load average {load0[0]:.1f} -> {load1[0]:.1f} on {os.cpu_count()} CPUs")
    for name in ("executor", "runner"):
        r = out.get(name)
        if r is None:
            print(f"{name}: not available")
            continue
        how = ("one run at a time, alternating with bare runs" if name == "executor" else
               f"whole experiment vs an independent bare loop in its own process, "
               f"median of {len(r['rounds'])} alternating pairs (ratios "
               f"{', '.join(f'x{x:.3f}' for x in r['rounds'])}; median wall_s ratios "
               f"{', '.join(f'x{x:.3f}' for x in r['median_wall_rounds'])}; 10th-percentile "
               f"wall_s ratios {', '.join(f'x{x:.3f}' for x in r['p10_wall_rounds'])}; "
               f"load {', '.join(f'{x:.1f}' for x in r['loads'])})")
        print(f"{name} ({how}): {r['total_per_run_ms']:.3f} ms per run vs bare "
              f"{r['bare_total_per_run_ms']:.3f} (x{r['total_ratio']:.3f}"
              f"{'; target <= 1.15' if name == 'runner' else ''}); "
              f"median wall_s {r['median_wall_ms']:.3f} ms vs bare's own "
              f"{r['bare_median_wall_ms']:.3f} (x{r['median_wall_ratio']:.3f}; target "
              f"{'<= 1.02' if name == 'runner' else 'within 5%'});"
              f" CPU per run {r['cpu_per_run_ms']:.3f} ms (harness+launcher)"
              + (f" vs {r['bare_cpu_per_run_ms']:.3f}" if r["bare_cpu_per_run_ms"] else ""))
    return 0


if __name__ == "__main__":
    sys.exit(main())
