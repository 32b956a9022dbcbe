"""`benchharness size`: how many replicates per cell a decision needs (power analysis)."""

from __future__ import annotations

import json
import math
import os


def add_parser(sub) -> None:
    from benchharness.commands import options as O

    p = sub.add_parser(
        "size", help="replicates per cell needed to detect a given ratio",
        description="Replicates per cell so that the ANOVA detects, with the given power, a "
                    "ratio of --detect between two levels of any factor, a change of that "
                    "ratio between two levels of another (--for interaction), or a log-log "
                    "slope of --slope over a numeric factor (--for trend) (noncentral F; see "
                    "docs/design.md).",
        epilog=O.examples(
            "benchharness size --detect 3% --noise-cv 2% --levels 3,3,2  # replicates to find "
            "a 1.03x ratio in a 3x3x2 design",
            "benchharness size --detect 1.05x --pilot results/example-archive-codecs  # noise, "
            "factors and run times from an earlier run",
            "benchharness size --detect 3% --noise-cv 2% --levels experiments/archive-codecs.yaml "
            "--json  # the answer as one JSON document",
            "benchharness size --for interaction --detect 5% --noise-cv 2% --levels 3,2  # a "
            "ratio that changes by 1.05x between two levels of the other factor",
            "benchharness size --for trend --slope 0.05 --noise-cv 3% --levels "
            "experiments/thread-scaling.yaml  # an exponent of 0.05 over each numeric factor, "
            "and exponents that differ by 0.05"))
    p.add_argument("--detect", metavar="RATIO", type=O.ratio("--detect"),
                   help="smallest ratio between two levels that must be found: 3%% or 1.03x "
                        "(with --for interaction: the change of a ratio between two levels of "
                        "another factor)")
    p.add_argument("--slope", metavar="B", type=float,
                   help="with --for trend: the smallest log-log slope (exponent) to find, and "
                        "the smallest difference of exponents between levels of another "
                        "factor, e.g. 0.05")
    noise = p.add_mutually_exclusive_group()
    noise.add_argument("--noise-cv", metavar="PCT", type=O.percent(0.0, 1.0, low_open=True),
                       help="run-to-run coefficient of variation of the response, e.g. 2%%")
    noise.add_argument("--pilot", metavar="SOURCE", type=O.source,
                       help="earlier results folder (or tidy CSV): noise and run times from it")
    p.add_argument("--levels", metavar="LIST|FILE",
                   help="levels per factor, e.g. 3,2,4, or an experiment file "
                        "(default: the pilot's experiment)")
    p.add_argument("--confidence", type=O.confidence, default=0.95, metavar="PCT",
                   help="the tests are made at 100%% minus this, their false-alarm rate "
                        "(default 95%%: 5%%)")
    O.alias(p, "--alpha", O.confidence_for("--alpha"), "confidence",
            convert=O.complement)
    p.add_argument("--power", type=O.percent(0.0, 1.0, low_open=True), default=0.9,
                   metavar="PCT", help="wanted power (default 90%%)")
    p.add_argument("--for", dest="target", choices=("anova", "pairwise", "interaction", "trend"),
                   default="anova",
                   help="size the main-effect F tests (default), the Holm-adjusted pairwise "
                        "comparisons between levels (needs more), every two-factor "
                        "interaction, or the trend over each numeric factor (needs an "
                        "experiment file)")
    p.add_argument("--response", default=None, metavar="NAME",
                   help="response column of the pilot (default: the experiment file's "
                        "response:, else wall_s)")
    O.add_json(p, "the answer")
    p.set_defaults(func=main)


