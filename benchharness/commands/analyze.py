"""`benchharness analyze SOURCE`: analyse a results folder or tidy CSV as a designed experiment."""

from __future__ import annotations

import sys


def add_parser(sub) -> None:
    from benchharness.commands import options as O

    p = sub.add_parser(
        "analyze", help="analyse a results folder or a tidy CSV (ANOVA, effects, comparisons)",
        description="Analyse the runs of a results folder (or any tidy CSV, one row per "
                    "observation) as a factorial experiment: ANOVA of main effects and "
                    "interactions, residual diagnostics, scale choice, level ratios with "
                    "intervals and adjusted comparisons. Only runs with status ok are analysed; "
                    "the others are counted per cell.",
        epilog=O.examples(
            "benchharness analyze results/example-archive-codecs  # ANOVA, effects as ratios, "
            "comparisons and findings of a results folder",
            "benchharness analyze runs.csv --factors codec,level --confidence 99%  # a tidy "
            "CSV from elsewhere, 99% intervals",
            "benchharness analyze results/example-archive-codecs --json > analysis.json  # the "
            "analysis as one JSON document"))
    p.add_argument("source", metavar="SOURCE", type=O.source,
                   help="results folder or tidy CSV file")
    p.add_argument("--response", default=None, metavar="NAME",
                   help="column to analyse (default: the experiment file's response:, else wall_s; "
                        "for a gate's folder, the response "
                        "the gate compared)")
    p.add_argument("--factors", metavar="A,B", default=None,
                   help="comma-separated factor columns (default: the experiment's factors; "
                        "required for a CSV)")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--block", metavar="COL", default=None,
                   help="additive nuisance column (default: block for blocked experiments, "
                        "host when it has more than one value)")
    g.add_argument("--no-block", action="store_true", help="fit no block term")
    p.add_argument("--transform", choices=["auto", "none", "log", "boxcox"], default="auto",
                   help="analysis scale (default auto: the log scale for positive, ratio-scaled "
                        "responses such as times, unless the Box-Cox profile and the "
                        "diagnostics both argue strongly against it)")
    p.add_argument("--plain", action="store_true",
                   help="plain text layout instead of tables")
    p.add_argument("--model", default=None, metavar="full|main|N",
                   help="all interactions (full), main effects only (main), or interactions "
                        "up to order N (default full; for a two-level fraction, every alias "
                        "chain it can estimate, each named by its chain)")
    p.add_argument("--ss-type", type=int, choices=[2, 3], default=2,
                   help="type of sums of squares (default 2)")
    p.add_argument("--confidence", type=O.confidence, default=0.95, metavar="PCT",
                   help="confidence of the intervals; tests are made at 100%% minus it "
                        "(default 95%%)")
    O.alias(p, "--alpha", O.confidence_for("--alpha"), "confidence",
            convert=O.complement)
    p.add_argument("--reference", action="append", default=None, metavar="FACTOR=LEVEL",
                   help="reference level of a factor for ratios (repeat the option for each "
                        "factor; default: the first level)")
    p.add_argument("--adjust", choices=["bonferroni", "holm"], default="bonferroni",
                   help="adjustment of the simple-effect, declared and pairwise families; "
                        "intervals follow the same adjustment (default bonferroni)")
    p.add_argument("--comparisons", default=None, metavar="METHODS",
                   help="comparisons to make for every factor: tukey, pairwise, simple "
                        "(comma-separated) or all; default: Tukey HSD for significant main "
                        "effects outside significant interactions, simple effects inside "
                        "them, and the experiment's declared comparisons")
    p.add_argument("--better", choices=["lower", "higher"], default=None,
                   help="which direction of the response is better (default: the metric's "
                        "declaration in a results folder, else lower)")
    x = p.add_mutually_exclusive_group()
    x.add_argument("--art", action="store_true",
                   help="always run the rank-based cross-check (aligned rank transform on the "
                        "analysis scale; by default it runs when the assumptions look doubtful)")
    x.add_argument("--no-cross-check", action="store_true",
                   help="never run the rank-based cross-check (for very large tables)")
    O.add_json(p, "the analysis")
    p.set_defaults(func=main)


