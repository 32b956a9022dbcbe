"""Putting a `Choice` into words: plain terminal text and a report section dict.

This module owns the wording of a choice (ours, plain English). It does no
statistics; everything comes from ``Choice.to_dict()``.
"""

from __future__ import annotations

from benchharness.numbers import MISSING, fmt_ratio, pick_scale

__all__ = ["condition_word", "section_dict", "terminal_text"]

#: columns besides the factors that are environments (where the runs happened)
_ENVIRONMENT_COLUMNS = ("host", "worker")


def condition_word(across, roles: dict) -> str:
    """The word for one combination of the ``across`` columns (DESIGN.md, "Factor roles"):
    ``workload`` when every column is a workload (declared or guessed), ``environment``
    when every one is an environment (declared, or the ``host``/``worker`` columns),
    else ``condition`` (columns of mixed or undeclared roles, blocks, replicates)."""
    kinds = set()
    for a in across:
        if a in (roles.get("workload") or ()):
            kinds.add("workload")
        elif a in (roles.get("environment") or ()) or a in _ENVIRONMENT_COLUMNS:
            kinds.add("environment")
        else:
            kinds.add("condition")
    return kinds.pop() if len(kinds) == 1 else "condition"


def article(noun: str) -> str:
    """'a' or 'an' before ``noun``."""
    return "an" if noun[:1] in "aeiou" else "a"


def _noun(d: dict) -> str:
    return condition_word(d.get("across") or (), d.get("roles") or {})


def _unit(d: dict) -> str:
    """The response's unit (from its name, or as declared for a custom metric)."""
    from benchharness.report.units import unit_of

    return unit_of(d["response"])


def _setting(m) -> str:
    return ", ".join(f"{k}={v}" for k, v in m.items()) or "(all runs)"


def _ratio_words(r) -> str:
    return fmt_ratio(r)


def _rows(d: dict) -> tuple[list[str], list[list[str]]]:
    """The choice table: short headers, cells that wrap at spaces (fits a 1280 px page)."""
    log = d["scale"] == "log"
    cols = _columns(d, log)
    unit = _unit(d)
    # one unit per column, chosen from the column's values (docs/cli.md)
    mean_s = pick_scale(unit, [c["mean"] for c in d["candidates"]])
    loss_s = pick_scale(unit, [c.get(k) for c in d["candidates"]
                               for k in ("worst_case_loss", "worst_loss", "mean_loss")])
    return cols, [_row(d, c, log, mean_s, loss_s) for c in d["candidates"]]


def _columns(d: dict, log: bool) -> list[str]:
    """The table's headers (the worst-condition and average columns with ``across``)."""
    cols = ["setting", d["response"], "runs", "verdict", "vs best, at most"]
    cols.append(f"worst {_noun(d)}" if d["across"] else ("vs best" if log else "minus best"))
    if d["across"]:
        cols.append("average")
    if d.get("also"):
        cols.append("on front")
    return cols


def _row(d: dict, c: dict, log: bool, mean_s, loss_s) -> list[str]:
    """One candidate's row: its mean, runs, verdict and losses against the best."""
    excluded = c.get("within_limits") is False
    verdict = ("outside limits" if excluded else "recommended" if c["recommended"]
               else "tied" if c["tied"] else "worse")
    wc = _ratio_words(c["worst_case_loss"]) if log else loss_s.fmt(c["worst_case_loss"])
    we = MISSING if excluded else _worst_words(d, c, log, loss_s)
    row = [_setting(c["setting"]), mean_s.fmt(c["mean"]), str(c["runs"]), verdict, wc, we]
    if d["across"]:
        row.append(_ratio_words(c["mean_ratio"]) if log else loss_s.fmt(c["mean_loss"]))
    if d.get("also"):
        row.append("yes" if c.get("on_front") else "no")
    return row


def _worst_words(d: dict, c: dict, log: bool, loss_s) -> str:
    """The worst loss against the best: with ``across``, in which condition."""
    if d["across"]:
        env = _setting(c["worst_environment"])
        return (f"{_ratio_words(c['worst_ratio'])} ({env})" if log
                else f"{loss_s.fmt(c['worst_loss'])} ({env})")
    return _ratio_words(c["worst_ratio"]) if log else loss_s.fmt(c["worst_loss"])


