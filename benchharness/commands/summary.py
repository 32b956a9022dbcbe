"""The per-cell summary printed when a run ends (our own layout)."""

from __future__ import annotations

import sys


def print_summary(res, outcome) -> None:
    from benchharness.execute.runner import cell_summary

    exp = res.experiment
    records = res.records
    rows = cell_summary(records, exp.factor_names)
    order = {f: {lab: i for i, lab in enumerate(exp.levels_of(f))} for f in exp.factor_names}
    rows.sort(key=lambda r: tuple(order[f].get(r["levels"][f], 0) for f in exp.factor_names))
    counts = outcome.counts
    seed_note = " (drawn; reproduce with --seed %d)" % outcome.seed \
        if res.session.get("seed_drawn") else ""
    print(f"\n{exp.name}: {counts.get('ok', 0)} ok, {counts.get('failed', 0)} failed, "
          f"{counts.get('timeout', 0)} timed out, {counts.get('warmup', 0)} warm-up; "
          f"seed {outcome.seed}{seed_note}")
    _print_reasons(records)
    _print_cells(exp.factor_names, rows)


def _print_reasons(records) -> None:
    """The five commonest messages of the runs that failed or timed out, with their counts."""
    reasons: dict[str, int] = {}
    for r in records:
        if r.get("status") in ("failed", "timeout") and r.get("message"):
            reasons[r["message"]] = reasons.get(r["message"], 0) + 1
    if not reasons:
        return
    print("why runs did not succeed:")
    for msg, n in sorted(reasons.items(), key=lambda kv: -kv[1])[:5]:
        print(f"  {n} run{'s' if n != 1 else ''}: {msg[:300]}")
    if len(reasons) > 5:
        print(f"  ... and {len(reasons) - 5} other messages (see the message column of "
              "runs.csv)")


def _print_cells(factor_names, rows) -> None:
    """The per-cell table: a rich table on a terminal, aligned plain text otherwise."""
    from benchharness.numbers import pick_scale

    header = [*factor_names, "runs ok", "median wall", "IQR", "failed", "timed out"]
    med = pick_scale("s", [r["median"] for r in rows])   # one unit per column
    iqr = pick_scale("s", [r["iqr"] for r in rows])
    table = [[*(str(r["levels"][f]) for f in factor_names), str(r["n"]), med.fmt(r["median"]),
              iqr.fmt(r["iqr"]), str(r["failed"]), str(r["timeout"])] for r in rows]
    nf = len(factor_names)
    if sys.stdout.isatty():
        from rich.console import Console
        from rich.table import Table

        t = Table(title="per cell", title_justify="left")
        for i, h in enumerate(header):
            t.add_column(h, justify="right" if i >= nf else "left")
        for row in table:
            t.add_row(*row)
        Console().print(t)
        return
    widths = [max(len(h), *(len(row[i]) for row in table)) if table else len(h)
              for i, h in enumerate(header)]

    def fmt(row):
        return "  ".join(c.ljust(w) if i < nf else c.rjust(w)
                         for i, (c, w) in enumerate(zip(row, widths)))
    print(fmt(header))
    for row in table:
        print(fmt(row))
