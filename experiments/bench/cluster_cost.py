"""Per-run cost of cluster runs, against local runs measured beside them.

Side by side in one process, interleaved round by round (a shared machine drifts
within seconds):

* **local**: `run_experiment` with the local executor (queued runs through the
  launcher), as ``benchharness run FILE`` does it;
* **cluster-1**: the same experiment through a local Dask scheduler with one
  worker (``--scheduler``), as ``benchharness run FILE --scheduler ADDR``;
* **cluster-2**: the same through a second scheduler with two workers
  (``--same-host-ok``: both on this machine).

The command is ``/bin/true`` (the cost of the harness, not of the work), the
design 8 x 4 = 32 cells, so each replicate is a block of 32 runs on one host.
A method's cost per run is the slope of its total wall time between a small and
a large experiment (``--small``, ``--large`` replicates), so connecting, the
host facts, the results folder and the final export, paid once per experiment,
do not count. Reported: milliseconds per run for each method, the cluster's cost
as a ratio to local runs, and the throughput of two workers as a ratio to one,
with the load average before and after.

    python experiments/bench/cluster_cost.py [--rounds 3] [--small 2] [--large 32] [--json]
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

PY = sys.executable
CELLS = (8, 4)


def _env():
    return dict(os.environ, PYTHONPATH=str(ROOT), DASK_DISTRIBUTED__WORKER__DAEMON="False")


def start_cluster(workdir: Path, n_workers: int, log):
    """A scheduler and ``n_workers`` single-thread workers with the bench resource."""
    sched_file = workdir / f"scheduler-{n_workers}.json"
    procs = [subprocess.Popen([PY, "-m", "distributed.cli.dask_scheduler", "--host",
                               "127.0.0.1", "--port", "0", "--no-dashboard",
                               "--scheduler-file", str(sched_file)], env=_env(), stdout=log,
                              stderr=log, start_new_session=True)]
    deadline = time.time() + 60
    address = None
    while time.time() < deadline and address is None:
        try:
            address = json.loads(sched_file.read_text())["address"]
        except (OSError, ValueError, KeyError):
            time.sleep(0.1)
    if address is None:
        stop(procs)
        raise SystemExit("the Dask scheduler did not start")
    for i in range(n_workers):
        procs.append(subprocess.Popen(
            [PY, "-m", "distributed.cli.dask_worker", address, "--nthreads", "1",
             "--nworkers", "1", "--resources", "bench=1", "--name", f"w{n_workers}-{i}",
             "--no-dashboard", "--host", "127.0.0.1"], env=_env(), stdout=log, stderr=log,
            start_new_session=True, cwd=ROOT))
    from distributed import Client

    with Client(address, timeout=30) as c:
        c.wait_for_workers(n_workers, timeout=60)
    return address, procs


def stop(procs) -> None:
    for p in procs:
        try:
            os.killpg(p.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
        p.wait()


def experiment(replicates: int):
    from benchharness.experiment.file import Experiment

    a = ", ".join(f"a{i}" for i in range(CELLS[0]))
    b = ", ".join(f"b{i}" for i in range(CELLS[1]))
    text = (f"experiment: cluster-cost\ncommand: [/bin/true, '{{a}}', '{{b}}']\n"
            f"factors:\n  a: [{a}]\n  b: [{b}]\nreplicates: {replicates}\nwarmup: 0\n"
            "seed: 1\norder: blocked\nhost_check: off\n")
    return Experiment.from_text(text)


def one(method: str, replicates: int, address: str | None, workdir: Path) -> float:
    """Wall time of one whole experiment (seconds)."""
    from benchharness.execute.runner import Progress, run_experiment

    out = workdir / f"{method}-{replicates}-{time.time_ns()}"
    t0 = time.perf_counter()
    outcome = run_experiment(experiment(replicates), out=out, progress=Progress(),
                             scheduler=address, same_host_ok=True)
    t = time.perf_counter() - t0
    n = sum(outcome.counts.values())
    want = replicates * CELLS[0] * CELLS[1]
    if n != want or outcome.counts.get("ok") != want:
        raise SystemExit(f"{method}: {outcome.counts} recorded, {want} ok runs expected")
    return t


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--small", type=int, default=2, help="replicates of the small experiment")
    ap.add_argument("--large", type=int, default=32, help="replicates of the large experiment")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    per_block = CELLS[0] * CELLS[1]
    extra_runs = (args.large - args.small) * per_block
    load_before = os.getloadavg()
    with tempfile.TemporaryDirectory(prefix="bh-cluster-cost-") as tmp:
        workdir = Path(tmp)
        log = open(workdir / "cluster.log", "w")
        procs = []
        try:
            addr1, p1 = start_cluster(workdir, 1, log)
            procs += p1
            addr2, p2 = start_cluster(workdir, 2, log)
            procs += p2
            methods = {"local": None, "cluster-1": addr1, "cluster-2": addr2}
            one("cluster-1", 1, addr1, workdir)   # first contact (imports on the workers)
            one("cluster-2", 1, addr2, workdir)
            slopes: dict[str, list[float]] = {m: [] for m in methods}
            for _ in range(args.rounds):
                for m, addr in methods.items():
                    small = one(m, args.small, addr, workdir)
                    large = one(m, args.large, addr, workdir)
                    slopes[m].append((large - small) / extra_runs)
        finally:
            stop(procs)
            log.close()
    load_after = os.getloadavg()
    ms = {m: statistics.median(v) * 1e3 for m, v in slopes.items()}
    res = {
        "runs_per_block": per_block, "extra_runs": extra_runs, "rounds": args.rounds,
        "ms_per_run": ms, "ms_per_run_all": {m: [x * 1e3 for x in v] for m, v in slopes.items()},
        "cluster1_vs_local": ms["cluster-1"] / ms["local"],
        "two_workers_speedup": ms["cluster-1"] / ms["cluster-2"],
        "load_before": load_before, "load_after": load_after, "cpus": os.cpu_count(),
    }
    if args.json:
        print(json.dumps(res, indent=1))
        return
    print(f"/bin/true, blocks of {per_block} runs, cost per run = slope between "
          f"{args.small} and {args.large} replicates ({extra_runs} runs), median of "
          f"{args.rounds} interleaved rounds; load average {load_before[0]:.2f} -> "
          f"{load_after[0]:.2f} on {os.cpu_count()} CPUs")
    for m in methods:
        each = ", ".join(f"{x * 1e3:.2f}" for x in slopes[m])
        print(f"  {m:10s} {ms[m]:6.2f} ms per run   (rounds: {each})")
    print(f"cluster with one worker: x{res['cluster1_vs_local']:.2f} the local cost per run "
          "(target: <= 2 ms per run)")
    print(f"two workers: x{res['two_workers_speedup']:.2f} the throughput of one "
          "(target >= 1.8 on hosts that do not share cores)")


if __name__ == "__main__":
    main()
