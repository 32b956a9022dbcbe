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
    p = sub.add_parser(
        "gate", help="CI regression gate: interleaved baseline vs candidate runs",
        description="Run baseline and candidate back to back in random order, block after "
                    "block, until the slowdown ratio is known to be below or above "
                    "1 + tolerance (or the budget is spent). Exit 0: no regression, 1: "
                    "regression, 3: inconclusive, 5: a build never ran successfully, 2: bad "
                    "input.")
    p.add_argument("file", nargs="?", metavar="FILE",
                   help="experiment file with a 'gate:' section (file form)")
    p.add_argument("--baseline", metavar="CMD", help="baseline command (quick form)")
    p.add_argument("--candidate", metavar="CMD", help="candidate command (quick form)")
    p.add_argument("--tolerance", metavar="PCT", help="slowdown still accepted (default 5%%)")
    p.add_argument("--confidence", metavar="LEVEL", help="confidence of the bounds (default 0.95)")
    p.add_argument("--max-runs", type=int, metavar="N",
                   help="budget: runs of each build for each workload (default 100)")
    p.add_argument("--min-runs", type=int, metavar="N",
                   help="blocks before the first look (default 6)")
    p.add_argument("--response", metavar="NAME", help="what to compare (default wall_s)")
    p.add_argument("--higher-is-better", action="store_true", default=None,
                   help="the response is a rate (throughput): slowdown = baseline/candidate")
    p.add_argument("--warmup", type=int, metavar="N",
                   help="warm-up runs of each build (quick form; default 1)")
    p.add_argument("--timeout", metavar="DURATION", help="per-run time limit (quick form), e.g. 60s")
    p.add_argument("--seed", type=int, metavar="N", help="seed of the run order")
    p.add_argument("--inconclusive", choices=("pass", "fail"),
                   help="exit code for an inconclusive verdict: 0 (pass) or 1 (fail) "
                        "instead of 3 (never for a build that never ran successfully: 5)")
    p.add_argument("--against", metavar="FOLDER",
                   help="stored baseline: take the baseline's runs from an earlier results "
                        "folder (confounds the change with the session; not recommended)")
    p.add_argument("--summary", metavar="FILE", help="append a Markdown summary to FILE")
    p.add_argument("--junit", metavar="FILE", help="write JUnit XML (one test case per workload)")
    p.add_argument("--json", metavar="FILE", help="write the verdicts as JSON")
    p.add_argument("--out", metavar="DIR", help="results folder to create "
                                                "(default results/<name>-<time>)")
    p.add_argument("--history", metavar="DB",
                   help="record the candidate's runs in this history database under the "
                        "current git commit")
    p.add_argument("--quiet", action="store_true", help="print only the verdict lines")
    p.set_defaults(func=main)


def _fraction(text, option):
    from benchharness.errors import UsageError

    t = str(text).strip()
    try:
        v = float(t[:-1]) / 100 if t.endswith("%") else float(t)
    except ValueError:
        raise UsageError(f"{option} {text!r}: give a percentage like 5% (or 0.05)") from None
    return v


def main(args) -> int:
    import json
    from pathlib import Path

    from benchharness.errors import UsageError
    from benchharness.experiment.file import Experiment, load_experiment
    from benchharness.gate import output
    from benchharness.gate.session import parse_gate_section, quick_experiment_text, run_session

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
    over: dict = {}
    if args.tolerance is not None:
        tol = _fraction(args.tolerance, "--tolerance")
        if not 0 < tol < 1:
            raise UsageError(f"--tolerance {args.tolerance}: must be above 0% and below 100%")
        over["tolerance"] = tol
    if args.confidence is not None:
        c = _fraction(args.confidence, "--confidence")
        if not 0.5 < c < 1:
            raise UsageError(f"--confidence {args.confidence}: give a level between 0.5 and 1, "
                             "e.g. 0.95")
        over["confidence"] = c
    if args.max_runs is not None:
        if args.max_runs < 2:
            raise UsageError("--max-runs must be at least 2")
        over["max_runs"] = args.max_runs
    if args.min_runs is not None:
        if args.min_runs < 2:
            raise UsageError("--min-runs must be at least 2")
        over["min_runs"] = args.min_runs
    if args.response:
        over["response"] = args.response
    if args.higher_is_better:
        over["higher_is_better"] = True
    if args.inconclusive:
        over["inconclusive"] = args.inconclusive
    if args.warmup is not None and args.warmup < 0:
        raise UsageError("--warmup must be 0 or more")
    if quick:
        if args.timeout is not None:
            from benchharness.experiment.yamlnodes import parse_duration_s

            if not parse_duration_s(args.timeout):
                raise UsageError(f"--timeout {args.timeout!r}: give a duration like 60s or 5m")
        text = quick_experiment_text(args.baseline, args.candidate,
                                     warmup=1 if args.warmup is None else args.warmup,
                                     timeout=args.timeout)
        exp = Experiment.from_text(text, path="<gate quick form>")
    else:
        if args.warmup is not None or args.timeout is not None:
            raise UsageError("--warmup and --timeout belong to the quick form; set warmup: and "
                             "timeout: in the experiment file")
        exp = load_experiment(args.file)
    cfg = parse_gate_section(exp, over)
    if cfg.settings.min_runs > cfg.settings.max_runs:
        raise UsageError("--min-runs must not exceed --max-runs")

    def progress(rec):
        if not args.quiet and sys.stderr.isatty():
            print(f"\r  runs so far: {rec['run'] + 1}", end="", file=sys.stderr, flush=True)

    # the verdict's files must be writable before any run is spent deciding it
    for opt, target in (("--summary", args.summary), ("--junit", args.junit),
                        ("--json", args.json)):
        if target:
            _check_writable(opt, target)
    outcome, folder = run_session(exp, cfg, out=args.out, seed=args.seed,
                                  stored_baseline=args.against, progress=progress)
    if not args.quiet and sys.stderr.isatty():
        print("", file=sys.stderr)
    for line in output.terminal_lines(outcome):
        print(line)
    print(f"results folder: {folder}")
    try:
        if args.summary:
            with open(args.summary, "a", encoding="utf-8") as fh:
                fh.write(output.markdown_summary(outcome, folder))
        if args.junit:
            Path(args.junit).write_text(output.junit_xml(outcome), encoding="utf-8")
        if args.json:
            Path(args.json).write_text(json.dumps(output.to_json_dict(outcome, folder),
                                                  indent=1) + "\n", encoding="utf-8")
    except OSError as exc:
        from benchharness.errors import DiskFullError, is_disk_full

        target = exc.filename or args.summary or args.junit or args.json
        if is_disk_full(exc):  # exit 75, never a verdict code nor 2 (bad input)
            raise DiskFullError(f"the disk is full (no space left on the device writing "
                                f"{target}); the verdict is in {folder}/gate.json; free some "
                                "space and run the command again") from None
        raise UsageError(f"{target}: cannot write ({exc.strerror}); the verdict is in "
                         f"{folder}/gate.json") from None
    if args.history:
        from benchharness.history import add_results

        n = add_results(args.history, folder, responses=(cfg.response,),
                        select={cfg.factor: cfg.candidate})
        print(f"history: {n} cell rows of the candidate added to {args.history}")
    return outcome.exit_code(cfg.inconclusive)


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