def _factors_from_levels(text: str):
    """(factors [(name, levels)], cells, experiment or None) from --levels."""
    from benchharness.errors import UsageError

    if os.path.exists(text) or text.endswith((".yaml", ".yml")):
        from benchharness.experiment.file import load_experiment

        exp = load_experiment(text)
        return _factors_from_experiment(exp) + (exp,)
    try:
        counts = [int(t) for t in text.split(",") if t.strip()]
    except ValueError:
        raise UsageError(f"--levels {text!r}: give counts like 3,2,4 or an experiment file "
                         f"that exists") from None
    if not counts:
        raise UsageError("--levels is empty; give counts like 3,2,4")
    from benchharness.design.words import LETTERS

    names = [LETTERS[i] if i < len(LETTERS) else f"f{i + 1}" for i in range(len(counts))]
    return list(zip(names, counts)), None, None


def _factors_from_experiment(exp):
    from benchharness.design.spec import design_of

    choice = design_of(exp)
    cells = choice.design.n_cells if choice.changes_plan else None
    if getattr(exp, "space", None) is not None:   # exclude: / only_when: the cells that exist
        from benchharness.design.exclude import space_cells

        cells = len(space_cells(exp)[0])
    return [(f.name, len(f.levels)) for f in exp.factors], cells


def main(args) -> int:
    from benchharness.design import sizing

    from benchharness import values as V

    _check_target(args)
    detect = V.change_of(args.detect) if args.detect is not None else None
    pilot_df, pilot_exp = _pilot_folder(args)
    factors, cells, exp = _factors(args, pilot_exp)
    if args.response is None:   # the pilot's (or --levels FILE's) `response:`, else wall_s
        from benchharness.experiment.response import default_response

        args.response = default_response(pilot_exp if pilot_exp is not None else exp)
    if args.pilot and pilot_df is None:
        from benchharness.results.source import load_table

        names = [n for n, _ in factors]
        pilot_df, _ = load_table(args.pilot, factors=names)
    sigma, sigma_note = _noise(args, pilot_df, pilot_exp, factors)
    ans = _answer(args, sizing, factors, cells, exp, detect, sigma)
    out = ans.to_json_dict()
    if args.target == "trend":
        out.pop("log_difference", None)
        out["detect"] = None
        out["slope"] = args.slope
    out["noise"] = sigma_note
    if pilot_df is not None:
        out.update(_expected_time(args, pilot_df, factors, exp, ans))
    if args.json or args.json_out:
        from benchharness.commands.options import emit_json, wants_json_only

        emit_json(args, json.dumps(out, indent=1))
        if wants_json_only(args):
            return 0
    print(format_answer(ans, out))
    return 0


def _pilot_folder(args):
    """(runs table, experiment) of a --pilot results folder; (None, None) for a CSV or none.

    A CSV pilot is read once the factors are known, and needs --levels FILE to know them.
    """
    from benchharness.errors import UsageError

    if not args.pilot:
        return None, None
    if os.path.isdir(args.pilot):
        from benchharness.results.source import load_table

        return load_table(args.pilot)
    if not args.levels:
        raise UsageError("a CSV pilot needs --levels FILE (an experiment file naming "
                         "the factors)")
    return None, None


def _factors(args, pilot_exp):
    """(factors [(name, levels)], cells or None, experiment or None): --levels, else the pilot's."""
    from benchharness.errors import UsageError

    if args.levels:
        return _factors_from_levels(args.levels)
    if pilot_exp is not None:
        return _factors_from_experiment(pilot_exp) + (pilot_exp,)
    raise UsageError("say what the factors are: --levels 3,2,4, --levels FILE, or --pilot "
                     "SOURCE")


def _noise(args, pilot_df, pilot_exp, factors) -> tuple[float, str]:
    """(sd of the log response, how it was found): from --noise-cv, else from the pilot's runs."""
    from benchharness.design import sizing
    from benchharness.errors import UsageError

    if args.noise_cv:
        cv = args.noise_cv
        sigma = sizing.sigma_from_cv(cv)
        return sigma, f"CV {cv * 100:g}% -> sd of ln({args.response}) {sigma:.4g}"
    if pilot_df is None:
        raise UsageError("say how noisy the runs are: --noise-cv 2% or --pilot SOURCE")
    pf = [f for f in (pilot_exp.factor_names if pilot_exp else [n for n, _ in factors])
          if f in pilot_df.columns]
    pn = sizing.pilot_noise(pilot_df, pf, args.response)
    return pn.sigma_log, (f"pilot: sd of ln({args.response}) {pn.sigma_log:.4g} from "
                          f"{pn.runs} runs in {pn.cells} cells ({pn.df} df)")


