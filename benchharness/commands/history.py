"""`benchharness history add|show`: keep a performance record across commits and read it."""

from __future__ import annotations

import json
import sys


def add_parser(sub) -> None:
    from benchharness.commands import options as O
    from benchharness.history import DEFAULT_DB

    p = sub.add_parser("history", help="record results per commit; show trends and steps",
                       description="Keep per-cell summaries of results folders in an SQLite "
                                   "file, one row per folder and cell, and show each cell's "
                                   "series over commits with the steps found in it.",
                       epilog=O.examples(
                           "benchharness history add results/example-archive-codecs  # record "
                           "a results folder under the current git commit",
                           "benchharness history show --fail-on-regression  # trends and steps; "
                           "exit 1 on a confirmed regression"))
    hs = p.add_subparsers(dest="history_command", metavar="ACTION")
    a = hs.add_parser("add", help="record results folders in the history file",
                      description="Record results folders (per-cell summaries) under the "
                                  "commit they measured. A folder already recorded adds "
                                  "nothing.",
                      epilog=O.examples(
                          "benchharness history add results/example-archive-codecs  # under "
                          "HEAD of the git repository here",
                          "benchharness history add results/codecs-* --commit 3f2a9c1 "
                          "--history-db perf.sqlite  # several folders, a given commit, "
                          "another database",
                          "benchharness history add results/example-archive-codecs --json  # "
                          "what was added, as one JSON document"))
    a.add_argument("results", nargs="+", metavar="FOLDER", help="results folder(s)")
    a.add_argument("--commit", metavar="SHA",
                   help="commit measured (default: HEAD of the git repository here)")
    a.add_argument("--branch", metavar="NAME", help="branch measured (default: from git)")
    a.add_argument("--history-db", metavar="FILE", default=str(DEFAULT_DB),
                   type=O.out_file("--history-db"),
                   help=f"history database (default {DEFAULT_DB})")
    O.alias(a, "--db", "--history-db FILE", "history_db", metavar="FILE")
    a.add_argument("--response", action="append", metavar="NAME",
                   help="response column to record; repeat for several (default wall_s "
                        "and the experiment file's response:)")
    a.add_argument("--only", metavar="K=V,...",
                   help="record only the runs at these levels, leaving those factors out of "
                        "the cells (e.g. the candidate side of an interleaved comparison)")
    O.add_json(a, "the rows added per folder")
    a.set_defaults(func=main_add)

    s = hs.add_parser("show", help="show each cell's trend over commits",
                      description="Show each cell's series over commits with intervals, the "
                                  "steps found in it and host changes.",
                      epilog=O.examples(
                          "benchharness history show  # every cell of every experiment in "
                          f"{DEFAULT_DB}",
                          "benchharness history show --experiment archive-codecs --cell "
                          "codec=zlib --html trend.html  # one experiment's zlib cells, with a "
                          "page of trend figures",
                          "benchharness history show --fail-on-regression --json  # for CI: "
                          "trends and steps as JSON, exit 1 on a confirmed regression"))
    s.add_argument("--experiment", metavar="NAME", help="only this experiment")
    s.add_argument("--cell", metavar="K=V,...", help="only cells with these levels")
    s.add_argument("--response", metavar="NAME", default=None,
                   help="response to show (default: every response recorded)")
    s.add_argument("--branch", metavar="NAME", help="only commits recorded on this branch")
    s.add_argument("--history-db", metavar="FILE", default=str(DEFAULT_DB),
                   help=f"history database (default {DEFAULT_DB})")
    O.alias(s, "--db", "--history-db FILE", "history_db", metavar="FILE")
    s.add_argument("--html", metavar="FILE", type=O.out_file("--html"),
                   help="also write a self-contained HTML page")
    O.add_json(s, "the trends and steps")
    s.add_argument("--confidence", type=O.confidence, default=0.95, metavar="PCT",
                   help="a flat series of one host shows a false step with a chance of at "
                        "most 100%% minus this (default 95%%: 5%%)")
    O.alias(s, "--false-step-level", O.confidence_for("--false-step-level"),
            "confidence", convert=O.complement,
            metavar="P")
    s.add_argument("--fail-on-regression", action="store_true",
                   help="exit 1 when a regression step is found that has not been undone "
                        "(two or more commits show it); a change only the newest commit "
                        "shows is named as not yet confirmed and does not fail")
    s.set_defaults(func=main_show)
    p.set_defaults(func=lambda args: (p.print_help(sys.stderr), 2)[1])   # no action: usage


