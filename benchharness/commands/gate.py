"""`benchharness gate`: is the candidate slower than the baseline? Exit 0 / 1 / 3.

Quick form: ``benchharness gate --baseline CMD --candidate CMD``. File form:
``benchharness gate FILE`` with a ``gate:`` section. The work is done by
`benchharness.gate.session`; this module parses, prints and maps the verdict to
the exit code (0 no regression, 1 regression, 2 bad input, 3 inconclusive
unless ``--inconclusive pass|fail``, 5 a build never ran successfully).
"""

from __future__ import annotations

import sys


def add_parser(sub) -> None:
    from benchharness.commands import options as O

    p = sub.add_parser(
        "gate", help="CI regression gate: interleaved baseline vs candidate runs",
        description="Run baseline and candidate back to back in random order, one pair "
                    "after another, until the slowdown ratio is known to be below or above "
                    "1 + tolerance (or the budget is spent). Exit 0: no regression, 1: "
                    "regression, 3: inconclusive, 5: a build never ran successfully, 2: bad "
                    "input.",
        epilog=O.examples(
            "benchharness gate --baseline 'python3 experiments/workloads/squeeze.py --codec "
            "zlib --level 6 --input text' --candidate 'python3 experiments/workloads/squeeze.py "
            "--codec zlib --level 9 --input text' --tolerance 5%  # quick form: is level 9 more "
            "than 5% slower than level 6?",
            "benchharness gate experiments/gate-levels.yaml --junit gate.xml --summary "
            "summary.md  # file form: each input kind judged on its own, CI files written",
            "benchharness gate experiments/gate-levels.yaml --json > verdicts.json  # the "
            "verdicts as one JSON document"))
    p.add_argument("file", nargs="?", metavar="FILE",
                   help="experiment file with a 'gate:' section (file form)")
    p.add_argument("--baseline", metavar="CMD", help="baseline command (quick form)")
    p.add_argument("--candidate", metavar="CMD", help="candidate command (quick form)")
    p.add_argument("--tolerance", metavar="RATIO", type=O.ratio("--tolerance"),
                   help="slowdown still accepted: 5%% or 1.05x (default 5%%)")
    p.add_argument("--confidence", metavar="PCT", type=O.confidence,
                   help="confidence of the bounds, 50%% to 100%% (default 95%%)")
    p.add_argument("--max-pairs", type=O.count(2), metavar="N", dest="max_pairs",
                   help="budget: most pairs (one baseline and one candidate run) for each "
                        "workload (default 100)")
    O.alias(p, "--max-runs", "--max-pairs N", "max_pairs", convert=O.count(2), metavar="N")
    p.add_argument("--first-look-pairs", type=O.count(2), metavar="N", dest="first_look_pairs",
                   help="pairs run before the first look at the bounds (default 6)")
    O.alias(p, "--min-runs", "--first-look-pairs N", "first_look_pairs", convert=O.count(2),
            metavar="N")
    p.add_argument("--response", metavar="NAME", help="what to compare (default: the file's gate: response:, else its "
                        "response:, else wall_s)")
    p.add_argument("--better", choices=("lower", "higher"), default=None,
                   help="which direction of the response is better (default: the metric's "
                        "declaration, else lower); higher for a rate such as throughput, "
                        "where slowdown = baseline/candidate")
    O.alias(p, "--higher-is-better", "--better higher", "better", flag=True,
            convert=lambda _: "higher")
    p.add_argument("--warmup-runs", type=O.count(0), metavar="N", dest="warmup_runs",
                   help="untimed runs of each build before the first pair (quick form; "
                        "default 1)")
    O.alias(p, "--warmup", "--warmup-runs N", "warmup_runs", convert=O.count(0), metavar="N")
    p.add_argument("--timeout", metavar="DURATION", type=O.duration,
                   help="per-run time limit (quick form), e.g. 60s")
    p.add_argument("--seed", type=int, metavar="N", help="seed of the run order")
    p.add_argument("--inconclusive", choices=("pass", "fail", "distinct"),
                   help="exit code for an inconclusive verdict: 0 (pass) or 1 (fail) "
                        "instead of 3 (never for a build that never ran successfully: 5); "
                        "distinct keeps 3, over a gate: section's inconclusive")
    p.add_argument("--against", metavar="FOLDER",
                   help="stored baseline: take the baseline's runs from an earlier results "
                        "folder (confounds the change with the session; not recommended)")
    p.add_argument("--summary", metavar="FILE", type=O.out_file("--summary"),
                   help="append a Markdown summary to FILE")
    p.add_argument("--junit", metavar="FILE", type=O.out_file("--junit"),
                   help="write JUnit XML (one test case per workload)")
    O.add_json(p, "the verdicts")
    p.add_argument("--out", metavar="DIR", type=O.out_file("--out"),
                   help="results folder to create (default results/<name>-<time>)")
    p.add_argument("--history-db", metavar="FILE", type=O.out_file("--history-db"),
                   help="record the candidate's runs in this history database under the "
                        "current git commit")
    O.alias(p, "--history", "--history-db FILE", "history_db", metavar="FILE")
    p.add_argument("--quiet", action="store_true", help="print only the verdict lines")
    p.set_defaults(func=main)


