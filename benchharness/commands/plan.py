"""`benchharness plan FILE`: show what an experiment will run, without running it."""

from __future__ import annotations

import json
import sys


def add_parser(sub) -> None:
    from benchharness.commands import options as O

    p = sub.add_parser("plan", help="show the planned runs of an experiment file",
                       description="Expand an experiment file into its planned runs and show "
                                   "them (nothing is executed).",
                       epilog=O.examples(
                           "benchharness plan experiments/archive-codecs.yaml  # cells, runs, "
                           "seed and the first runs in execution order",
                           "benchharness plan experiments/archive-codecs.yaml --pilot "
                           "results/example-archive-codecs --budget 30m  # how long it takes, "
                           "and how many replicates fit in 30 minutes",
                           "benchharness plan experiments/archive-codecs.yaml --json  # the "
                           "plan as one JSON document"))
    p.add_argument("file", metavar="FILE", help="experiment file (YAML)")
    O.add_json(p, "the plan")
    p.add_argument("--seed", type=int, default=None, metavar="N",
                   help="override the file's seed")
    p.add_argument("--pilot", metavar="SOURCE", type=O.source,
                   help="earlier results folder (or tidy CSV): estimate how long the plan takes")
    p.add_argument("--budget", metavar="DURATION", type=O.duration,
                   help="with --pilot: how many complete replicates fit this time (e.g. 30m)")
    p.add_argument("--show", type=O.count(0), default=12, metavar="N",
                   help="how many runs of the execution order to list (default 12)")
    p.set_defaults(func=main)


def main(args) -> int:
    from benchharness.experiment.file import load_experiment
    from benchharness.design import build_plan

    exp = load_experiment(args.file)
    from benchharness.experiment.sections import validate_sections

    validate_sections(exp)  # every capability section: errors before any run
    for w in exp.warnings:
        print(f"warning: {w}", file=sys.stderr)
    plan = build_plan(exp, seed=args.seed)
    timing = _timing(args, exp, plan)
    if args.json or args.json_out:
        from benchharness.commands.options import emit_json, wants_json_only
        from benchharness.experiment.roles import factor_roles

        d = plan.to_json_dict()
        d["roles"] = factor_roles(exp).to_dict()
        from benchharness.experiment.quantities import numeric_factors

        d["numeric"] = numeric_factors(exp)   # factor -> {values, parallel, source}
        d.update(timing)
        emit_json(args, json.dumps(d, indent=1))
        if wants_json_only(args):
            return 0
    print(format_plan(exp, plan, show=args.show))
    for line in _timing_lines(timing):
        print(line)
    return 0


def _timing(args, exp, plan) -> dict:
    """Adaptive rule and time estimate (from --pilot) for the plan, JSON-ready."""
    import os

    from benchharness.design.adaptive import adaptive_rule
    from benchharness.errors import UsageError

    out: dict = {}
    rule = adaptive_rule(exp)
    if rule is not None:
        out["adaptive"] = rule.to_json_dict()
    if args.budget and not args.pilot:
        raise UsageError("--budget on `plan` needs --pilot SOURCE to know how long runs take")
    if not args.pilot:
        return out
    from benchharness.design.budget import estimate_plan, pilot_timing, replicates_in_budget
    from benchharness.results.source import load_table
    pilot, _ = load_table(args.pilot) if os.path.isdir(args.pilot) else \
        load_table(args.pilot, factors=list(exp.factor_names))
    est = estimate_plan(plan, pilot_timing(pilot, exp.factor_names))
    out["time_estimate"] = est.to_json_dict()
    reps = est.per_replicate_s
    per_rep = sum(reps.values()) / len(reps) if reps else 0.0
    out["time_estimate"]["expected_replicate_s"] = per_rep
    if rule is not None:
        out["time_estimate"]["expected_at_max_replicates_s"] = \
            est.warmup_s + per_rep * rule.max_replicates
    if args.budget:
        b = args.budget
        out["time_estimate"]["budget_s"] = b
        out["time_estimate"]["replicates_in_budget"] = replicates_in_budget(b, per_rep,
                                                                            est.warmup_s)
    return out