def main(args) -> int:
    _blas_one_thread()
    from benchharness.analysis import analyze
    from benchharness.report.units import declare_folder_units

    factors = _factor_list(args.factors)
    folder_res = _results_folder(args.source)
    declare_folder_units(args.source if folder_res is not None else None)
    args.response = _response(args, folder_res)
    model = args.model  # None: full, or every alias chain of a two-level fraction
    an = analyze(folder_res if folder_res is not None else args.source,  # read once
                 response=args.response, factors=factors,
                 block=False if args.no_block else args.block,
                 transform=args.transform, model=model, ss_type=args.ss_type,
                 alpha=round(1.0 - args.confidence, 12), reference=args.reference,
                 adjust=args.adjust,
                 art=True if args.art else False if args.no_cross_check else "auto",
                 better=args.better, comparisons=_comparisons(args.comparisons))
    if args.json or args.json_out:
        from benchharness.commands.options import emit_json, wants_json_only

        emit_json(args, an.to_json())
        if wants_json_only(args):
            return 0
    _print_analysis(an, args.plain)
    _print_fraction(an, folder_res, factors, args.response)
    if args.json_out:
        print(f"\nanalysis written to {args.json_out}", file=sys.stderr)
    return 0


def _blas_one_thread() -> None:
    """Load numpy's and scipy's OpenBLAS copies with one thread each, as the analysis runs
    them (`analysis.threads`). Started with more, each copy's worker threads spin idle
    for a while after loading: about 0.1 s of CPU for nothing, a seventh of a
    100-row analysis. OpenBLAS reads OPENBLAS_NUM_THREADS once, when it loads; the
    variable is removed again at once (no other process sees it) and a value the user
    set is left alone, as is a process that has loaded numpy already."""
    import os
    import sys

    if "numpy" in sys.modules or "OPENBLAS_NUM_THREADS" in os.environ:
        return
    os.environ["OPENBLAS_NUM_THREADS"] = "1"
    try:
        import numpy  # noqa: F401  (numpy's copy)
        import scipy.linalg  # noqa: F401  (scipy's own copy)
    finally:
        del os.environ["OPENBLAS_NUM_THREADS"]


def _results_folder(source: str):
    """The results folder SOURCE names, read once; None for a CSV file (for which the
    journal module is not even imported)."""
    import os

    if not os.path.isdir(source):
        return None
    from benchharness.results.journal import is_results_folder, load_results

    return load_results(source) if is_results_folder(source) else None


def _factor_list(text: str | None) -> list[str] | None:
    """The factor columns named by --factors, or None when the option was not given."""
    from benchharness.errors import UsageError

    if text is None:
        return None
    factors = [f for f in text.split(",")]
    if any(not f for f in factors):
        raise UsageError(f"--factors {text!r}: an empty factor name")
    return factors


def _response(args, folder_res) -> str:
    """The response to analyse: --response, else what a gate's folder compared, else the
    experiment file's ``response:``, else wall_s."""
    if args.response is not None:
        return args.response
    response = gate_response(args.source) if folder_res is not None else None
    if response is None:
        from benchharness.experiment.response import declared_response

        declared = declared_response(folder_res.experiment) if folder_res is not None else None
        if declared is not None:
            print(f"analysing {declared}, the response the experiment file names "
                  "(--response to choose another)", file=sys.stderr)
            return declared
        return "wall_s"
    print(f"analysing {response}, the response this gate compared "
          "(--response to choose another)", file=sys.stderr)
    return response


def _comparisons(text: str | None):
    """--comparisons as `analyze` takes it: True (the default choice), "all" or a list."""
    if text is None:
        return True
    if text.strip() == "all":
        return "all"
    return [m.strip() for m in text.split(",") if m.strip()]


def _print_analysis(an, plain: bool) -> None:
    """The analysis on standard output: plain text, or the terminal's tables."""
    if plain:
        from benchharness.analysis import format_analysis

        print(format_analysis(an), end="")
        return
    from benchharness.report.terminal import print_analysis

    print_analysis(an)


def _print_fraction(an, folder_res, factors, response: str) -> None:
    """The alias chains of a fraction, or of a full two-level design in confounded blocks."""
    frac = an.fraction
    if frac is None and folder_res is not None and factors is None:
        # Confounded blocks of a full two-level design: effects labelled with their aliases.
        from benchharness.analysis.fraction import fraction_analysis_for

        frac = fraction_analysis_for(folder_res.experiment, folder_res.runs,
                                     response=response,
                                     log=(an.transform or {}).get("name") != "none")
    if frac is not None:
        from benchharness.analysis.fraction import format_fraction

        print("\n" + format_fraction(frac))


def gate_response(folder) -> str | None:
    """The response a gate's results folder compared (its ``gate.json``), or None."""
    import json
    from pathlib import Path

    try:
        data = json.loads((Path(folder) / "gate.json").read_text())
    except (OSError, ValueError):
        return None
    r = data.get("response") if isinstance(data, dict) else None
    return r if isinstance(r, str) and r else None