def _expected_time(args, pilot_df, factors, exp, ans) -> dict:
    """The pilot's time per run and the whole sized experiment's, its warm-up runs included.
    Runs are timed by their wall clock (``wall_s``) whatever response is sized: a metric in
    milliseconds, or no time at all, says nothing of how long a run takes."""
    from benchharness.design import budget

    clock = "wall_s" if "wall_s" in pilot_df.columns else args.response
    if clock != "wall_s" and not clock.endswith("_s"):
        return {}
    timing = budget.pilot_timing(pilot_df, [n for n, _ in factors], clock)
    per_run = timing.mean_s + timing.overhead_s
    out = {"expected_run_s": per_run, "expected_wall_s": per_run * ans.runs}
    warm = exp.warmup if exp is not None else 0
    if warm:
        out["expected_wall_s"] += per_run * warm * ans.cells
    return out


def _check_target(args) -> None:
    """--detect for ratios, --slope for trends: each where it means something."""
    from benchharness.errors import UsageError

    if args.target == "trend":
        if args.slope is None:
            raise UsageError("--for trend needs --slope B, the smallest exponent to find "
                             "(e.g. --slope 0.05)")
        if not args.slope > 0:
            raise UsageError(f"--slope {args.slope:g}: give a positive exponent, e.g. 0.05")
        if args.detect is not None:
            raise UsageError("--for trend sizes a slope: give --slope, not --detect")
    else:
        if args.detect is None:
            raise UsageError("say what must be found: --detect 3% (a ratio between two levels)")
        if args.slope is not None:
            raise UsageError("--slope is for --for trend; other targets take --detect")


def _answer(args, sizing, factors, cells, exp, detect, sigma):
    """The sizing for the chosen target (sizing.size_design or sizing.size_effects)."""
    from benchharness.errors import UsageError

    alpha = round(1.0 - args.confidence, 12)
    if args.target in ("anova", "pairwise"):
        return sizing.size_design(factors, detect, sigma, alpha=alpha, power=args.power,
                                  method=args.target, cells=cells)
    if args.target == "interaction" and getattr(exp, "space", None) is not None:
        return _interaction_on_space(args, sizing, factors, exp, detect, sigma, alpha)
    if cells is None:
        cells = math.prod(a for _, a in factors)
    elif cells != math.prod(a for _, a in factors):
        raise UsageError(f"--for {args.target} sizes full factorials; this design runs "
                         f"{cells} of its cells")
    if args.target == "interaction":
        if not detect > 0:
            raise UsageError("the change to detect must be positive, like 5%")
        effects = sizing.interaction_effects(factors, cells, sizing.log_difference(detect),
                                             sigma)
        return sizing.size_effects(effects, cells, detect, sigma, alpha, args.power,
                                   "interaction", [INTERACTION_NOTE])
    if exp is None:
        raise UsageError("--for trend needs the levels' values: --levels FILE (an experiment "
                         "file) or --pilot FOLDER")
    from benchharness.experiment.quantities import numeric_factors

    values = {n: q["values"] for n, q in numeric_factors(exp).items() if min(q["values"]) > 0}
    effects = sizing.trend_effects(factors, values, cells, args.slope, sigma)
    notes = ["assumes the power law holds (no lack of fit); a slope is an exponent: "
             "time ∝ x^b"]
    return sizing.size_effects(effects, cells, args.slope, sigma, alpha, args.power, "trend",
                               notes)


