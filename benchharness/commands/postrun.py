"""What `benchharness run` does after the last run: analysis.json and the reports.

The results folder, already read by the run command, is analysed once; the
terminal summary, analysis.json, the fraction table and the reports all render
that one analysis. Each step is skipped with a note (never a crash) when the
data cannot support it, e.g. a single cell, or no successful runs; the results
folder stays intact.
"""

from __future__ import annotations

import sys
from dataclasses import replace


def analyse_and_report(res) -> None:
    """Analyse the results folder ``res`` (`benchharness.results.journal.Results`) and
    write analysis.json and the reports into it."""
    from benchharness.errors import BenchharnessError

    an = None
    try:
        an = _analyse(res)
    except BenchharnessError as exc:
        print(f"note: no analysis: {exc}", file=sys.stderr)
        if not _nothing_finished(res):
            return
        # Every run failed: the report still shows the design and why the runs failed.
    from benchharness.report import write_reports

    try:
        html, md = write_reports(res, analysis=an)
        print(f"\nreports: {html}\n         {md}")
    except BenchharnessError as exc:
        print(f"note: no report: {exc}", file=sys.stderr)


def _analyse(res):
    """The analysis of ``res``, written to analysis.json and printed; with the fraction
    table of a two-level design in confounded blocks attached."""
    from benchharness.analysis import analyze, write_analysis_json
    from benchharness.analysis.fraction import add_to_results_folder, format_fraction
    from benchharness.errors import BenchharnessError
    from benchharness.report.terminal import print_analysis

    an = analyze(res)
    write_analysis_json(an, res.path / "analysis.json")
    print()
    print_analysis(an)
    # Two-level fractions (in the analysis itself) and confounded blocks of a full
    # two-level design (added to analysis.json here): effects with their aliases.
    frac = an.fraction
    if frac is None:
        try:
            frac = add_to_results_folder(res, an.response,
                                         log=(an.transform or {}).get("name") != "none")
        except BenchharnessError as exc:
            print(f"note: no fraction analysis: {exc}", file=sys.stderr)
        if frac is not None:
            an = replace(an, fraction=frac)   # the reports show what analysis.json holds
    if frac is not None:
        print()
        print(format_fraction(frac))
    return an


def _nothing_finished(res) -> bool:
    """True when no timed run of the results folder finished with a value."""
    from benchharness.experiment.response import default_response
    from benchharness.report.data import nothing_finished

    return nothing_finished(res.runs, default_response(getattr(res, "experiment", None)))
