"""What `benchharness run` does after the last run: analysis.json and the reports.

Each step is skipped with a note (never a crash) when the data cannot support it,
e.g. a single cell, or no successful runs; the results folder stays intact.
"""

from __future__ import annotations

import sys


def analyse_and_report(res) -> None:
    from benchharness.errors import BenchharnessError

    try:
        from benchharness import analysis as _a  # noqa: F401
    except ImportError:
        return
    try:
        from benchharness.analysis import analyze_results_folder, write_analysis_json

        an = analyze_results_folder(res.path)
        write_analysis_json(an, res.path / "analysis.json")
        print()
        from benchharness.report.terminal import print_analysis

        print_analysis(an)
        # Two-level fractions (in the analysis itself) and confounded blocks of a full
        # two-level design (added to analysis.json here): effects with their aliases.
        from benchharness.analysis.fraction import add_to_results_folder, format_fraction

        frac = an.fraction
        if frac is None:
            try:
                frac = add_to_results_folder(res.path, an.response,
                                             log=(an.transform or {}).get("name") != "none")
            except BenchharnessError as exc:
                print(f"note: no fraction analysis: {exc}", file=sys.stderr)
        if frac is not None:
            print()
            print(format_fraction(frac))
    except BenchharnessError as exc:
        print(f"note: no analysis: {exc}", file=sys.stderr)
        if not nothing_finished(res.path):
            return
        # Every run failed: the report still shows the design and why the runs failed.
    try:
        from benchharness.report import write_reports
    except ImportError:
        return
    try:
        html, md = write_reports(res.path)
        print(f"\nreports: {html}\n         {md}")
    except BenchharnessError as exc:
        print(f"note: no report: {exc}", file=sys.stderr)


def nothing_finished(folder) -> bool:
    """True when no timed run of the results folder finished with a value."""
    try:
        from benchharness.results.journal import load_results
        from benchharness.report.data import nothing_finished as nothing

        return nothing(load_results(folder).runs, "wall_s")
    except Exception:  # noqa: BLE001 - only decides whether to try the report
        return False