INTERACTION_NOTE = ("an interaction here is a ratio between two levels of one factor that "
                    "changes by the --detect ratio between two levels of another")


def _interaction_on_space(args, sizing, factors, exp, detect, sigma, alpha):
    """--for interaction on the cells an ``exclude:``/``only_when:`` leaves: each
    interaction with a 2×2 sub-grid among them, the others named in a note (all of
    them unestimable: one line, exit 2)."""
    from benchharness.design.exclude import space_cells
    from benchharness.errors import UsageError

    if not detect > 0:
        raise UsageError("the change to detect must be positive, like 5%")
    cells, info = space_cells(exp)
    effects, skipped = sizing.interaction_effects_on_cells(
        factors, cells, sizing.log_difference(detect), sigma)
    if not effects:
        if not skipped:
            raise UsageError("an interaction needs two factors or more")
        raise UsageError(f"{exp.path}: --for interaction: no two-factor interaction can be "
                         f"estimated on the {len(cells)} cells the exclusions leave ("
                         + "; ".join(skipped) + "); exclude less, so that two levels of one "
                         "factor run with the same two levels of another, or size the main "
                         "effects (--for anova)")
    notes = [INTERACTION_NOTE,
             f"sized on the {len(cells)} cells the exclusions leave (of "
             f"{info.get('combinations', len(cells))} combinations), for the worst 2×2 "
             "sub-grid of each pair of factors"]
    notes += [f"not sized, it cannot be estimated on these cells: {why}" for why in skipped]
    return sizing.size_effects(effects, len(cells), detect, sigma, alpha, args.power,
                               "interaction", notes)


def format_answer(ans, out: dict) -> str:
    from benchharness.numbers import fmt_duration

    what = {"pairwise": "Holm-adjusted pairwise comparisons",
            "interaction": "two-factor interaction F tests",
            "trend": "log-log slope tests"}.get(ans.method, "main-effect F tests")
    from benchharness.numbers import fmt_ratio

    def pct(x: float) -> str:
        return f"{round(100 * x, 9):g}%"

    if ans.method == "trend":
        target = (f"an exponent of {ans.detect:g} over each numeric factor, and exponents "
                  f"that differ by {ans.detect:g} across another factor's levels")
    elif ans.method == "interaction":
        target = (f"a ratio that changes by {fmt_ratio(1 + ans.detect)} (+{pct(ans.detect)}) "
                  "between two levels of another factor")
    else:
        target = f"a ratio of {fmt_ratio(1 + ans.detect)} (+{pct(ans.detect)})"
    lines = [f"replicates per cell: {ans.replicates}  (to detect {target} with "
             f"{pct(ans.target_power)} power, tests at {pct(1 - ans.alpha)} confidence, {what})",
             f"noise: {out['noise']}"]
    head = "factor" if ans.method in ("anova", "pairwise") else "effect"
    width = max(len(head), *(len(n) for n in ans.per_factor))
    lines.append(f"  {head:<{width}}  replicates  power at {ans.replicates}")
    for name, n in ans.per_factor.items():
        mark = "  <- needs the most" if name == ans.binding_factor and len(ans.per_factor) > 1 \
            else ""
        lines.append(f"  {name:<{width}}  {n:>10}  {ans.per_factor_power[name]:.3f}{mark}")
    lines.append(f"timed runs: {ans.runs} ({ans.replicates} × {ans.cells} cells)")
    lines.append(f"power of {ans.binding_factor} at other replicate counts: "
                 + ", ".join(f"{n}: {p:.2f}" for n, p in ans.curve))
    if "expected_wall_s" in out:
        lines.append(f"expected time: about {fmt_duration(out['expected_wall_s'])} "
                     f"({fmt_duration(out['expected_run_s'])} per run from the pilot, overhead "
                     f"included)")
    for note in ans.notes:
        lines.append(f"note: {note}")
    return "\n".join(lines)
