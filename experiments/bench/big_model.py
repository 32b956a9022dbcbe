"""Cost of `analyze` on designs with far more possible cells than runs (invented data).

Three scenarios of our own invention, each written as a tidy CSV and analysed by
``python -m benchharness analyze`` in a separate process, whose wall time and
peak resident memory (``ru_maxrss`` of the child) are recorded with the load
average at the start:

* ``partial``: a key-value store tuned over 5 settings of 10 levels each
  (100,000 cells, 2 replicates planned in random order) that stopped after
  5,010 runs — most cells never ran;
* ``twolevel``: 10 on/off switches of a compiler, 200 runs (1,024 cells);
  analysed with the default model and with ``--model 2``;
* ``manylevels``: one factor with 5,000 levels (input files), 2 runs each.

Usage: python experiments/bench/big_model.py [--case partial|twolevel|manylevels|all]
       [--model SPEC] [--timeout 600] [--limit-mb 3000] [--tree DIR] [--keep DIR]
Prints one line per case: wall seconds, peak MB, exit code, load average, and
the lines of the output that say what was fitted.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402


def _write(path: Path, names, codes, y, status=None):
    import pandas as pd

    df = pd.DataFrame({n: np.char.add("v", c.astype(str)) for n, c in zip(names, codes)})
    df["run"] = np.arange(len(y))
    df["status"] = "ok" if status is None else status
    df["wall_s"] = y
    df.to_csv(path, index=False)


def partial(path: Path, rows: int = 5010, seed: int = 7):
    """5 factors x 10 levels, 2 replicates in random order, stopped after ``rows`` runs."""
    rng = np.random.default_rng(seed)
    names = ["threads", "cache", "batch", "compaction", "bloom"]
    cells = np.repeat(np.arange(10 ** 5), 2)
    order = rng.permutation(cells)[:rows]
    codes = [(order // 10 ** (4 - j)) % 10 for j in range(5)]
    eff = [rng.normal(0, 0.2, 10) for _ in names]
    logy = np.log(0.05) + sum(e[c] for e, c in zip(eff, codes)) + rng.normal(0, 0.05, rows)
    _write(path, names, codes, np.exp(logy))
    return names


def twolevel(path: Path, rows: int = 200, seed: int = 8):
    """10 two-level factors, ``rows`` runs at random cells."""
    rng = np.random.default_rng(seed)
    names = [f"flag{j}" for j in range(10)]
    codes = [rng.integers(0, 2, rows) for _ in names]
    logy = np.log(1.0) + 0.1 * codes[0] - 0.05 * codes[3] + rng.normal(0, 0.05, rows)
    _write(path, names, codes, np.exp(logy))
    return names


def manylevels(path: Path, levels: int = 5000, reps: int = 2, seed: int = 9):
    """One factor with ``levels`` levels, ``reps`` runs each."""
    rng = np.random.default_rng(seed)
    code = np.repeat(np.arange(levels), reps)
    logy = np.log(0.3) + rng.normal(0, 0.1, levels)[code] + rng.normal(0, 0.05, code.size)
    _write(path, ["input"], [code], np.exp(logy))
    return ["input"]


CASES = {"partial": (partial, [[]]), "twolevel": (twolevel, [[], ["--model", "2"]]),
         "manylevels": (manylevels, [[]])}


def measure(csv: Path, extra, timeout: float, limit_mb: float, tree=ROOT):
    """Run ``analyze`` in a child; return (wall s, peak MB, exit code, output, load)."""
    cmd = [sys.executable, "-m", "benchharness", "analyze", str(csv), *extra]

    def cap():  # the shared machine must survive the unfixed code
        lim = int(limit_mb * 2 ** 20)
        resource.setrlimit(resource.RLIMIT_AS, (lim, lim))

    load = os.getloadavg()[0]
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, cwd=tree, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                            text=True, preexec_fn=cap)
    try:
        out, _ = proc.communicate(timeout=timeout)
        rc = proc.returncode
    except subprocess.TimeoutExpired:
        proc.kill()
        out, _ = proc.communicate()
        rc = "timeout"
    wall = time.perf_counter() - t0
    # the only child reaped so far in this process: its peak RSS (KiB on Linux)
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    return wall, peak, rc, out, load


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--case", default="all", choices=[*CASES, "all"])
    ap.add_argument("--model", default=None, help="analyse only with this --model")
    ap.add_argument("--timeout", type=float, default=600.0)
    ap.add_argument("--keep", default=None, help="write the CSVs into this folder")
    ap.add_argument("--tree", default=str(ROOT),
                    help="source tree whose benchharness is measured (e.g. an exported "
                         "older commit, for a before/after figure)")
    ap.add_argument("--limit-mb", type=float, default=3000.0,
                    help="address-space limit of the analysing process (MB)")
    args = ap.parse_args(argv)
    names = list(CASES) if args.case == "all" else [args.case]
    folder = Path(args.keep or tempfile.mkdtemp(prefix="bh-bigmodel-"))
    folder.mkdir(parents=True, exist_ok=True)
    for name in names:
        make, variants = CASES[name]
        csv = folder / f"{name}.csv"
        fnames = make(csv)
        if args.model is not None:
            variants = [["--model", args.model]]
        for extra in variants:
            extra = ["--factors", ",".join(fnames), *extra]
            # a fresh interpreter per measurement, so ru_maxrss is this child's alone
            code = ("import sys; sys.path.insert(0, %r); from experiments.bench.big_model "
                    "import measure; from pathlib import Path; w, p, rc, out, load = "
                    "measure(Path(%r), %r, %r, %r, %r); print(repr((w, p, rc, load))); print(out)"
                    % (str(ROOT), str(csv), extra, args.timeout, args.limit_mb, args.tree))
            res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                                 cwd=ROOT)
            head, _, out = res.stdout.partition("\n")
            w, p, rc, load = eval(head)  # our own repr above
            said = [ln.strip() for ln in out.splitlines()
                    if "parameters" in ln or "cannot" in ln or "same value" in ln][:3]
            print(f"{name:10s} {' '.join(extra[2:]) or '(default)':12s} wall {w:7.2f} s  "
                  f"peak {p:8.1f} MB  exit {rc}  load {load:.2f}")
            for s in said:
                print("    " + s)


if __name__ == "__main__":
    main()
