"""Writing small results folders for the history tests, following the DESIGN.md contract.

Invented data: the values are planted by the tests, so the truth is known by construction.
"""

from __future__ import annotations

import csv
import itertools
import json
from datetime import datetime, timedelta, timezone
from pathlib import Path

RUN_COLUMNS = ["run", "position", "block", "replicate"]
AFTER = ["status", "exit_code", "wall_s", "user_s", "sys_s", "max_rss_kib", "minor_faults",
         "major_faults", "voluntary_switches", "involuntary_switches", "in_blocks", "out_blocks",
         "started_at", "message"]

# keys as benchharness.measure.host.collect_facts writes them
HOST_A = {"hostname": "ci-runner-7", "cpu_model": "Example CPU 3000", "physical_cores": 2,
          "logical_cores": 2, "memory_bytes": 8589934592, "memory_available_bytes": 4000000000,
          "os": "Linux", "kernel": "6.1.0", "machine": "x86_64", "python": "3.11.7",
          "python_implementation": "CPython", "load_average_start": [0.4, 0.3, 0.2],
          "memory_pressure": {"some": {"avg10": 0.0}}, "cpu_mhz_now": 2400.0}
HOST_B = dict(HOST_A, cpu_model="Example CPU 4000")


def write_folder(path: Path, experiment: str, factors: dict[str, list[str]],
                 values: dict[tuple, list[float]], host: dict | None = None,
                 warmup: bool = True, failed: int = 0, start: datetime | None = None) -> Path:
    """Write a results folder; ``values[(level, ...)]`` are the wall_s of each timed run."""
    path.mkdir(parents=True, exist_ok=True)
    lines = [f"experiment: {experiment}", "command: [python3, -c, 'pass']", "factors:"]
    for f, levels in factors.items():
        lines.append(f"  {f}: [{', '.join(levels)}]")
    reps = max(len(v) for v in values.values())
    lines += [f"replicates: {reps}", "seed: 1", ""]
    (path / "experiment.yaml").write_text("\n".join(lines), encoding="utf-8")
    names = list(factors)
    t0 = start or datetime(2026, 11, 30, 12, 0, tzinfo=timezone.utc)
    rows = []
    run = 0
    cells = list(itertools.product(*factors.values()))
    if warmup:
        for cell in cells:
            rows.append(dict(levels=cell, status="warmup", wall_s=0.5, replicate=0))
    for cell in cells:
        for r, v in enumerate(values.get(cell, [])):
            rows.append(dict(levels=cell, status="ok", wall_s=v, replicate=r + 1))
    for i in range(failed):
        rows.append(dict(levels=cells[0], status="failed", wall_s=0.01, replicate=99 + i))
    recs = []
    for pos, row in enumerate(rows):
        run += 1
        started = (t0 + timedelta(seconds=pos)).isoformat(timespec="microseconds")
        rec = {"run": run, "position": pos, "block": 0, "replicate": row["replicate"]}
        rec.update(dict(zip(names, row["levels"])))
        rec.update(status=row["status"], exit_code=0 if row["status"] != "failed" else 1,
                   wall_s=row["wall_s"], user_s=row["wall_s"] * 0.9, sys_s=0.01,
                   max_rss_kib=10240, minor_faults=100, major_faults=0, voluntary_switches=3,
                   involuntary_switches=1, in_blocks=0, out_blocks=0, started_at=started,
                   message="" if row["status"] != "failed" else "exit code 1")
        recs.append(rec)
    with open(path / "runs.csv", "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=RUN_COLUMNS + names + AFTER)
        w.writeheader()
        for rec in recs:
            w.writerow(rec)
    with open(path / "runs.jsonl", "w", encoding="utf-8") as fh:
        for rec in recs:
            j = {k: v for k, v in rec.items() if k not in names}
            j["levels"] = {n: rec[n] for n in names}
            fh.write(json.dumps(j) + "\n")
    (path / "host.json").write_text(json.dumps(host or HOST_A), encoding="utf-8")
    return path
