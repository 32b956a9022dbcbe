"""Start-up cost of the commands, and `analyze` of a large CSV end to end (invented data).

Two sections, each a set of commands run in separate processes, interleaved
(one of each in turn) and repeated; the medians of wall time and of CPU time
(user + system of the child) are printed with the ratios to a reference run in
the same session, and the load average before and after:

* ``startup`` (issue 18 item 3): ``python -c pass``, ``python -c "import pandas"``
  (the reference), ``benchharness --help``, ``benchharness plan`` of the demo,
  ``benchharness analyze`` of a 100-row CSV (an invented codec × level timing
  table), ``benchharness report`` of a copy of the committed example folder
  (``results/example-archive-codecs``: 12 figures as PNG and SVG, HTML, Markdown),
  and ``report --no-figures``-like cost is not separated: drawing is part of it;
  beside it the **floor** of that report: ``report_reference.py --once``, a plain
  pandas + matplotlib script (nothing from this project) drawing the same figures
  as PNG and SVG from the example's ``runs.csv``, timed as a whole process like
  the commands (start-up, imports, reading, drawing, writing).
* ``big`` (issue 18 item 2): ``benchharness analyze`` of a 1,000,000-row CSV with
  ``--json-out FILE`` (start-up, read, analysis, the JSON file, and the terminal
  report, which ``--json-out`` prints too) against the analysis call alone
  (``benchharness.analysis.analyze`` on the table already in memory, in a process
  that has read it, imported the library and analysed another, small table first:
  the second call on the *same* table would find the per-process cache of critical
  values of the comparisons with the best filled, which no ``analyze`` command
  finds), and the
  **floor**: a minimal script in its own process doing only the unavoidable part of
  the same work (start Python, import pandas, read the CSV with pandas' fastest
  plain call, factor columns as categories, one analysis call, nothing printed or
  written). Its ratio to the call alone is the least any command built on pandas
  and this analysis could show.

Python's compiled bytecode: by default the children run as the environment says
(with ``PYTHONDONTWRITEBYTECODE=1``, as on the development machine, every process
compiles the project's modules again: about 0.1 s of CPU for ``analyze``);
``--cached-bytecode`` keeps it between runs, as an installed copy has it
(``PYTHONPYCACHEPREFIX`` in the temporary folder, filled by one untimed run of each
command). The condition is printed with the figures.

Usage: python experiments/bench/startup.py [--sections startup,big] [--repeat 5]
       [--rows 1000000] [--tree DIR] [--cached-bytecode]
``--tree DIR`` measures the benchharness checked out in DIR (before/after figures).
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def timed(argv, env, cwd) -> tuple[float, float, int]:
    """Wall and CPU seconds of one child process, and its exit code."""
    before = os.times()
    t0 = time.perf_counter()
    r = subprocess.run(argv, env=env, cwd=cwd, stdout=subprocess.DEVNULL,
                       stderr=subprocess.DEVNULL)
    wall = time.perf_counter() - t0
    after = os.times()
    cpu = (after.children_user - before.children_user) + (after.children_system
                                                           - before.children_system)
    return wall, cpu, r.returncode


def small_csv(path: Path) -> Path:
    import numpy as np

    rng = np.random.default_rng(5)
    lines = ["codec,level,wall_s"]
    for i in range(100):
        codec, level = ("zlib", "bz2")[i % 2], ("1", "9")[(i // 2) % 2]
        y = 0.2 * (1.3 if codec == "bz2" else 1.0) * float(np.exp(rng.normal(0, 0.1)))
        lines.append(f"{codec},{level},{y:.6f}")
    path.write_text("\n".join(lines) + "\n")
    return path


def bytecode_condition(env) -> str:
    """How the children get their bytecode, in words (printed with the figures)."""
    if env.get("PYTHONPYCACHEPREFIX"):
        return "bytecode cached between runs"
    if env.get("PYTHONDONTWRITEBYTECODE"):
        return "bytecode compiled in every process (PYTHONDONTWRITEBYTECODE=1)"
    return "bytecode as Python writes it (__pycache__)"


def warm_up(commands, env, cwd) -> None:
    """One untimed run of each command, to fill a bytecode cache."""
    for argv in commands:
        subprocess.run(argv, env=env, cwd=cwd, stdout=subprocess.DEVNULL,
                       stderr=subprocess.DEVNULL)


def run_section(name, commands, ref, repeat, env, cwd):
    if env.get("PYTHONPYCACHEPREFIX"):
        warm_up(commands.values(), env, cwd)
    load0 = os.getloadavg()[0]
    res = {k: [] for k in commands}
    for _ in range(repeat):
        for k, argv in commands.items():
            wall, cpu, rc = timed(argv, env, cwd)
            if rc != 0:
                print(f"  {k}: exit code {rc}", file=sys.stderr)
            res[k].append((wall, cpu))
    load1 = os.getloadavg()[0]
    rw = statistics.median(w for w, _ in res[ref])
    rc_ = statistics.median(c for _, c in res[ref])
    print(f"\n{name}: medians of {repeat} interleaved starts "
          f"(load average {load0:.1f} -> {load1:.1f}; {bytecode_condition(env)}); "
          f"ratios to {ref}")
    for k in commands:
        w = statistics.median(x for x, _ in res[k])
        c = statistics.median(x for _, x in res[k])
        print(f"  {k:34} wall {w:7.3f} s  (x{w / rw:5.2f})   cpu {c:7.3f} s  (x{c / rc_:5.2f})")
    return res


ALONE = """
import sys, time
import numpy as np
import pandas as pd
from benchharness.analysis import analyze
factors = sys.argv[2].split(",")
# imports and one-time set-up done on another, small table (made here: importing
# analysis_speed would put this checkout first on sys.path, whatever --tree says): a
# second call on the same table would find per-process caches (the critical values of
# the comparisons with the best, analysis/mcb.py) filled, which no analyze command finds
rng = np.random.default_rng(7)
small = pd.DataFrame({f: rng.choice(["a", "b", "c"], 300) for f in factors})
small["wall_s"] = np.exp(rng.normal(0, 0.1, 300))
analyze(small, factors=factors)
df = pd.read_csv(sys.argv[1], dtype={f: str for f in factors})
t0, c0 = time.perf_counter(), time.process_time()
analyze(df, factors=factors)
print(time.perf_counter() - t0, time.process_time() - c0)
"""


FLOOR = """
import sys
import pandas as pd
from benchharness.analysis import analyze
factors = sys.argv[2].split(",")
df = pd.read_csv(sys.argv[1], dtype={f: "category" for f in factors})
analyze(df, factors=factors)
"""


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--sections", default="startup,big")
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--tree", default=str(ROOT))
    ap.add_argument("--cached-bytecode", action="store_true",
                    help="keep compiled bytecode between runs, as an installed copy has it")
    a = ap.parse_args()
    tree = Path(a.tree).resolve()
    env = dict(os.environ, PYTHONPATH=str(tree))
    py = sys.executable
    bh = [py, "-m", "benchharness"]
    sections = a.sections.split(",")
    with tempfile.TemporaryDirectory(prefix="startup-") as tmp:
        work = Path(tmp)
        if a.cached_bytecode:
            env.pop("PYTHONDONTWRITEBYTECODE", None)
            env["PYTHONPYCACHEPREFIX"] = str(work / "bytecode")
        if "startup" in sections:
            csv = small_csv(work / "small.csv")
            example = work / "example"
            shutil.copytree(ROOT / "results" / "example-archive-codecs", example)
            commands = {
                "python -c pass": [py, "-c", "pass"],
                "python -c 'import pandas'": [py, "-c", "import pandas"],
                "benchharness --help": bh + ["--help"],
                "benchharness plan (demo)": bh + ["plan", str(ROOT / "experiments"
                                                        / "archive-codecs.yaml")],
                "benchharness analyze (100 rows)": bh + ["analyze", str(csv), "--factors",
                                                         "codec,level"],
                "benchharness report (example)": bh + ["report", str(example)],
                "floor: plain script, same figures": [
                    py, str(ROOT / "experiments" / "bench" / "report_reference.py"),
                    str(example / "runs.csv"), str(work / "reference"),
                    "--factors", "codec,level,corpus", "--once"],
            }
            run_section("startup", commands, "python -c 'import pandas'", a.repeat, env, work)
        if "big" in sections:
            sys.path.insert(0, str(ROOT / "experiments" / "bench"))
            from analysis_speed import FACTORS, make_data

            big = work / "big.csv"
            make_data(a.rows).to_csv(big, index=False)
            factors = ",".join(FACTORS)
            end_to_end = bh + ["analyze", str(big), "--factors", factors, "--json-out",
                               str(work / "a.json")]
            if a.cached_bytecode:
                warm_up([[py, "-c", FLOOR, str(big), factors], end_to_end,
                         [py, "-c", ALONE, str(big), factors]], env, work)
            load0 = os.getloadavg()[0]
            ends, end_cpu, alone, alone_cpu = [], [], [], []
            floor, floor_cpu = [], []
            for _ in range(a.repeat):
                w, c, rc = timed([py, "-c", FLOOR, str(big), factors], env, work)
                floor.append(w)
                floor_cpu.append(c)
                w, c, rc = timed(end_to_end, env, work)
                if rc != 0:
                    print(f"  analyze end to end: exit code {rc}", file=sys.stderr)
                ends.append(w)
                end_cpu.append(c)
                r = subprocess.run([py, "-c", ALONE, str(big), factors], env=env, cwd=work,
                                   capture_output=True, text=True)
                aw, ac = map(float, r.stdout.strip().splitlines()[-1].split())
                alone.append(aw)
                alone_cpu.append(ac)
            load1 = os.getloadavg()[0]
            e, al = statistics.median(ends), statistics.median(alone)
            ec, ac = statistics.median(end_cpu), statistics.median(alone_cpu)
            fl, fc = statistics.median(floor), statistics.median(floor_cpu)
            print(f"\nbig: {a.rows:,} rows, medians of {a.repeat} interleaved "
                  f"(load average {load0:.1f} -> {load1:.1f}; {bytecode_condition(env)})")
            print(f"  analyze end to end (start-up, read, analysis, JSON): {e:.3f} s, "
                  f"CPU {ec:.3f} s")
            print(f"  the analysis call alone:                             {al:.3f} s, "
                  f"CPU {ac:.3f} s")
            print(f"  the floor (a minimal script, see above):             {fl:.3f} s, "
                  f"CPU {fc:.3f} s")
            print(f"  ratio: x{e / al:.2f} wall, x{ec / ac:.2f} CPU (target <= 2); "
                  f"floor x{fl / al:.2f} wall, x{fc / ac:.2f} CPU")
            print(f"  the part outside the analysis call (end to end minus the call alone): "
                  f"CPU {ec - ac:.3f} s; the floor's: {fc - ac:.3f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
