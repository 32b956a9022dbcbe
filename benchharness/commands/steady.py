"""`benchharness steady FOLDER`: warm-up, steady state and how many runs × iterations."""

from __future__ import annotations

import json


def add_parser(sub) -> None:
    from benchharness.commands import options as O

    p = sub.add_parser("steady", help="how runs warm up, and runs × iterations advice",
                       description="For an experiment with a `samples:` section: per cell, how "
                                   "the runs warmed up, the steady-state time, the variance "
                                   "between runs and between iterations, and how many runs × "
                                   "iterations reach a target precision at least cost.",
                       epilog=O.examples(
                           "benchharness run experiments/warm-cache.yaml --out results/warm  # "
                           "an experiment with a samples: section",
                           "benchharness steady results/warm  # warm-up and steady state per "
                           "cell, and how many runs × iterations to use",
                           "benchharness steady results/warm --target 0.5% --json  # aim "
                           "tighter; the advice as one JSON document"))
    p.add_argument("folder", metavar="FOLDER", help="results folder")
    p.add_argument("--target", default=None, metavar="PCT",
                   type=O.percent(0.0, 1.0, low_open=True),
                   help="relative half-width of the 95%% confidence interval to aim at, e.g. "
                        "1%% (default: the experiment's samples: target, else 1%%)")
    O.add_json(p, "the advice")
    p.set_defaults(func=main)


def _fmt_s(x) -> str:
    from benchharness.numbers import fmt_seconds

    return fmt_seconds(x)


def main(args) -> int:
    from pathlib import Path

    from benchharness.results import journal as J
    from benchharness.errors import DataError
    from benchharness.experiment.file import load_experiment
    from benchharness.measure.quality import quality_config
    from benchharness.measure.steady.samples import cell_advice, read_samples_records

    folder = Path(args.folder)
    if not J.is_results_folder(folder):
        raise DataError(f"{folder}: not a results folder (needs experiment.yaml and runs.jsonl)")
    exp = load_experiment(folder / "experiment.yaml")
    cfg = quality_config(exp).samples
    if not (folder / "samples.jsonl").exists():
        raise DataError(f"{folder}: no samples.jsonl; the experiment needs a `samples:` section "
                        "and a command that prints per-iteration times")
    target = cfg.target_rel_halfwidth if cfg else 0.01
    if args.target is not None:
        target = args.target
    records = J.read_journal(folder / "runs.jsonl")
    samples = {k: v for k, v in read_samples_records(folder / "samples.jsonl").items()
               if not v.get("warmup")}
    cells = cell_advice(records, samples, exp.factor_names, target)
    from benchharness.numbers import plural
    if args.json or args.json_out:
        from benchharness.commands.options import emit_json, wants_json_only

        emit_json(args, json.dumps({"target_rel_halfwidth": target, "cells": cells}, indent=1))
        if wants_json_only(args):
            return 0
    print(f"{exp.name}: steady state per cell (aim: 95% interval within ±{target:.1%} of the "
          "mean)\n")
    for c in cells:
        label = " ".join(f"{k}={v}" for k, v in c["levels"].items()) or "(single cell)"
        shapes = "; ".join(f"{n} {k}" for k, n in sorted(c["shapes"].items()))
        print(f"{label}: {c['cell_shape'] or 'no samples'} — {plural(c['runs'], 'run')} "
              f"({shapes})")
        if "advice" not in c:
            print(f"  {c['note']}")
            continue
        comp, adv = c["components"], c["advice"]
        mean = comp["mean_s"] or float("nan")
        sd_runs = comp["between_execution_var_s2"] ** 0.5
        sd_iter = comp["within_execution_var_s2"] ** 0.5
        from benchharness.numbers import pick_scale

        one = pick_scale("s", [comp["mean_s"]] if comp["mean_s"] else [])  # one unit: the mean's
        print(f"  steady iteration time {one.fmt(comp['mean_s'])}; spread between runs "
              f"{one.fmt(sd_runs)} ({sd_runs / mean:.0%}), between iterations "
              f"{one.fmt(sd_iter)} ({sd_iter / mean:.0%}) "
              f"(from {plural(comp['executions'], 'run')} × "
              f"{plural(comp['iterations'], 'steady iteration')})")
        print(f"  a run costs {_fmt_s(c['cost_execution_s'])} before its steady iterations, "
              f"an iteration {_fmt_s(c['cost_iteration_s'])}")
        verdict = "reaches" if adv["reached"] else "does not reach"
        print(f"  advice: {plural(adv['executions'], 'run')} × "
              f"{plural(adv['iterations'], 'steady iteration')} "
              f"(about {_fmt_s(adv['cost_s'])}) {verdict} ±{adv['rel_halfwidth']:.2%}")
        if adv.get("note"):
            print(f"  note: {adv['note']}")
    return 0
