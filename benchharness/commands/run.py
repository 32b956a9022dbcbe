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

    progress = _progress(args.quiet)
    if args.resume:
        if args.file:
            raise UsageError("give either an experiment file or --resume DIR, not both")
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
        outcome = runner.run_experiment(exp, out=args.out, seed=args.seed, progress=progress,
                                        scheduler=args.scheduler,
                                        same_host_ok=args.same_host_ok)
    for note in outcome.notes:
        print(note)
    return finish(outcome, analysis=not args.no_analysis)


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
