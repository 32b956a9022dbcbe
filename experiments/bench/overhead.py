"""Harness overhead: /bin/true through benchharness vs a bare posix_spawn + wait4 loop.

Measures, side by side and interleaved in rounds (so machine drift hits both):

* bare loop: ``os.posix_spawn("/bin/true")`` + ``os.wait4``, timing each run with
  ``time.perf_counter_ns`` around the two calls (its own per-run measurement);
* executor: the same runs through `LocalExecutor.execute` (launcher process,
  pipes, bounded capture, pidfd wait);
* runner (when `benchharness.runner.run_experiment` exists): a whole experiment of
  N runs of /bin/true, journaling included.

Reports total wall per run of each and its ratio to the bare loop (target
<= 1.25 for the runner), and the median ``wall_s`` reported vs the bare loop's
median per-run figure (target within 5%).

    python experiments/bench/overhead.py [--runs 2000] [--rounds 4] [--json]
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


def bare_loop(n, env):
    walls = []
    t_start = time.perf_counter_ns()
    for _ in range(n):
        t0 = time.perf_counter_ns()
        pid = os.posix_spawn(TRUE, [TRUE], env)
        os.wait4(pid, 0)
        walls.append(time.perf_counter_ns() - t0)
    total = time.perf_counter_ns() - t_start
    return total / n / 1e9, [w / 1e9 for w in walls]


def executor_loop(ex, n, env):
    spec = RunSpec(argv=(TRUE,), env=env)
    walls = []
    t_start = time.perf_counter_ns()
    for _ in range(n):
        m = ex.execute(spec, on_start=lambda pid, pgid: None)
        walls.append(m.wall_s)
    total = time.perf_counter_ns() - t_start
    assert all(w is not None for w in walls)
    return total / n / 1e9, walls


def runner_loop(n, env, workdir):
    try:
        from benchharness.experiment import Experiment
        from benchharness.runner import run_experiment
    except ImportError:
        return None
    text = (f"experiment: overhead\ncommand: [{TRUE}]\nfactors:\n  kind: [a, b]\n"
            f"replicates: {max(1, n // 2)}\nseed: 1\n")
    exp = Experiment.from_text(text)
    out = Path(workdir) / f"run-{time.time_ns()}"
    import inspect
    kwargs = {}
    params = inspect.signature(run_experiment).parameters
    if "progress" in params:
        kwargs["progress"] = False
    if "quiet" in params:
        kwargs["quiet"] = True
    t_start = time.perf_counter_ns()
    outcome = run_experiment(exp, out=out, **kwargs)
    total = time.perf_counter_ns() - t_start
    runs = outcome.runs
    walls = [float(w) for w in runs["wall_s"]]
    return total / len(walls) / 1e9, walls


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=2000, help="runs per method (default 2000)")
    ap.add_argument("--rounds", type=int, default=4, help="interleaved rounds (default 4)")
    ap.add_argument("--json", action="store_true", help="print the figures as JSON")
    args = ap.parse_args(argv)
    env = {"PATH": "/usr/bin:/bin"}
    per = max(1, args.runs // args.rounds)
    res = {"bare": ([], []), "executor": ([], []), "runner": ([], [])}
    with LocalExecutor() as ex, tempfile.TemporaryDirectory() as tmp:
        executor_loop(ex, 50, env)  # warm up both paths
        bare_loop(50, env)
        for _ in range(args.rounds):
            for name, fn in (("bare", lambda: bare_loop(per, env)),
                             ("executor", lambda: executor_loop(ex, per, env)),
                             ("runner", lambda: runner_loop(per, env, tmp))):
                got = fn()
                if got is None:
                    continue
                res[name][0].append(got[0])
                res[name][1].extend(got[1])
    bare_total = statistics.mean(res["bare"][0])
    bare_median = statistics.median(res["bare"][1])
    out = {"runs_per_method": per * args.rounds, "rounds": args.rounds,
           "bare_total_per_run_ms": bare_total * 1e3, "bare_median_wall_ms": bare_median * 1e3}
    for name in ("executor", "runner"):
        totals, walls = res[name]
        if not totals:
            out[name] = None
            continue
        t = statistics.mean(totals)
        m = statistics.median(walls)
        out[name] = {"total_per_run_ms": t * 1e3, "total_ratio": t / bare_total,
                     "median_wall_ms": m * 1e3, "median_wall_ratio": m / bare_median}
    if args.json:
        print(json.dumps(out, indent=2))
    else:
        print(f"runs per method: {out['runs_per_method']} in {args.rounds} interleaved rounds")
        print(f"bare posix_spawn+wait4: {out['bare_total_per_run_ms']:.3f} ms per run total, "
              f"median per-run {out['bare_median_wall_ms']:.3f} ms")
        for name in ("executor", "runner"):
            r = out[name]
            if r is None:
                print(f"{name}: not available on this branch")
                continue
            print(f"{name}: {r['total_per_run_ms']:.3f} ms per run total "
                  f"(x{r['total_ratio']:.3f} of bare; target <= 1.25), median wall_s "
                  f"{r['median_wall_ms']:.3f} ms (x{r['median_wall_ratio']:.3f} of bare's; "
                  f"target within 5%)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
