"""How long the report of a 10,000-run, four-factor experiment takes to draw (invented data).

Scenario (invented): a message queue's consumer is timed over four settings —
batch size (3), compression (3), prefetch (4) and consumer threads (5), a
3×3×4×5 full factorial (180 cells) — with lognormal noise, a small drift over the
run order and a few failed runs. The table is analysed once (not timed), then the
whole report is drawn: figures (PNG and SVG), HTML and Markdown, written to disk.

Usage: python experiments/bench/report_speed.py [--runs 10000] [--repeat 3] [--out DIR]
Prints the time of each step and the total per repeat (imports excluded: one warm-up
render first), and the CPU time, which a busy shared machine inflates less than the
wall-clock time. The target is under 10 seconds for 10,000 runs.
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


def render(df: pd.DataFrame, analysis, out: Path) -> dict:
    from benchharness.report.data import collect
    from benchharness.report.figures import make_figures
    from benchharness.report.html import write_html
    from benchharness.report.markdown import write_markdown

    t = {}
    c0 = time.process_time()
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
    t["CPU time"] = time.process_time() - c0
    t["figures drawn"] = len(figs.figures)
    return t


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=10_000)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--out", type=Path, default=None)
    args = ap.parse_args(argv)
    from benchharness import analyze

    df = make_runs(args.runs)
    analysis = analyze(df, factors=list(FACTORS))
    out = args.out or Path(tempfile.mkdtemp(prefix="report-speed-"))
    render(df, analysis, out)            # warm-up: imports, font cache
    totals, cpu = [], []
    for i in range(args.repeat):
        t = render(df, analysis, out)
        totals.append(t["total"])
        cpu.append(t["CPU time"])
        print(f"repeat {i + 1}: " + ", ".join(
            f"{k} {v:.2f} s" if isinstance(v, float) else f"{k} {v}" for k, v in t.items()))
    import os

    print(f"{args.runs:,} runs, {len(FACTORS)} factors, 180 cells: median total "
          f"{np.median(totals):.2f} s wall, {np.median(cpu):.2f} s CPU (target < 10 s); "
          f"load average {os.getloadavg()[0]:.1f}; report in {out}")
    return 0 if np.median(totals) < 10 else 1


if __name__ == "__main__":
    raise SystemExit(main())