def main(args) -> int:
    from benchharness.errors import UsageError
    from benchharness.gate import output
    from benchharness.gate.session import parse_gate_section, run_session

    quick = _form(args)
    over = _overrides(args)
    exp = _experiment(args, quick)
    cfg = parse_gate_section(exp, over)
    if cfg.settings.min_runs > cfg.settings.max_runs:
        raise UsageError("--first-look-pairs must not exceed --max-pairs")

    def progress(rec):
        if not args.quiet and sys.stderr.isatty():
            print(f"\r  runs so far: {rec['run'] + 1}", end="", file=sys.stderr, flush=True)

    # the verdict's files must be writable before any run is spent deciding it
    for opt, target in (("--summary", args.summary), ("--junit", args.junit),
                        ("--json-out", args.json_out)):
        if target and target != "-":
            _check_writable(opt, target)
    outcome, folder = run_session(exp, cfg, out=args.out, seed=args.seed,
                                  stored_baseline=args.against, progress=progress)
    if not args.quiet and sys.stderr.isatty():
        print("", file=sys.stderr)
    warnings = set(outcome.warnings)  # warnings go to standard error (docs/cli.md)
    for line in output.terminal_lines(outcome):
        print(line, file=sys.stderr if line in warnings else sys.stdout)
    print(f"results folder: {folder}")
    _write_files(args, outcome, folder)
    if args.history_db:
        from benchharness.history import add_results

        n = add_results(args.history_db, folder, responses=(cfg.response,),
                        select={cfg.factor: cfg.candidate})
        from benchharness.numbers import plural

        print(f"history: {plural(n, 'cell row')} of the candidate added to {args.history_db}")
    return outcome.exit_code(cfg.inconclusive)


def _form(args) -> bool:
    """True for the quick form (--baseline/--candidate), False for the file form; refuses a mix.

    In stored-baseline mode (--against) the quick form needs only --candidate.
    """
    from benchharness.errors import UsageError

    quick = args.baseline is not None or args.candidate is not None
    if quick and args.file:
        raise UsageError("give either FILE or --baseline/--candidate, not both")
    if not quick and not args.file:
        raise UsageError("give an experiment FILE with a 'gate:' section, or --baseline CMD "
                         "--candidate CMD")
    if quick and args.against and args.baseline is None and args.candidate is not None:
        # stored-baseline mode runs only the candidate: the baseline's runs are read from
        # the folder, so no baseline command is needed (a shell no-op records where from)
        args.baseline = f": stored baseline runs from {args.against}"
    if quick and (args.baseline is None or args.candidate is None):
        raise UsageError("the quick form needs both --baseline CMD and --candidate CMD")
    return quick


