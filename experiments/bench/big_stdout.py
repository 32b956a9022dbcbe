"""Memory and clock of the harness when a command floods stdout.

**Memory.** Runs the same one-cell experiment twice, each in a fresh Python
process so the peaks do not mix: once with a command that writes 1 GiB to
stdout (``head -c 1073741824 /dev/zero``) and once with a command that prints
nothing (``head -c 0 /dev/zero``). Each process reports its own peak resident
size (``getrusage(RUSAGE_SELF).ru_maxrss``, KiB on Linux — common practice) and
the launcher's (``VmHWM`` in ``/proc/<pid>/status``). Target: the loud run adds
less than 50 MB to the harness's peak.

**Clock.** The ``wall_s`` the harness records for the loud command, against
what a bare reader sees: a separate small process (``python -I -S``) that
spawns the same command with its stdout on a pipe of the default size, reads
it 64 KiB at a time until end of file, reaps it, and times that from before
the spawn to after the reap. ``--pairs`` harness runs (each a one-run
experiment through `run_experiment`) and bare runs alternate (ABBA); the
median of the per-pair ratios is reported. Target: <= 1.1.

    python experiments/bench/big_stdout.py [--bytes N] [--pairs 6] [--json]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def child(nbytes: int, out: str) -> None:
    sys.path.insert(0, str(ROOT))
    from benchharness.execute.local import LocalExecutor
    from benchharness.experiment.file import Experiment
    from benchharness.execute.runner import Progress, run_experiment

    text = (f"experiment: flood\ncommand: [head, -c, '{{n}}', /dev/zero]\nfactors:\n"
            f"  n: ['{nbytes}']\nreplicates: 2\nseed: 1\n")
    exp = Experiment.from_text(text)
    with LocalExecutor() as ex:
        outcome = run_experiment(exp, out=out, executor=ex, progress=Progress())
        with open(f"/proc/{ex.launcher_pid}/status") as f:
            hwm = next(int(line.split()[1]) for line in f if line.startswith("VmHWM"))
    runs = outcome.runs
    print(json.dumps({
        "bytes": nbytes,
        "status": sorted(set(runs["status"])),
        "wall_s": [float(w) for w in runs["wall_s"]],
        "harness_peak_kib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
        "launcher_peak_kib": hwm,
    }))


def measure(nbytes: int) -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        env = dict(os.environ, PYTHONPATH=str(ROOT))
        p = subprocess.run([sys.executable, __file__, "--child", str(nbytes), str(Path(tmp) / "r")],
                           capture_output=True, text=True, env=env, timeout=600)
        if p.returncode != 0:
            raise SystemExit(f"child failed: {p.stderr.strip()}")
        return json.loads(p.stdout.strip().splitlines()[-1])


BARE_READER = r"""
import os, sys, time
argv = sys.argv[1:]
r, w = os.pipe()
t0 = time.perf_counter_ns()
pid = os.posix_spawn(argv[0], argv, {"PATH": "/usr/bin:/bin"},
                     file_actions=[(os.POSIX_SPAWN_DUP2, w, 1)])
os.close(w)
read = os.read
while read(r, 65536):
    pass
os.wait4(pid, 0)
print(time.perf_counter_ns() - t0)
"""


def bare_reader(nbytes: int) -> float:
    """Wall seconds of the loud command under a bare 64 KiB pipe reader."""
    import shutil

    head = shutil.which("head", path="/usr/bin:/bin")
    p = subprocess.run([sys.executable, "-I", "-S", "-B", "-c", BARE_READER, head, "-c",
                        str(nbytes), "/dev/zero"], capture_output=True, text=True, check=True,
                       timeout=600)
    return int(p.stdout.strip()) / 1e9


def harness_run(nbytes: int, workdir: str) -> float:
    """The ``wall_s`` the harness records for the loud command (a one-run experiment)."""
    import time

    sys.path.insert(0, str(ROOT))
    from benchharness.execute.runner import Progress, run_experiment
    from benchharness.experiment.file import Experiment

    text = (f"experiment: flood\ncommand: [head, -c, '{{n}}', /dev/zero]\nfactors:\n"
            f"  n: ['{nbytes}']\nreplicates: 1\nseed: 1\nenv:\n  PATH: /usr/bin:/bin\n")
    outcome = run_experiment(Experiment.from_text(text),
                             out=Path(workdir) / f"clock-{time.time_ns()}", progress=Progress())
    return float(outcome.runs["wall_s"].iloc[0])


def clock(nbytes: int, pairs: int) -> dict:
    import statistics

    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        harness_run(1 << 20, tmp)  # imports and first-use costs
        for i in range(pairs):
            if i % 2 == 0:
                bare = bare_reader(nbytes)
                ours = harness_run(nbytes, tmp)
            else:
                ours = harness_run(nbytes, tmp)
                bare = bare_reader(nbytes)
            rows.append({"wall_s": ours, "bare_wall_s": bare, "ratio": ours / bare,
                         "load_1m": os.getloadavg()[0]})
    return {"pairs": rows, "median_ratio": statistics.median(r["ratio"] for r in rows),
            "target": 1.1}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--bytes", type=int, default=1 << 30, help="bytes the loud command writes")
    ap.add_argument("--pairs", type=int, default=6,
                    help="harness/bare-reader pairs for the clock (default 6; 0: skip)")
    ap.add_argument("--json", action="store_true")
    ap.add_argument("--child", nargs=2, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        child(int(args.child[0]), args.child[1])
        return 0
    quiet = measure(0)
    loud = measure(args.bytes)
    added_mb = (loud["harness_peak_kib"] - quiet["harness_peak_kib"]) * 1024 / 1e6
    load0 = os.getloadavg()[0]
    res = {"quiet": quiet, "loud": loud, "added_harness_peak_mb": added_mb,
           "target_mb": 50, "within_target": added_mb < 50, "load_1m": load0}
    if args.pairs:
        res["clock"] = clock(args.bytes, args.pairs)
    if args.json:
        print(json.dumps(res, indent=2))
    else:
        print(f"silent command: harness peak {quiet['harness_peak_kib'] / 1024:.1f} MiB, "
              f"launcher peak {quiet['launcher_peak_kib'] / 1024:.1f} MiB")
        print(f"{args.bytes / 2**30:g} GiB to stdout: harness peak "
              f"{loud['harness_peak_kib'] / 1024:.1f} MiB, launcher peak "
              f"{loud['launcher_peak_kib'] / 1024:.1f} MiB, runs {loud['status']} "
              f"wall_s {', '.join(f'{w:.2f}' for w in loud['wall_s'])}")
        print(f"added to the harness peak: {added_mb:.2f} MB (target < 50 MB)")
        if "clock" in res:
            c = res["clock"]
            print(f"clock: wall_s {args.bytes / 2**30:g} GiB to stdout vs a bare 64 KiB pipe "
                  f"reader, {len(c['pairs'])} alternating pairs: median ratio "
                  f"x{c['median_ratio']:.3f} (target <= 1.1); pairs "
                  + ", ".join(f"{r['wall_s']:.2f}/{r['bare_wall_s']:.2f} s" for r in c["pairs"])
                  + f"; load average {load0:.1f} -> {os.getloadavg()[0]:.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
