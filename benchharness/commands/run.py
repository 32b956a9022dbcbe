"""`benchharness run FILE`: plan, execute and record an experiment (or resume one)."""

from __future__ import annotations

import os
import sys


def add_parser(sub) -> None:
    p = sub.add_parser("run", help="run an experiment file into a results folder",
                       description="Plan the experiment, run every planned run in order while "
                                   "measuring it, and write a results folder.")
    p.add_argument("file", nargs="?", help="experiment file (YAML)")
    p.add_argument("--out", metavar="DIR", help="results folder to create (default: "
                   "results/<experiment>-<UTC timestamp>); must not exist or be empty")
    p.add_argument("--seed", type=int, default=None, help="override the file's seed")
    p.add_argument("--resume", metavar="DIR", help="continue an interrupted results folder")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run on a Dask cluster (tcp://HOST:PORT); hosts become blocks")
    p.add_argument("--same-host-ok", action="store_true",
                   help="several workers on one host are intended (each counts as a host)")
    p.add_argument("--budget", metavar="DURATION",
                   help="time budget (e.g. 30m, 2h): stop at the end of the last complete "
                        "replicate that fits")
    p.add_argument("--pilot", metavar="RESULTS",
                   help="earlier results folder whose run times estimate the first replicate "
                        "for --budget")
    p.add_argument("--history", metavar="DB",
                   help="add the results to this history database (SQLite) when done; the "
                        "commit is read from git")
    p.add_argument("--quiet", action="store_true", help="no progress display")
    p.add_argument("--no-analysis", action="store_true",
                   help="skip the analysis and reports at the end")
    p.set_defaults(func=main)


def _progress(quiet: bool):
    from benchharness.runner import PlainProgress, Progress, RichProgress

    if quiet:
        return Progress()
    if sys.stdout.isatty():
        return RichProgress()
    return PlainProgress()


def main(args) -> int:
    from benchharness import runner
    from benchharness.errors import UsageError

    if args.scheduler:
        from benchharness.execute.cluster import check_address

        check_address(args.scheduler)  # before any results folder is created
    progress = _progress(args.quiet)
    if args.resume:
        if args.file:
            raise UsageError("give either an experiment file or --resume DIR, not both")
        _refuse_gate_folder(args.resume)
        outcome = runner.resume_experiment(args.resume, progress=progress,
                                           scheduler=args.scheduler,
                                           same_host_ok=args.same_host_ok)
    else:
        if not args.file:
            raise UsageError("run needs an experiment file (or --resume DIR)")
        from benchharness.experiment import load_experiment

        exp = load_experiment(args.file)
        for w in exp.warnings:
            print(f"warning: {w}", file=sys.stderr)
        if exp.seed is None and args.seed is None:
            pass  # the drawn seed is printed below and recorded in session.json
        budget_s, estimate_s = _budget(args, exp)
        outcome = runner.run_experiment(exp, out=args.out, seed=args.seed, progress=progress,
                                        scheduler=args.scheduler,
                                        same_host_ok=args.same_host_ok, budget_s=budget_s,
                                        estimate_s=estimate_s)
    for note in outcome.notes:
        print(note)
    code = finish(outcome, analysis=not args.no_analysis)
    if code == 0 and args.history:
        from benchharness.history import add_results

        n = add_results(args.history, outcome.folder)
        print(f"history: {n} cell rows added to {args.history}")
    return code


def _budget(args, exp):
    """(budget in seconds or None, pilot estimate of one replicate in seconds or None)."""
    from benchharness.errors import UsageError
    from benchharness.yamlnodes import parse_duration_s

    if args.budget is None:
        if args.pilot:
            raise UsageError("--pilot on `run` only serves --budget; give --budget too "
                             "(or use `benchharness plan FILE --pilot RESULTS`)")
        return None, None
    budget_s = parse_duration_s(args.budget)
    if budget_s is None or budget_s <= 0:
        raise UsageError(f"--budget {args.budget!r} is not a duration; write e.g. 30m, 2h, "
                         f"1h30m or 90s")
    estimate_s = None
    if args.pilot:
        from benchharness.design import build_plan
        from benchharness.design.budget import estimate_plan, pilot_timing
        from benchharness.source import load_table

        pilot, _ = load_table(args.pilot) if os.path.isdir(args.pilot) else \
            load_table(args.pilot, factors=list(exp.factor_names))
        est = estimate_plan(build_plan(exp, seed=args.seed or 1, replicates=1, warmup=0),
                            pilot_timing(pilot, exp.factor_names))
        estimate_s = est.timed_s
    return budget_s, estimate_s


def finish(outcome, analysis: bool = True) -> int:
    """Print the summary (and analysis, reports) of a finished or interrupted run."""
    from benchharness import journal as J
    from benchharness.commands import summary

    folder = outcome.folder
    res = J.load_results(folder)
    summary.print_summary(res, outcome)
    if outcome.interrupted:
        print(f"\nstopped early: {sum(outcome.counts.values())} of {outcome.planned} runs are "
              f"recorded. Continue with:\n  benchharness run --resume {folder}")
        return 130
    if analysis:
        from benchharness.commands import postrun

        postrun.analyse_and_report(res)
    print(f"\nresults: {folder}")
    return 0


def _refuse_gate_folder(folder) -> None:
    """A gate session decides as it goes; resuming it as a plain run would only mark it
    complete without a verdict."""
    import json
    from pathlib import Path

    from benchharness.errors import UsageError

    try:
        session = json.loads((Path(folder) / "session.json").read_text())
    except (OSError, ValueError):
        return  # not readable here: resume_experiment says what is wrong
    if isinstance(session, dict) and session.get("gate"):
        raise UsageError(f"{folder}: is a gate session; a gate is not resumed (its decision "
                         "depends on the order of looks): run `benchharness gate` again into a "
                         "new folder")
