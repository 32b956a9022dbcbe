"""`benchharness compare A B`: per shared cell, the ratio B/A with its interval and a verdict."""

from __future__ import annotations

import json


def add_parser(sub) -> None:
    from benchharness.commands import options as O

    p = sub.add_parser("compare", help="compare two results folders cell by cell",
                       description="For each cell two results folders share, estimate the "
                                   "ratio B/A of the geometric means with its confidence "
                                   "interval and say whether it is beyond a tolerance. Runs "
                                   "from different sessions confound the change with the "
                                   "machine's state; `benchharness gate` interleaves both.",
                       epilog=O.examples(
                           "benchharness compare results/example-archive-codecs "
                           "results/codecs-try  # per cell, your run's time as a ratio of the "
                           "shipped demo's (`benchharness run experiments/archive-codecs.yaml "
                           "--out results/codecs-try` makes it)",
                           "benchharness compare results/example-archive-codecs "
                           "results/codecs-try --tolerance 2% --confidence 99%  # a tighter "
                           "band, wider intervals",
                           "benchharness compare results/example-archive-codecs "
                           "results/codecs-try --json  # the comparison as one JSON document"))
    p.add_argument("a", metavar="A", help="results folder of the baseline")
    p.add_argument("b", metavar="B", help="results folder to compare with the baseline")
    p.add_argument("--tolerance", default=1.05, metavar="RATIO",
                   type=O.ratio("--tolerance", above_one=False),
                   help="change that is still 'the same': 5%% or 1.05x (default 5%%)")
    p.add_argument("--response", default=None, metavar="NAME",
                   help="response column (default: the response: of A's experiment file, "
                        "else wall_s)")
    p.add_argument("--confidence", type=O.confidence, default=0.95, metavar="PCT",
                   help="confidence level of the intervals (default 95%%)")
    p.add_argument("--adjust", choices=("sidak", "bonferroni", "none"), default=None,
                   help="how the intervals account for the number of cells: sidak "
                        "(default) and bonferroni hold for all cells together at the "
                        "confidence level; none gives per-cell intervals")
    O.alias(p, "--simultaneous", "--adjust bonferroni", "adjust", flag=True,
            convert=lambda _: "bonferroni")
    O.add_json(p, "the comparison")
    p.set_defaults(func=main)


def main(args) -> int:
    from benchharness.errors import UsageError
    from benchharness.history.compare import compare_folders

    from benchharness import values as V

    tol = V.change_of(args.tolerance)
    if not 0 <= tol < 1:
        raise UsageError("--tolerance: must be at least 0% and below 100% (a ratio from 1 "
                         "to 2)")
    adjust = args.adjust or "sidak"
    response = args.response
    if response is None:   # what the baseline's experiment file names, as analyze does
        from benchharness.experiment.response import folder_response

        response = folder_response(args.a) or "wall_s"
    from benchharness.report.units import declare_folder_units

    for folder in (args.b, args.a):   # a metric's declared unit; the baseline's wins
        declare_folder_units(folder)
    result = compare_folders(args.a, args.b, response=response, tolerance=tol,
                             conf_level=args.confidence, adjust=adjust)
    if args.response is None and response != "wall_s":   # said once the folders are read
        import sys

        print(f"comparing {response}, the response the experiment file names "
              "(--response to choose another)", file=sys.stderr)
    if args.json or args.json_out:
        from benchharness.commands.options import emit_json, wants_json_only

        emit_json(args, json.dumps(result.to_json_dict(), indent=1))
        if wants_json_only(args):
            return 0
    print_comparison(result)
    return 0