def write_text(path: str, text: str, option: str) -> None:
    """Write an output file; a bad path is one clear line (exit 2), not a traceback."""
    from benchharness.errors import UsageError

    try:
        with open(path, "w", encoding="utf-8") as fh:
            fh.write(text)
    except OSError as exc:
        from benchharness.errors import disk_full_writing, is_disk_full

        if is_disk_full(exc):
            raise disk_full_writing(path) from None
        raise UsageError(f"{option} {path}: cannot write ({exc.strerror or exc})") from None


def main_add(args) -> int:
    from benchharness.history.store import add_results, parse_cell_filter

    responses = tuple(args.response) if args.response else None   # None: wall_s + the file's
    select = parse_cell_filter(args.only, option="--only")
    added = []
    for folder in args.results:
        n = add_results(args.history_db, folder, commit=args.commit, branch=args.branch,
                        responses=responses, select=select)
        from benchharness.numbers import plural

        what = f"{plural(n, 'cell row')} added" if n else "already recorded, nothing added"
        print(f"{folder}: {what} ({args.history_db})")
        added.append({"folder": str(folder), "cell_rows_added": n})
    if args.json or args.json_out:
        from benchharness.commands.options import emit_json

        emit_json(args, json.dumps({"history_db": str(args.history_db), "added": added},
                                   indent=1))
    return 0


def main_show(args) -> int:
    from benchharness.history.store import parse_cell_filter, read_history
    from benchharness.history.trends import build_trends, to_json_dict

    false_step = round(1.0 - args.confidence, 12)
    df = read_history(args.history_db, experiment=args.experiment, response=args.response,
                      cell_filter=parse_cell_filter(args.cell))
    if args.branch is not None:
        df = df[df["branch"] == args.branch]
    _declare_units(args)
    trends = build_trends(df, alpha=false_step)
    from benchharness.history.render import print_trends, render_html

    from benchharness.commands.options import emit_json, wants_json_only

    if args.json or args.json_out:
        emit_json(args, json.dumps(to_json_dict(trends), indent=1))
    if not wants_json_only(args):
        print_trends(trends)
    if args.html:
        write_text(args.html, render_html(trends, experiment=args.experiment,
                                          alpha=false_step), "--html")
        print(f"wrote {args.html}", file=sys.stderr)
    if args.fail_on_regression:
        return _regression_exit(trends)
    return 0


def _declare_units(args) -> None:
    """Each metric's unit as the history file recorded it, so it prints as declared."""
    from benchharness.history.store import read_units
    from benchharness.report.units import declare_unit

    for (experiment, response), unit in read_units(args.history_db).items():
        if args.experiment in (None, experiment):
            declare_unit(response, unit)


def _regression_exit(trends) -> int:
    """``--fail-on-regression``: 1 when a confirmed regression step is open, else 0; each
    open regression, and each one not yet confirmed, named on stderr."""
    from benchharness.history.trends import step_kind
    from benchharness.numbers import fmt_ratio

    open_regressions = [
        (t, st) for t in trends if t.detection is not None for st in t.detection.steps
        if st.persists is not False and step_kind(t.response, st.ratio, st.persists)
        == "regression"]
    for t, st in open_regressions:
        print(f"regression: {t.experiment} {t.response} {t.label} at commit "
              f"{t.points[st.index].commit} ({fmt_ratio(st.ratio)})", file=sys.stderr)
    for t in trends:
        for st in (t.detection.unconfirmed if t.detection is not None else ()):
            if step_kind(t.response, st.ratio, None) == "regression":
                who = ("only the newest commit shows it" if (st.newest or 1) == 1 else
                       f"the newest {st.newest} commits show it, but the look before "
                       "did not")
                print(f"not yet confirmed: {t.experiment} {t.response} {t.label} at "
                      f"commit {t.points[st.index].commit} ({fmt_ratio(st.ratio)}); {who}, so "
                      "it does not fail this check yet", file=sys.stderr)
    return 1 if open_regressions else 0