def _overrides(args) -> dict:
    """The gate settings given on the command line, each checked, keyed as the gate section's."""
    from benchharness.errors import UsageError

    over: dict = {}
    if args.tolerance is not None:
        from benchharness import values as V

        tol = V.change_of(args.tolerance)
        if not 0 < tol < 1:
            raise UsageError("--tolerance: must be above 0% and below 100% (a ratio between 1 "
                             "and 2)")
        over["tolerance"] = tol
    if args.confidence is not None:
        if not 0.5 < args.confidence < 1:
            raise UsageError(f"--confidence {args.confidence:.0%}: give a level between 50% "
                             "and 100%, e.g. 95%")
        over["confidence"] = args.confidence
    for key, value in (("max_runs", args.max_pairs), ("min_runs", args.first_look_pairs)):
        if value is not None:
            over[key] = value
    if args.response:
        over["response"] = args.response
    if args.better is not None:
        over["higher_is_better"] = args.better == "higher"
    if args.inconclusive:
        over["inconclusive"] = args.inconclusive   # "distinct" is mapped in gate/config.py
    return over


def _experiment(args, quick: bool):
    """The experiment to gate: written from the two commands (quick form) or read from FILE."""
    from benchharness.errors import UsageError
    from benchharness.experiment.file import Experiment, load_experiment
    from benchharness.gate.session import quick_experiment_text

    if quick:
        text = quick_experiment_text(args.baseline, args.candidate,
                                     warmup=1 if args.warmup_runs is None else args.warmup_runs,
                                     timeout=None if args.timeout is None else
                                     f"{args.timeout!r}s")
        return Experiment.from_text(text, path="<gate quick form>")
    if args.warmup_runs is not None or args.timeout is not None:
        raise UsageError("--warmup-runs and --timeout belong to the quick form; set warmup: "
                         "and timeout: in the experiment file")
    return load_experiment(args.file)


def _write_files(args, outcome, folder) -> None:
    """The --summary, --junit and --json(-out) files; a write that fails names the file and
    where the verdict still is (exit 75 for a full disk, else 2)."""
    import json
    from pathlib import Path

    from benchharness.errors import UsageError
    from benchharness.gate import output

    try:
        if args.summary:
            with open(args.summary, "a", encoding="utf-8") as fh:
                fh.write(output.markdown_summary(outcome, folder))
        if args.junit:
            Path(args.junit).write_text(output.junit_xml(outcome), encoding="utf-8")
        if args.json or args.json_out:
            from benchharness.commands.options import emit_json

            emit_json(args, json.dumps(output.to_json_dict(outcome, folder), indent=1))
    except OSError as exc:
        from benchharness.errors import DiskFullError, is_disk_full

        target = exc.filename or args.summary or args.junit or args.json_out
        if is_disk_full(exc):  # exit 75, never a verdict code nor 2 (bad input)
            raise DiskFullError(f"the disk is full (no space left on the device writing "
                                f"{target}); the verdict is in {folder}/gate.json; free some "
                                "space and run the command again") from None
        raise UsageError(f"{target}: cannot write ({exc.strerror}); the verdict is in "
                         f"{folder}/gate.json") from None


def _check_writable(opt: str, target) -> None:
    import os
    from pathlib import Path

    from benchharness.errors import UsageError

    p = Path(target)
    parent = p.parent if str(p.parent) else Path(".")
    if p.is_dir():
        raise UsageError(f"{opt} {target}: is a folder; give a file path")
    if not parent.is_dir():
        raise UsageError(f"{opt} {target}: the folder {parent} does not exist; create it or "
                         "give another path")
    if not os.access(parent, os.W_OK) or (p.exists() and not os.access(p, os.W_OK)):
        raise UsageError(f"{opt} {target}: cannot write there")
