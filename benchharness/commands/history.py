"""`benchharness history add|show`: keep a performance record across commits and read it."""

from __future__ import annotations

import json
import sys


def add_parser(sub) -> None:
    from benchharness.history import DEFAULT_DB

    p = sub.add_parser("history", help="record results per commit; show trends and steps",
                       description="Keep per-cell summaries of results folders in an SQLite "
                                   "file, one row per folder and cell, and show each cell's "
                                   "series over commits with the steps found in it.")
    hs = p.add_subparsers(dest="history_command", metavar="ACTION")
    a = hs.add_parser("add", help="record results folders in the history file",
                      description="Record results folders (per-cell summaries) under the "
                                  "commit they measured. A folder already recorded adds "
                                  "nothing.")
    a.add_argument("results", nargs="+", metavar="RESULTS", help="results folder(s)")
    a.add_argument("--commit", metavar="SHA",
                   help="commit measured (default: HEAD of the git repository here)")
    a.add_argument("--branch", metavar="NAME", help="branch measured (default: from git)")
    a.add_argument("--db", metavar="FILE", default=str(DEFAULT_DB),
                   help=f"history file (default {DEFAULT_DB})")
    a.add_argument("--response", action="append", metavar="NAME",
                   help="response column to record; repeat for several (default wall_s)")
    a.add_argument("--only", metavar="K=V,...",
                   help="record only the runs at these levels, leaving those factors out of "
                        "the cells (e.g. the candidate side of an interleaved comparison)")
    a.set_defaults(func=main_add)

    s = hs.add_parser("show", help="show each cell's trend over commits",
                      description="Show each cell's series over commits with intervals, the "
                                  "steps found in it and host changes.")
    s.add_argument("--experiment", metavar="NAME", help="only this experiment")
    s.add_argument("--cell", metavar="K=V,...", help="only cells with these levels")
    s.add_argument("--response", metavar="NAME", default="wall_s",
                   help="response to show (default wall_s)")
    s.add_argument("--branch", metavar="NAME", help="only commits recorded on this branch")
    s.add_argument("--db", metavar="FILE", default=str(DEFAULT_DB),
                   help=f"history file (default {DEFAULT_DB})")
    s.add_argument("--html", metavar="FILE", help="also write a self-contained HTML page")
    s.add_argument("--json", metavar="FILE", help="also write the trends and steps as JSON")
    s.add_argument("--false-step-level", type=float, default=0.05, metavar="P",
                   help="chance of a false step in a flat series of one host (default 0.05)")
    s.add_argument("--fail-on-regression", action="store_true",
                   help="exit 1 when a regression step is found that has not been undone "
                        "(two or more commits show it); a change only the newest commit "
                        "shows is named as not yet confirmed and does not fail")
    s.set_defaults(func=main_show)
    p.set_defaults(func=lambda args: (p.print_help(), 2)[1])


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

    responses = tuple(args.response or ("wall_s",))
    select = parse_cell_filter(args.only, option="--only")
    for folder in args.results:
        n = add_results(args.db, folder, commit=args.commit, branch=args.branch,
                        responses=responses, select=select)
        from benchharness.numbers import plural

        what = f"{plural(n, 'cell row')} added" if n else "already recorded, nothing added"
        print(f"{folder}: {what} ({args.db})")
    return 0


def main_show(args) -> int:
    from benchharness.errors import UsageError
    from benchharness.history.store import parse_cell_filter, read_history
    from benchharness.history.trends import build_trends, step_kind, to_json_dict

    if not (0 < args.false_step_level < 1):
        raise UsageError(f"--false-step-level {args.false_step_level}: give a probability "
                         "between 0 and 1, e.g. 0.05")
    df = read_history(args.db, experiment=args.experiment, response=args.response,
                      cell_filter=parse_cell_filter(args.cell))
    if args.branch is not None:
        df = df[df["branch"] == args.branch]
    trends = build_trends(df, alpha=args.false_step_level)
    from benchharness.history.render import print_trends, render_html

    print_trends(trends)
    if args.json:
        write_text(args.json, json.dumps(to_json_dict(trends), indent=1) + "\n", "--json")
    if args.html:
        write_text(args.html, render_html(trends, experiment=args.experiment,
                                          alpha=args.false_step_level), "--html")
        print(f"wrote {args.html}", file=sys.stderr)
    if args.fail_on_regression:
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
    return 0
