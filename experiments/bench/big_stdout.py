"""Memory of the harness when a command floods stdout.

Runs the same one-cell experiment twice, each in a fresh Python process so the
peaks do not mix: once with a command that writes 1 GiB to stdout
(``head -c 1073741824 /dev/zero``) and once with a command that prints nothing
(``head -c 0 /dev/zero``). Each process reports its own peak resident size
(``getrusage(RUSAGE_SELF).ru_maxrss``, KiB on Linux — common practice) and the
launcher's (``VmHWM`` in ``/proc/<pid>/status``). Target: the loud run adds less
than 50 MB to the harness's peak.

    python experiments/bench/big_stdout.py [--bytes N] [--json]
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


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--bytes", type=int, default=1 << 30, help="bytes the loud command writes")
    ap.add_argument("--json", action="store_true")
    ap.add_argument("--child", nargs=2, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        child(int(args.child[0]), args.child[1])
        return 0
    quiet = measure(0)
    loud = measure(args.bytes)
    added_mb = (loud["harness_peak_kib"] - quiet["harness_peak_kib"]) * 1024 / 1e6
    res = {"quiet": quiet, "loud": loud, "added_harness_peak_mb": added_mb,
           "target_mb": 50, "within_target": added_mb < 50}
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
    return 0


if __name__ == "__main__":
    sys.exit(main())
