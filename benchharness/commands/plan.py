"""`benchharness plan FILE`: show what an experiment will run, without running it."""

from __future__ import annotations

import json
import sys


def add_parser(sub) -> None:
    p = sub.add_parser("plan", help="show the planned runs of an experiment file",
                       description="Expand an experiment file into its planned runs and show "
                                   "them (nothing is executed).")
    p.add_argument("file", help="experiment file (YAML)")
    p.add_argument("--json", action="store_true", help="print the plan as JSON")
    p.add_argument("--seed", type=int, default=None, help="override the file's seed")
    p.add_argument("--show", type=int, default=12, metavar="N",
                   help="how many runs of the execution order to list (default 12)")
    p.set_defaults(func=main)


def main(args) -> int:
    from benchharness.experiment import load_experiment
    from benchharness.design import build_plan

    exp = load_experiment(args.file)
    from benchharness.quality import quality_config

    quality_config(exp)  # expect / metrics / samples / perf sections: errors before any run
    for w in exp.warnings:
        print(f"warning: {w}", file=sys.stderr)
    plan = build_plan(exp, seed=args.seed)
    if args.json:
        json.dump(plan.to_json_dict(), sys.stdout, indent=1)
        sys.stdout.write("\n")
        return 0
    print(format_plan(exp, plan, show=args.show))
    return 0


def format_plan(exp, plan, show: int = 12) -> str:
    lines = [f"experiment  {exp.name}"]
    if exp.about:
        lines.append(f"question    {exp.about}")
    lines.append("factors")
    width = max(len(f.name) for f in exp.factors)
    for f in exp.factors:
        lines.append(f"  {f.name:<{width}}  {len(f.levels)} levels: "
                     + ", ".join(f.labels))
    seed_note = "" if exp.seed is not None else " (drawn now; set seed: in the file to fix it)"
    lines.append(f"cells       {plan.cells}")
    lines.append(f"timed runs  {plan.timed_runs} ({exp.replicates} per cell)")
    lines.append(f"warm-up     {plan.warmup_runs} untimed runs")
    lines.append(f"order       {plan.order}, seed {plan.seed}{seed_note}")
    from benchharness.design.spec import DESIGN_INFO_KEYS, describe_info

    lines.extend(describe_info(plan.info))
    for key, value in plan.info.items():
        if key not in DESIGN_INFO_KEYS and isinstance(value, (str, int, float)):
            lines.append(f"{key:<11} {value}")
    n = min(show, len(plan.runs))
    if n:
        lines.append(f"first {n} of {len(plan.runs)} runs in execution order")
        names = list(plan.factors)
        header = ["#", "run", "block", "rep", *names]
        rows = [[str(r.position), str(r.run), str(r.block),
                 "warm-up" if r.warmup else str(r.replicate),
                 *(r.levels[f] for f in names)] for r in plan.runs[:n]]
        widths = [max(len(h), *(len(row[i]) for row in rows)) for i, h in enumerate(header)]
        lines.append("  " + "  ".join(h.ljust(w) for h, w in zip(header, widths)))
        for row in rows:
            lines.append("  " + "  ".join(c.ljust(w) for c, w in zip(row, widths)))
    return "\n".join(lines)
