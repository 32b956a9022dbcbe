"""How long the report of a 10,000-run, four-factor experiment takes to draw (invented data),
as a ratio to a plain pandas + matplotlib script drawing the same figures.

Scenario (invented): a message queue's consumer is timed over four settings —
batch size (3), compression (3), prefetch (4) and consumer threads (5), a
3×3×4×5 full factorial (180 cells) — with lognormal noise, a small drift over the
run order and a few failed runs. The table is written to a CSV once. Then, in
turn, two separate processes read it:

* ours (``--child``): analyses it (not timed), draws the whole report once as a
  warm-up, then times drawing it again: figures (PNG and SVG), HTML and Markdown,
  written to disk;
* the reference (``report_reference.py``, imports nothing from benchharness):
  draws the same figures with plain pandas + matplotlib calls, PNG and SVG, and
  a Markdown page, after the same warm-up.

The pairs alternate which process goes first and are repeated; the load average
is recorded before each pair. Wall-clock time on a busy shared machine moves with
the other load, so the CPU time of each process is reported beside it; the
verdict uses the median of the per-pair wall-clock ratios.

Usage: python experiments/bench/report_speed.py [--runs 10000] [--repeat 5] [--out DIR]
Exit 0 when the median ratio is at most 1.0 (the target), else 1.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

FACTORS = {"batch": ["1", "32", "256"], "compression": ["none", "lz4", "zstd"],
           "prefetch": ["1", "10", "100", "1000"], "threads": ["1", "2", "4", "8", "16"]}


def make_runs(n: int, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    sizes = [len(v) for v in FACTORS.values()]
    codes = [rng.integers(0, k, n) for k in sizes]
    eff = [rng.normal(0, 0.25, k) for k in sizes]
    logy = np.log(0.004) + sum(e[c] for e, c in zip(eff, codes))
    logy += 0.05 * np.arange(n) / n + rng.normal(0, 0.12, n)
    df = pd.DataFrame({name: np.asarray(levels)[c]
                       for (name, levels), c in zip(FACTORS.items(), codes)})
    df.insert(0, "run", np.arange(n))
    df.insert(1, "position", rng.permutation(n))
    df["status"] = np.where(rng.random(n) < 0.002, "failed", "ok")
    df["wall_s"] = np.exp(logy)
    return df.sort_values("position").reset_index(drop=True)


def _cpu_s() -> float:
    """CPU time of this process and of its finished children (figures drawn in parallel)."""
    import os

    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


def render(df: pd.DataFrame, analysis, out: Path) -> dict:
    from benchharness.report.data import collect
    from benchharness.report.figures import make_figures
    from benchharness.report.html import write_html
    from benchharness.report.markdown import write_markdown

    t = {}
    c0 = _cpu_s()
    t0 = time.perf_counter()
    data = collect(df, analysis=analysis, factors=list(FACTORS))
    t["gather (residuals, Box-Cox profile)"] = time.perf_counter() - t0
    t1 = time.perf_counter()
    figs = make_figures(data)
    t["figures (draw PNG + SVG)"] = time.perf_counter() - t1
    t2 = time.perf_counter()
    figs.save(out)
    write_html(data, figs, out / "report.html")
    write_markdown(data, figs, out / "report.md")
    t["write figures, HTML, Markdown"] = time.perf_counter() - t2
    t["total"] = time.perf_counter() - t0
    t["CPU time"] = _cpu_s() - c0
    t["figures drawn"] = len(figs.figures)
    return t


def child(csv: Path, out: Path) -> dict:
    """Our side, in its own process: read the CSV, analyse (untimed), draw twice, time the
    second drawing."""
    from benchharness import analyze

    df = pd.read_csv(csv, dtype={f: str for f in FACTORS})
    analysis = analyze(df, factors=list(FACTORS))
    render(df, analysis, out)            # warm-up: imports, font cache
    t = render(df, analysis, out)
    return {"wall_s": t["total"], "cpu_s": t["CPU time"], "figures": t["figures drawn"],
            "steps": {k: v for k, v in t.items() if k not in ("total", "CPU time")}}


def _timed(cmd) -> dict:
    import json
    import subprocess

    done = subprocess.run(cmd, capture_output=True, text=True, check=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    import json
    import os

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=10_000)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--out", type=Path, default=None)
    ap.add_argument("--child", nargs=2, metavar=("CSV", "OUT"), type=Path,
                    help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        print(json.dumps(child(*args.child)))
        return 0
    out = args.out or Path(tempfile.mkdtemp(prefix="report-speed-"))
    out.mkdir(parents=True, exist_ok=True)
    csv = out / "runs.csv"
    make_runs(args.runs).to_csv(csv, index=False)
    here = Path(__file__).resolve().parent
    ours_cmd = [sys.executable, str(here / "report_speed.py"), "--child", str(csv),
                str(out / "ours")]
    ref_cmd = [sys.executable, str(here / "report_reference.py"), str(csv), str(out / "ref"),
               "--factors", ",".join(FACTORS)]
    rows = []
    for i in range(args.repeat):
        load = os.getloadavg()[0]
        pair = {}
        for who in (("ours", "ref") if i % 2 == 0 else ("ref", "ours")):
            pair[who] = _timed(ours_cmd if who == "ours" else ref_cmd)
        rows.append((load, pair))
        print(f"pair {i + 1} (load {load:.1f}): ours {pair['ours']['wall_s']:.2f} s wall "
              f"{pair['ours']['cpu_s']:.2f} s CPU, reference {pair['ref']['wall_s']:.2f} s wall "
              f"{pair['ref']['cpu_s']:.2f} s CPU, ratio "
              f"{pair['ours']['wall_s'] / pair['ref']['wall_s']:.2f}", flush=True)
    ratio = float(np.median([p["ours"]["wall_s"] / p["ref"]["wall_s"] for _, p in rows]))
    cpu_ratio = float(np.median([p["ours"]["cpu_s"] / p["ref"]["cpu_s"] for _, p in rows]))
    loads = [load for load, _ in rows]
    steps = rows[-1][1]["ours"]["steps"]
    print(f"{args.runs:,} runs, {len(FACTORS)} factors, 180 cells, {args.repeat} interleaved "
          f"pairs: report / plain script = {ratio:.2f}× wall-clock (median of pairs), "
          f"{cpu_ratio:.2f}× CPU time; load average {min(loads):.1f}–{max(loads):.1f}; "
          f"our steps (last pair): " + ", ".join(
              f"{k} {v:.2f} s" if isinstance(v, float) else f"{k} {v}" for k, v in steps.items()))
    return 0 if ratio <= 1.0 else 1


if __name__ == "__main__":
    raise SystemExit(main())