def _timing_lines(timing: dict) -> list[str]:
    from benchharness.numbers import fmt_duration, plural

    lines = []
    a = timing.get("adaptive")
    if a:
        lines.append(f"replicates  adaptive: {a['min']} to {a['max']}, adding complete replicates "
                     f"until every main-effect ratio interval ({a['confidence'] * 100:g}%) is "
                     f"within ±{a['ratio_halfwidth'] * 100:g}%")
    t = timing.get("time_estimate")
    if t:
        lines.append(f"expected    about {fmt_duration(t['expected_total_s'])} "
                     f"(timed {fmt_duration(t['expected_timed_s'])}, warm-up "
                     f"{fmt_duration(t['expected_warmup_s'])}, "
                     f"{fmt_duration(t['overhead_per_run_s'])} overhead per run; "
                     f"one replicate {fmt_duration(t['expected_replicate_s'])}; "
                     f"from the pilot)")
        if "expected_at_max_replicates_s" in t:
            lines.append("            at most about "
                         f"{fmt_duration(t['expected_at_max_replicates_s'])} "
                         f"if all {a['max']} replicates run")
        if "replicates_in_budget" in t:
            lines.append(f"budget      {fmt_duration(t['budget_s'])} fits "
                         f"{plural(t['replicates_in_budget'], 'complete replicate')}")
        for n in t.get("notes", []):
            lines.append(f"note        {n}")
    return lines


def format_plan(exp, plan, show: int = 12) -> str:
    from benchharness.numbers import plural

    lines = [f"experiment  {exp.name}"]
    if exp.about:
        lines.append(f"question    {exp.about}")
    from benchharness.experiment.roles import factor_roles

    roles = factor_roles(exp)
    lines.append("factors")
    width = max(len(f.name) for f in exp.factors)
    for f in exp.factors:
        lines.append(f"  {f.name:<{width}}  {len(f.levels)} levels: "
                     + ", ".join(f.labels) + f"  ({roles.role_of(f.name)})")
    lines.append("roles       " + _roles_line(roles))
    from benchharness.experiment.quantities import plan_lines

    lines += plan_lines(exp)     # numeric factors: trends and scaling
    from benchharness.experiment.response import declared_response

    declared = declared_response(exp)
    if declared is not None:
        lines.append(f"response    {declared} (analysed by run, analyze, report and choose; "
                     "--response to ask about another)")
    seed_note = "" if exp.seed is not None else " (drawn now; set seed: in the file to fix it)"
    lines.append(f"cells       {plan.cells}")
    lines.append(f"timed runs  {plan.timed_runs} ({_per_cell(plan, exp.replicates)})")
    lines.append(f"warm-up     {plural(plan.warmup_runs, 'untimed run')}")
    lines.append(f"order       {plan.order}, seed {plan.seed}{seed_note}")
    from benchharness.design.spec import DESIGN_INFO_KEYS, describe_info

    lines.extend(describe_info(plan.info))
    from benchharness.design.exclude import describe_space

    lines.extend(describe_space(exp))   # exclude: / only_when:
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
        # the last column is not padded: piped output has no line ending in spaces
        lines.append(("  " + "  ".join(h.ljust(w) for h, w in zip(header, widths))).rstrip())
        for row in rows:
            lines.append(("  " + "  ".join(c.ljust(w) for c, w in zip(row, widths))).rstrip())
    return "\n".join(lines)


def _per_cell(plan, replicates: int) -> str:
    """"2 per cell", and for a cell the design lists several times in each replicate (a
    response surface's centre) how many runs it gets: those copies are its runs."""
    from benchharness.design.surface import TYPE
    from benchharness.numbers import plural

    said = f"{replicates} per cell"
    centre = "the centre " if plan.info.get("design", {}).get("type") == TYPE else ""
    for levels, copies in plan.repeated:
        where = ", ".join(f"{k}={v}" for k, v in levels.items())
        said += (f"; {copies * replicates} at {centre}{where}: {copies} in each of "
                 f"{plural(replicates, 'replicate')}")
    return said


def _roles_line(roles) -> str:
    """How the factors' roles were decided, in one line."""
    from benchharness.experiment.roles import declaration_text, surface_guess

    if surface_guess(roles):
        return ("not declared; every factor counts as a setting (a response surface proposes "
                "values for all of its settings)")
    if roles.declared:
        return ("declared in the file: " + "; ".join(
            f"{r}s {', '.join(getattr(roles, r))}" for r in ("setting", "workload",
                                                             "environment")
            if getattr(roles, r)))
    if roles.workload:
        why = "; ".join(f"{f} ({roles.reasons[f]})" for f in roles.workload)
        return (f"not declared; choose treats {why} as a workload, the rest as settings; "
                f"declare them with {declaration_text(roles)}")
    return ("not declared; every factor counts as a setting (none looks like an input); "
            "declare inputs and machines with roles: {workload: [...], environment: [...]}")
