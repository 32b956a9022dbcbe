"""Start-up and memory of `benchharness run` on large plans (invented scenario).

Scenario (invented): a storage engine tuned over five settings of ten levels each
(100,000 cells, one replicate), every run a trivial ``/bin/true`` so that only
the harness's own cost shows. The same experiment with fewer levels
(``--small``: 2,000 cells by default) is the reference, run in the same session,
interleaved with the large one, ``--repeat`` times each.

For each start ``python -m benchharness run FILE --out DIR`` runs in a separate
process; the script records

* ``first_s``: from just before the process is started to the ``started_at`` of
  the first run in ``runs.jsonl`` (start-up, plan, folder, provenance, launcher);
* ``cpu_first_s``: the harness process's CPU time (user + system, /proc/PID/stat)
  when the first run is seen in the journal: less sensitive to a busy machine;
* ``rss_mb`` / ``hwm_mb``: the harness's resident and peak resident memory
  (``VmRSS`` / ``VmHWM`` of the harness process, not its launcher) once
  ``--runs`` runs are recorded;
* ``provenance_kb``: the size of ``provenance.json``.

Then the run is stopped with Ctrl-C (SIGINT) and the folder removed.

Usage: python experiments/bench/big_plan.py [--levels 10] [--small-levels 2,2,10,10,5]
       [--repeat 3] [--runs 2000] [--tree DIR]
``--tree DIR`` runs the benchharness checked out in DIR (for before/after figures).
Prints one line per start and a summary with medians, ratios and the load average.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import shutil
import signal
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def experiment(path: Path, sizes: list[int]) -> Path:
    names = "abcdefgh"[:len(sizes)]
    lines = ["experiment: big-plan",
             "about: invented scenario; a storage engine tuned over many settings",
             "command: [/bin/true" + "".join(f', "{{{n}}}"' for n in names) + "]",
             "factors:"]
    lines += [f"  {n}: [{', '.join(f'v{i}' for i in range(k))}]" for n, k in zip(names, sizes)]
    lines += ["replicates: 1", "seed: 3", "host_check: off"]
    path.write_text("\n".join(lines) + "\n")
    return path


def _status(pid: int) -> dict:
    out = {}
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            k, _, v = line.partition(":")
            if k in ("VmRSS", "VmHWM"):
                out[k] = int(v.split()[0]) / 1024
    except OSError:
        pass
    return out


def _cpu_s(pid: int) -> float | None:
    """User + system CPU seconds of a process so far (/proc/PID/stat)."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return None
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def one(tree: Path, exp: Path, work: Path, runs: int, timeout: float = 300.0) -> dict:
    out = work / "out"
    if out.exists():
        shutil.rmtree(out)
    env = dict(os.environ, PYTHONPATH=str(tree))
    t0 = time.time()
    p = subprocess.Popen([sys.executable, "-m", "benchharness", "run", str(exp), "--out",
                          str(out)], cwd=work, env=env, stdout=subprocess.DEVNULL,
                         stderr=subprocess.DEVNULL, start_new_session=True)
    journal = out / "runs.jsonl"
    first = cpu_first = None
    mem: dict = {}
    deadline = time.time() + timeout
    while time.time() < deadline and p.poll() is None:
        time.sleep(0.02)
        try:
            with open(journal, "rb") as fh:
                data = fh.read()
        except OSError:
            continue
        if first is None and b"\n" in data:
            cpu_first = _cpu_s(p.pid)
            rec = json.loads(data.split(b"\n", 1)[0])
            ts = dt.datetime.fromisoformat(rec["started_at"].replace("Z", "+00:00"))
            first = ts.timestamp() - t0
        if data.count(b"\n") >= runs:
            mem = _status(p.pid)
            break
    if p.poll() is None:
        mem = mem or _status(p.pid)
        os.killpg(p.pid, signal.SIGINT)
        try:
            p.wait(30)
        except subprocess.TimeoutExpired:
            os.killpg(p.pid, signal.SIGKILL)
            p.wait()
    prov = out / "provenance.json"
    res = {"first_s": first, "cpu_first_s": cpu_first, "rss_mb": mem.get("VmRSS"), "hwm_mb": mem.get("VmHWM"),
           "provenance_kb": prov.stat().st_size / 1024 if prov.exists() else None}
    shutil.rmtree(out, ignore_errors=True)
    return res


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--levels", default="10,10,10,10,10", help="levels per factor (large plan)")
    ap.add_argument("--small-levels", default="2,2,10,10,5", help="levels per factor (reference)")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--runs", type=int, default=2000,
                    help="runs recorded before memory is read and the run stopped")
    ap.add_argument("--tree", default=str(ROOT), help="benchharness checkout to measure")
    a = ap.parse_args()
    tree = Path(a.tree).resolve()
    big = [int(x) for x in a.levels.split(",")]
    small = [int(x) for x in a.small_levels.split(",")]
    load0 = os.getloadavg()[0]
    results: dict = {"large": [], "small": []}
    with tempfile.TemporaryDirectory(prefix="big-plan-") as tmp:
        work = Path(tmp)
        files = {"large": experiment(work / "large.yaml", big),
                 "small": experiment(work / "small.yaml", small)}
        cells = {"large": 1, "small": 1}
        for k in big:
            cells["large"] *= k
        for k in small:
            cells["small"] *= k
        for i in range(a.repeat):
            for name in ("small", "large"):
                r = one(tree, files[name], work, min(a.runs, cells[name]))
                results[name].append(r)
                print(f"{name:5} {cells[name]:>7} cells  first run after {r['first_s']:.3f} s "
                      f"(harness CPU {r['cpu_first_s'] or float('nan'):.2f} s)  "
                      f"rss {r['rss_mb'] or 0:.0f} MB (peak {r['hwm_mb'] or 0:.0f} MB)  "
                      f"provenance.json {r['provenance_kb'] or 0:.0f} KiB", flush=True)
    load1 = os.getloadavg()[0]

    def med(name, key):
        vals = [r[key] for r in results[name] if r[key] is not None]
        return statistics.median(vals) if vals else float("nan")

    print(f"\nmedians over {a.repeat} starts each (load average {load0:.1f} -> {load1:.1f}):")
    for name in ("small", "large"):
        print(f"  {name:5} {cells[name]:>7} cells: first run {med(name, 'first_s'):.3f} s "
              f"(harness CPU {med(name, 'cpu_first_s'):.2f} s), "
              f"harness peak {med(name, 'hwm_mb'):.0f} MB, "
              f"provenance.json {med(name, 'provenance_kb'):.0f} KiB")
    print(f"  large / small: first run x{med('large', 'first_s') / med('small', 'first_s'):.2f}, "
          f"peak memory x{med('large', 'hwm_mb') / med('small', 'hwm_mb'):.2f} "
          f"for x{cells['large'] / cells['small']:.0f} cells")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
