"""`benchharness run FILE`: plan, execute and record an experiment (or resume one).

Exit codes, so a CI job can tell the outcomes apart:

* 0 every timed run ended ok (or ``--allow-failures`` and the plan ran to its end);
* 4 the plan ran to its end but some timed runs failed or timed out;
* 5 stopped early: the first runs of every cell failed the same way (the command
  cannot work as written), see `benchharness.execute.early_stop`; ``--keep-going`` runs
  the whole plan instead;
* 130 Ctrl-C; 2 bad input; 70 an internal error.

Both 4 and 5 leave a consistent results folder; after 5 (and 130) it can be
continued with ``--resume`` once the cause is fixed.
"""

from __future__ import annotations

import os
import sys

EXIT_RUNS_FAILED = 4      # timed runs failed or timed out
EXIT_STOPPED_EARLY = 5    # the first runs of every cell failed the same way


def add_parser(sub) -> None:
    from benchharness.commands import options as O

    p = sub.add_parser("run", help="run an experiment file into a results folder",
                       description="Plan the experiment, run every planned run in order while "
                                   "measuring it, and write a results folder. Exit 0: every "
                                   f"timed run ended ok, {EXIT_RUNS_FAILED}: some failed or "
                                   f"timed out, {EXIT_STOPPED_EARLY}: stopped early (the first "
                                   "runs of every cell failed the same way), 2: bad input, "
                                   "75: the disk is full, 130: Ctrl-C.",
                       epilog=O.examples(
                           "benchharness run experiments/archive-codecs.yaml  # run the demo "
                           "experiment, analyse it and write the reports",
                           "benchharness run experiments/archive-codecs.yaml --out "
                           "results/codecs-try --budget 20m  # stop after the last complete "
                           "replicate that fits in 20 minutes",
                           "benchharness run --resume results/codecs-try  # continue an "
                           "interrupted results folder"))
    p.add_argument("file", nargs="?", metavar="FILE", help="experiment file (YAML)")
    p.add_argument("--out", metavar="DIR", type=O.out_file("--out"),
                   help="results folder to create (default: "
                   "results/<experiment>-<UTC timestamp>); must not exist or be empty")
    p.add_argument("--seed", type=int, default=None, metavar="N",
                   help="override the file's seed")
    p.add_argument("--resume", metavar="FOLDER", help="continue an interrupted results folder")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run on a Dask cluster (tcp://HOST:PORT); hosts become blocks")
    p.add_argument("--same-host-ok", action="store_true",
                   help="several workers on one host are intended (each counts as a host)")
    p.add_argument("--budget", metavar="DURATION", type=O.duration,
                   help="time budget (e.g. 30m, 2h): stop at the end of the last complete "
                        "replicate that fits")
    p.add_argument("--pilot", metavar="SOURCE", type=O.source,
                   help="earlier results folder (or tidy CSV) whose run times estimate the "
                        "first replicate for --budget")
    p.add_argument("--history-db", metavar="FILE", type=O.out_file("--history-db"),
                   help="add the results to this history database (SQLite) when done; the "
                        "commit is read from git")
    O.alias(p, "--history", "--history-db FILE", "history_db", metavar="FILE")
    p.add_argument("--allow-failures", action="store_true",
                   help=f"exit 0 even when timed runs failed or timed out (otherwise exit "
                        f"{EXIT_RUNS_FAILED})")
    p.add_argument("--keep-going", action="store_true",
                   help="run the whole plan even when the first runs of every cell fail the "
                        f"same way (otherwise stop there, exit {EXIT_STOPPED_EARLY})")
    p.add_argument("--quiet", action="store_true", help="no progress display")
    p.add_argument("--no-analysis", action="store_true",
                   help="skip the analysis and reports at the end")
    O.add_json(p, "what the run recorded (folder, counts, exit code, reports)")
    p.set_defaults(func=main)


def _progress(quiet: bool):
    from benchharness.execute.runner import PlainProgress, Progress, RichProgress

    if quiet:
        return Progress()
    # progress, and the host warnings and notes said on the way, go to standard error
    if sys.stderr.isatty():
        from rich.console import Console

        return RichProgress(console=Console(stderr=True))
    return PlainProgress(stream=sys.stderr)


def main(args) -> int:
    from benchharness.execute import runner
    from benchharness.errors import UsageError

    if args.scheduler:
        from benchharness.execute.cluster import check_address

        check_address(args.scheduler)  # before any results folder is created
    progress = _progress(args.quiet)
    if args.resume:
        if args.file:
            raise UsageError("give either an experiment file or --resume FOLDER, not both")
        _refuse_gate_folder(args.resume)
        outcome = runner.resume_experiment(args.resume, progress=progress,
                                           scheduler=args.scheduler,
                                           same_host_ok=args.same_host_ok,
                                           early_stop=not args.keep_going)
    else:
        if not args.file:
            raise UsageError("run needs an experiment file (or --resume FOLDER)")
        from benchharness.experiment.file import load_experiment

        exp = load_experiment(args.file)
        for w in exp.warnings:
            print(f"warning: {w}", file=sys.stderr)
        if exp.seed is None and args.seed is None:
            pass  # the drawn seed is printed below and recorded in session.json
        budget_s, estimate_s = _budget(args, exp)
        outcome = runner.run_experiment(exp, out=args.out, seed=args.seed, progress=progress,
                                        scheduler=args.scheduler,
                                        same_host_ok=args.same_host_ok, budget_s=budget_s,
                                        estimate_s=estimate_s, early_stop=not args.keep_going)
    for note in outcome.notes:
        print(f"note: {note}", file=sys.stderr)
    code = finish(outcome, analysis=not args.no_analysis,
                  allow_failures=args.allow_failures)
    added = None
    if code == 0 and args.history_db:
        from benchharness.history import add_results

        added = add_results(args.history_db, outcome.folder)
        from benchharness.numbers import plural

        print(f"history: {plural(added, 'cell row')} added to {args.history_db}")
    if args.json or args.json_out:
        from benchharness.commands.options import dumps, emit_json

        emit_json(args, dumps(run_json(outcome, code, added, args.history_db)))
    return code


def run_json(outcome, code: int, added, db) -> dict:
    """The ``--json`` document of `run`: where the results are and what happened."""
    folder = outcome.folder
    files = {name: str(folder / name) for name in ("analysis.json", "report.html", "report.md")
             if (folder / name).exists()}
    return {"results_folder": str(folder), "seed": outcome.seed, "planned_runs": outcome.planned,
            "counts": dict(outcome.counts), "interrupted": bool(outcome.interrupted),
            "stopped_early": outcome.stopped_early, "exit_code": code, "files": files,
            "notes": [str(n) for n in outcome.notes],
            "history": None if db is None else {"db": str(db), "cell_rows_added": added}}


def _budget(args, exp):
    """(budget in seconds or None, pilot estimate of one replicate in seconds or None)."""
    from benchharness.errors import UsageError

    if args.budget is None:
        if args.pilot:
            raise UsageError("--pilot on `run` only serves --budget; give --budget too "
                             "(or use `benchharness plan FILE --pilot SOURCE`)")
        return None, None
    budget_s = args.budget
    estimate_s = None
    if args.pilot:
        from benchharness.design import build_plan
        from benchharness.design.budget import estimate_plan, pilot_timing
        from benchharness.results.source import load_table

        pilot, _ = load_table(args.pilot) if os.path.isdir(args.pilot) else \
            load_table(args.pilot, factors=list(exp.factor_names))
        est = estimate_plan(build_plan(exp, seed=args.seed or 1, replicates=1, warmup=0),
                            pilot_timing(pilot, exp.factor_names))
        estimate_s = est.timed_s
    return budget_s, estimate_s


def finish(outcome, analysis: bool = True, allow_failures: bool = False) -> int:
    """Print the summary (and analysis, reports) of a finished or interrupted run; the
    exit code (see the module docstring)."""
    from benchharness.results import journal as J
    from benchharness.commands import summary

    folder = outcome.folder
    res = J.load_results(folder)
    summary.print_summary(res, outcome)
    if outcome.interrupted:
        print(f"\nstopped early: {sum(outcome.counts.values())} of {outcome.planned} runs are "
              f"recorded. Continue with:\n  benchharness run --resume {folder}")
        return 130
    if outcome.stopped_early:
        recorded = sum(outcome.counts.values())
        print(f"\nstopped early: {outcome.stopped_early}", file=sys.stderr)
        hint = _path_hint(res)
        if hint:
            print(f"hint: {hint}", file=sys.stderr)
        print(f"{recorded} of {outcome.planned} runs are recorded; the rest were not run, since "
              f"they would most likely fail the same way. Fix the cause, then continue with:\n"
              f"  benchharness run --resume {folder}\n(or run the whole plan regardless with "
              f"--keep-going)", file=sys.stderr)
        print(f"\nresults: {folder}")
        return EXIT_STOPPED_EARLY
    if analysis:
        from benchharness.commands import postrun

        postrun.analyse_and_report(res)
    print(f"\nresults: {folder}")
    bad = outcome.counts.get("failed", 0) + outcome.counts.get("timeout", 0)
    if bad and not allow_failures:
        print(f"{bad} timed run{'s' if bad != 1 else ''} failed or timed out (see the "
              f"summary above): exit {EXIT_RUNS_FAILED}; --allow-failures accepts them",
              file=sys.stderr)
        return EXIT_RUNS_FAILED
    return 0


def _path_hint(res) -> str | None:
    """Why a command may not start: a relative path missing from the run directory."""
    import shlex

    from benchharness.execute.early_stop import path_hint

    exp, session = res.experiment, res.session or {}
    if not res.records:
        return None
    levels = {k: str(v) for k, v in (res.records[0].get("levels") or {}).items()}
    exp_dir = session.get("experiment_dir") or os.getcwd()
    run_dir = session.get("cwd") or os.getcwd()
    try:
        wd = exp.render_workdir(levels)
        for template in (exp.build, exp.command):
            if template is None:
                continue
            argv, shell = exp.render_command(template, levels)
            words = list(argv) if argv is not None else shlex.split(shell)
            hint = path_hint(words, os.path.normpath(run_dir if wd is None else
                                                     os.path.join(exp_dir, wd)), exp_dir)
            if hint:
                return hint
    except (ValueError, KeyError):   # an odd shell line: no hint rather than a wrong one
        return None
    return None


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