def headline(result) -> str:
    """One plain sentence first: how many shared cells B changed beyond the tolerance, which
    way, and how many it left the same or could not tell (the numbers follow in the table)."""
    from benchharness.numbers import plural

    cells = result.cells
    if not cells:
        return "A and B share no cell, so nothing was compared."
    count = {}
    for c in cells:
        count.setdefault(c.verdict, []).append(c)
    tol = f"{result.tolerance * 100:g}%"
    parts = []
    for verdict in ("higher", "lower"):
        if count.get(verdict):
            word = count[verdict][0].wording.split(" (")[0]
            parts.append(f"{plural(len(count[verdict]), 'cell')} {word} beyond {tol}")
    if count.get("within"):
        parts.append(f"{plural(len(count['within']), 'cell')} the same within {tol}")
    if count.get("unclear"):
        parts.append(f"{plural(len(count['unclear']), 'cell')} unclear")
    if len(parts) > 1:
        text = ", ".join(parts[:-1]) + " and " + parts[-1]
    else:
        text = parts[0]
    return (f"B against A, {result.response}: {text} "
            f"(of {plural(len(cells), 'shared cell')}).")


def print_comparison(result) -> None:
    from benchharness.report.terminal import make_console

    console = make_console()
    console.print(headline(result), highlight=False)
    console.print(f"A (baseline): {result.a}", highlight=False)
    console.print(f"B:            {result.b}", highlight=False)
    console.print(_cell_table(result))
    _print_notes(console, result)
    import sys

    for w in result.warnings:  # warnings go to standard error, like every command's
        print(f"warning: {w}", file=sys.stderr)


def _cell_table(result):
    """The rich table of the cells: sizes, both centres, B/A (or B - A), interval, verdict."""
    from rich.table import Table

    ratio = result.scale == "log"
    table = Table(title=f"{result.response}, B/A per cell" if ratio else
                  f"{result.response}, B - A per cell", title_justify="left")
    cells = result.cells
    names = list(cells[0].cell) if cells else []
    for n in names:
        table.add_column(n)
    for col in ("n A/B", "A", "B", "B/A" if ratio else "B - A",
                f"{result.conf_level * 100:g}% interval"
                + (" (per cell)" if result.adjustment == "none" else " (all cells)")):
        table.add_column(col, justify="right", no_wrap=True)
    table.add_column("verdict", justify="left", overflow="fold")
    from benchharness.numbers import fmt_ratio, fmt_ratio_interval, pick_scale
    from benchharness.report.units import unit_of

    unit = unit_of(result.response)
    # one unit per column, chosen from the column's values; A and B share theirs
    means = pick_scale(unit, [x for c in cells for x in (c.center_a, c.center_b)])
    diffs = pick_scale(unit, [x for c in cells for x in (c.estimate, c.low, c.high)])
    for c in cells:
        est = fmt_ratio(c.estimate) if ratio else diffs.fmt(c.estimate)
        iv = fmt_ratio_interval(c.low, c.high) if ratio else diffs.interval(c.low, c.high)
        table.add_row(*[c.cell[n] for n in names], f"{c.n_a}/{c.n_b}", means.fmt(c.center_a),
                      means.fmt(c.center_b), est, iv, c.wording)
    return table


def _print_notes(console, result) -> None:
    """What the columns and verdicts mean, the adjustment, the scale, the noise, unshared cells."""
    from benchharness.numbers import pick_scale, plural
    from benchharness.report.units import unit_of

    ratio = result.scale == "log"
    tol = f"{result.tolerance * 100:g}%"
    console.print(f"A and B columns: {'geometric ' if ratio else ''}means of "
                  f"{result.response}. Verdicts: beyond {tol} = the whole interval is outside "
                  f"the tolerance band; same within {tol} = the whole interval is inside it; "
                  "unclear = the interval crosses the band's edge.", highlight=False)
    console.print(result.adjustment_sentence(), highlight=False)
    if result.scale_reason:
        console.print(f"Compared on {result.scale_reason}.", highlight=False)
    if result.residual_sd is not None:
        unit = unit_of(result.response)
        noise = (f"{result.residual_sd * 100:.1f}% (SD of ln {result.response})" if ratio
                 else pick_scale(unit, [result.residual_sd]).fmt(result.residual_sd))
        console.print(f"Run-to-run noise pooled over cells and both sessions: {noise}, "
                      f"{result.residual_df} df.")
    for label, only in (("A", result.only_in_a), ("B", result.only_in_b)):
        if only:
            console.print(f"{plural(len(only), 'cell')} only in {label}: "
                          + "; ".join(", ".join(f"{k}={v}" for k, v in c.items()) for c in only))
