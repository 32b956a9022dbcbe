"""`benchharness report SOURCE`: write the HTML and Markdown reports of an experiment."""

from __future__ import annotations


def add_parser(sub) -> None:
    from benchharness.commands import options as O

    p = sub.add_parser(
        "report", help="write the HTML and Markdown reports of a results folder or CSV",
        description="Analyse SOURCE (a results folder, or a tidy CSV with --factors) and write "
                    "a self-contained HTML report, a Markdown report and the figures (PNG and "
                    "SVG under figures/). For a results folder the files go into the folder.",
        epilog=O.examples(
            "benchharness report results/example-archive-codecs  # report.html, report.md and "
            "figures/ inside the folder",
            "benchharness report results/example-archive-codecs --compact --markdown -  # a "
            "short Markdown report on standard output, for a CI page",
            "benchharness report runs.csv --factors codec,level --html codecs.html  # a tidy "
            "CSV from elsewhere"))
    p.add_argument("source", metavar="SOURCE", type=O.source,
                   help="results folder or tidy CSV file")
    p.add_argument("--html", metavar="FILE", type=O.out_file("--html"),
                   help="HTML report path (default: SOURCE/report.html)")
    p.add_argument("--markdown", metavar="FILE", type=O.out_file("--markdown", stdout_ok=True),
                   help="Markdown report path (default: SOURCE/report.md; '-' prints it on "
                        "standard output)")
    p.add_argument("--compact", action="store_true",
                   help="short Markdown for a CI job summary page (verdict, effects, warnings)")
    p.add_argument("--factors", metavar="A,B", help="factor columns (required for a CSV)")
    p.add_argument("--response", metavar="NAME", help="response column (default: the analysis' "
                   "response, else the experiment file's response:, else wall_s)")
    p.add_argument("--tables", action="store_true",
                   help="also print the analysis as tables in the terminal")
    O.add_json(p, "where the reports were written and their headline")
    p.set_defaults(func=main)


def main(args) -> int:
    from benchharness.errors import UsageError, disk_full_writing, is_disk_full

    try:
        return _main(args)
    except OSError as exc:  # a report path that cannot be written: one line, exit 2
        where = exc.filename or args.html or args.markdown or args.source
        if is_disk_full(exc):  # not bad input: exit 75, like every full disk
            raise disk_full_writing(where) from None
        raise UsageError(f"{where}: cannot write the report ({exc.strerror or exc})") from None


def _main(args) -> int:
    import sys
    from pathlib import Path

    from benchharness.errors import UsageError
    from benchharness.report import build_report
    from benchharness.report.html import write_html
    from benchharness.report.markdown import render_markdown, write_markdown

    src = Path(args.source)
    factors = None
    if args.factors:
        factors = [f.strip() for f in args.factors.split(",") if f.strip()]
        if not factors:
            raise UsageError("--factors needs at least one column name (A,B,...)")
    if src.is_dir():
        base, stem = src, "report"
    else:
        base, stem = src.parent, f"{src.stem}.report"
    html = Path(args.html) if args.html else base / f"{stem}.html"
    to_stdout = args.markdown == "-"
    if to_stdout and (args.json or args.json_out == "-"):
        raise UsageError("--markdown - and --json both want standard output; write the "
                         "Markdown to a file (--markdown FILE) or drop --json")
    md = None if to_stdout else (Path(args.markdown) if args.markdown else base / f"{stem}.md")
    data, figs = build_report(src, response=args.response, factors=factors)
    fig_root = (md.parent if md is not None else html.parent)
    # A results folder owns figures/; CSV files sharing a directory get one figure folder
    # each, so the report of one never shows (or overwrites) the figures of another.
    fig_dir = "figures" if src.is_dir() else f"{src.stem}.figures"
    figs.save(fig_root, fig_dir)
    write_html(data, figs, html)
    if to_stdout:
        import os

        # printed Markdown has no location of its own: link figures from where it runs
        sys.stdout.write(render_markdown(data, figs, compact=args.compact,
                                         figures_rel=os.path.relpath(fig_root / fig_dir)))
        print(f"report: {html}", file=sys.stderr)
        _json(args, data, html, None, fig_root / fig_dir)
        return 0
    import os

    rel = os.path.relpath(fig_root / fig_dir, md.parent)
    write_markdown(data, figs, md, compact=args.compact, figures_rel=rel)
    if args.tables:
        from benchharness.report.terminal import print_analysis

        print_analysis(data)
    else:
        from benchharness.report.story import verdict

        print(verdict(data)["headline"])
    print(f"reports: {html}\n         {md}\nfigures: {fig_root / fig_dir}")
    _json(args, data, html, md, fig_root / fig_dir)
    return 0


def _json(args, data, html, md, figures) -> None:
    """The ``--json`` document of `report`: the files written and the headline."""
    if not (args.json or args.json_out):
        return
    from benchharness.commands.options import dumps, emit_json
    from benchharness.report.story import verdict

    emit_json(args, dumps({"html": str(html), "markdown": None if md is None else str(md),
                           "figures": str(figures), "headline": verdict(data)["headline"]}))