def section_dict(choice) -> dict:
    """A report section: ``title``, ``summary`` (sentences), ``recommendation``,
    ``columns``/``rows`` (a table of strings, one row per setting),
    ``notes`` (how the numbers were made) and ``choice`` (the full dict)."""
    d = choice.to_dict()
    cols, rows = _rows(d)
    res = d["residual"]
    noun = _noun(d)
    notes = [
        f"Response {d['response']} ({d['better']} is better), analysed on "
        + (d.get("scale_reason") or
           f"the {'log' if d['scale'] == 'log' else 'original'} scale")
        + f"; {runs_words(d)}. The {d['response']} "
        f"column is each setting's {'geometric ' if d['scale'] == 'log' else ''}mean"
        + (f", every {noun} weighing the same." if d["across"] else "."),
        "Noise: pooled residual of the "
        + (f"full setting-by-{noun}" if res['model'] == 'cells' else f"additive setting + {noun}")
        + " "
        f"model{' with ' + res['block'] + ' as an additive block term' if res.get('block') else ''}, "
        f"{res['df']:g} degrees of freedom.",
        "vs best, at most: how much worse than the best of the other settings this setting "
        f"can be, at {d['confidence'] * 100:g}% confidence (multiple comparisons with the best"
        f"{'; a ratio' if d['scale'] == 'log' else '; a difference'}).",
    ]
    if d.get("also"):
        notes.append(f"On front: not beaten on the trade-off between {d['response']} and "
                     f"{', '.join(d['also'])} with a practical margin of "
                     f"{(d.get('within') or 0) * 100:g}%.")
    for lim in d.get("limits") or []:
        notes.append(f"Limit {lim['text']}: judged "
                     + ("on confidence bounds (shown within it)" if lim["confident"]
                        else "on the estimates (no setting was shown within it)")
                     + f"; met by {len(lim['met_by'])} of {len(lim['settings'])} settings.")
    if d.get("without_runs"):
        notes.append(f"Not candidates (no ok run with a value of {d['response']}): "
                     + "; ".join(_setting(w) for w in d["without_runs"]) + ".")
    if d["across"]:
        what = (f"{d['across'][0]} level" if len(d["across"]) == 1
                else " and ".join(d["across"]) + " combination")
        notes.append(f"Worst {noun}: the setting's ratio to the best setting of the "
                     f"{what} where it does worst (estimates); average: the geometric mean of "
                     f"those ratios over every {noun}.")
    sf = d.get("surface")
    return {
        "title": "Choosing a default",
        "summary": ([sf["statement"] + "."] if sf else []) + list(d["reasons"]),
        "recommendation": dict(d["best"]),
        "columns": cols,
        "rows": rows,
        "notes": notes,
        "choice": d,
    }


def runs_words(d: dict) -> str:
    """"30 ok runs used, 9 left out: 6 failed or timed out (...), 3 of a setting not
    considered (...)": every run of the table is either used or counted, with why."""
    from benchharness.numbers import plural

    out = d.get("runs_left_out") or {}
    parts = []
    if out.get("failed"):
        every = [_setting(w) for w in d.get("without_runs") or []]
        parts.append(f"{out['failed']} failed or timed out"
                     + (f" (among them every run of {'; '.join(every)}, never successful)"
                        if every else ""))
    if out.get("no_value"):
        parts.append(f"{out['no_value']} ok without a value of {d['response']}")
    if out.get("warmup"):
        parts.append(f"{plural(out['warmup'], 'warm-up run')}")
    if out.get("unavailable"):
        which = "; ".join(
            f"{_setting(u['setting'])}, excluded with "
            + " / ".join(_setting(m) for m in u["missing"]) for u in d.get("unavailable") or [])
        parts.append(f"{out['unavailable']} of settings that could not be considered "
                     f"({which})")
    head = f"{d['runs_used']} ok runs used, {d['runs_dropped']} left out"
    return head + (": " + ", ".join(parts) if parts else "")


def surface_lines(d: dict) -> list[str]:
    """A response surface's proposal (or why there is none) leading the choice's text."""
    sf = d.get("surface")
    if not sf or not sf.get("used"):
        return [sf["statement"], ""] if sf else []
    if sf.get("supported"):
        return [f"Proposed default (between the tested levels): {_setting(sf['setting'])}",
                "  " + sf["statement"] + ".",
                f"Recommended among the tested settings: {_setting(d['best'])}", ""]
    return [f"Recommended default: {_setting(d['best'])}", "  " + sf["statement"] + ".", ""]


def terminal_text(choice) -> str:
    """Plain text for the terminal."""
    s = section_dict(choice)
    d = s["choice"]
    lines = surface_lines(d) or [f"Recommended default: {_setting(d['best'])}", ""]
    lines += s["summary"][1:] if d.get("surface") else s["summary"]
    lines.append("")
    tied = "; ".join(_setting(t) for t in d["tied"])
    lines.append(f"Cannot be told apart from the best: {tied}")
    if d["across"]:
        lines.append(f"Safest across {', '.join(d['across'])}: {_setting(d['robust']['setting'])}"
                     + (f" (worst ratio {_ratio_words(d['robust']['worst_ratio'])})"
                        if d["robust"]["worst_ratio"] is not None else ""))
        lines.append(f"Best on average: {_setting(d['on_average']['setting'])}"
                     + (f" (average ratio {_ratio_words(d['on_average']['mean_ratio'])})"
                        if d["on_average"]["mean_ratio"] is not None else ""))
    if d.get("also"):
        lines.append("Trade-off front: " + "; ".join(_setting(p) for p in d["pareto"]))
    for lim in d.get("limits") or []:
        lines.append(f"Within the limit {lim['text']}: "
                     + "; ".join(_setting(p) for p in lim["met_by"]))
    lines.append("")
    cols, rows = s["columns"], s["rows"]
    widths = [max(len(c), *(len(r[i]) for r in rows)) for i, c in enumerate(cols)]
    lines.append("  ".join(c.ljust(w) for c, w in zip(cols, widths)).rstrip())
    for r in rows:
        lines.append("  ".join(x.ljust(w) for x, w in zip(r, widths)).rstrip())
    lines.append("")
    lines.append("Why:")
    for c in d["candidates"]:
        lines.append(f"  {_setting(c['setting'])}: {c['reason']}")
    lines.append("")
    lines += s["notes"]
    return "\n".join(lines) + "\n"
