"""Showing trends: terminal tables (rich) and a self-contained HTML page.

Owns: the wording and layout of `benchharness history show`. The HTML page has
no external resources: CSS inline, one trend figure per cell drawn with
matplotlib (Agg) and embedded as inline SVG (text drawn as paths); all text
from the history goes through jinja2 with autoescaping.
"""

from __future__ import annotations

import io
import math
import re

from benchharness.history.trends import CellTrend, step_kind
from benchharness.numbers import Scale, fmt_ratio, fmt_ratio_interval, pick_scale, plural


def _scale(t: CellTrend) -> Scale:
    """One unit for the cell's whole table (means, intervals, noise), from its values."""
    from benchharness.report.units import unit_of

    return pick_scale(unit_of(t.response), [p.center for p in t.points])


def _ratio_text(r, lo, hi) -> str:
    if r is None:
        return ""
    return f"{fmt_ratio(r)} ({fmt_ratio_interval(lo, hi)})"


def point_notes(t: CellTrend) -> dict[int, str]:
    """Index of a point -> what happened there (a step or a host change)."""
    notes: dict[int, str] = {}
    det = t.detection
    if det is None:
        return notes
    for b in det.breaks:
        notes[b.index] = ("HOST CHANGED: known break, not a regression; "
                          + _ratio_text(b.ratio, b.ratio_low, b.ratio_high))
    for s in det.steps:
        last = {True: "lasts", False: "did not last", None: "too recent to tell if it lasts"}
        kind = step_kind(t.response, s.ratio, s.persists).replace(" (did not last)", "")
        notes[s.index] = (f"STEP: {kind} {_ratio_text(s.ratio, s.ratio_low, s.ratio_high)}, "
                          f"{last[s.persists]}")
    for s in det.unconfirmed:
        notes[s.index] = unconfirmed_text(t, s)
    return notes


def unconfirmed_text(t: CellTrend, s) -> str:
    """The wording of a change not yet confirmed: shown by the newest commit alone, or
    by the newest few when the look before did not show it yet."""
    kind = step_kind(t.response, s.ratio, None)
    k = getattr(s, "newest", 1) or 1
    who = ("only this newest commit shows it" if k == 1 else
           f"the newest {k} commits show it from this one on, but the look before did not")
    return (f"NOT YET CONFIRMED: possible {kind} "
            f"{_ratio_text(s.ratio, s.ratio_low, s.ratio_high)}; {who}, the next one decides")


_LASTS = {True: "yes", False: "no, undone later", None: "too recent to tell"}


def step_rows(trends: list[CellTrend]) -> list[dict]:
    """One plain row per step over all cells, for the summaries."""
    rows = []
    for t in trends:
        if t.detection is None:
            continue
        for st in t.detection.steps:
            rows.append({"experiment": t.experiment, "response": t.response, "cell": t.label,
                         "commit": t.points[st.index].commit[:12],
                         "kind": step_kind(t.response, st.ratio, st.persists).replace(
                             " (did not last)", ""),
                         "ratio": fmt_ratio(st.ratio),
                         "interval": fmt_ratio_interval(st.ratio_low, st.ratio_high),
                         "lasts": _LASTS[st.persists]})
    return rows


def headline(trends: list[CellTrend]) -> str:
    """The answer in one plain sentence: how many series, the steps found (kind, ratio,
    commit, cell), changes not yet confirmed and host changes; the tables follow."""
    steps, pending, hosts = [], 0, {}
    for t in trends:
        det = t.detection
        if det is None:
            continue
        pending += len(det.unconfirmed)
        for b in det.breaks:
            hosts.setdefault(t.points[b.index].commit[:12], None)
        for st in det.steps:
            kind = step_kind(t.response, st.ratio, st.persists)
            steps.append(f"{'an' if kind[0] in 'aeiou' else 'a'} {kind} of "
                         f"{fmt_ratio(st.ratio)} at commit {t.points[st.index].commit[:12]} "
                         f"({t.label})")
    where = f"History of {plural(len(trends), 'cell series')}: "
    if steps:
        text = f"{plural(len(steps), 'step')} found: " + "; ".join(steps[:3]) + (
            f"; and {len(steps) - 3} more" if len(steps) > 3 else "")
    else:
        text = "no step found"
    if pending:
        text += (f"; {plural(pending, 'change')} at the newest commits not yet confirmed")
    if hosts:
        text += (f"; the host changed at {', '.join(list(hosts)[:3])}"
                 + (" and more" if len(hosts) > 3 else "")
                 + (" (a known break, not a regression)" if len(hosts) == 1
                    else " (known breaks, not regressions)"))
    return where + text + "."


def print_trends(trends: list[CellTrend], console=None) -> None:
    from benchharness.report.terminal import make_console

    console = console or make_console()
    if not trends:
        console.print("No history rows match.")
        return
    console.print(headline(trends), highlight=False)
    console.print()
    for t in trends:
        console.print(_trend_table(t))
        _print_detection(console, t)
        if t.note:
            console.print(f"  Note: {t.note}.")
        console.print()
    if len(trends) > 1:
        _print_step_summary(console, trends)


def _trend_table(t: CellTrend):
    """The rich table of one cell series: one row per point, the change at each."""
    from rich.table import Table

    mixed = len({p.scale for p in t.points if p.scale}) > 1   # one point per folder
    branches = {p.branch for p in t.points}
    table = Table(title=_trend_title(t, mixed, branches), title_justify="left")
    with_time = any(p.commit_time for p in t.points)
    with_branch = len(branches) > 1
    scale = "geo. mean" if t.scale == "log" else "mean or geo. mean" if mixed else "mean"
    cols = [("#", "right"), ("commit", "left")]
    if with_time:
        cols.append(("date", "left"))
    if with_branch:
        cols.append(("branch", "left"))
    cols += [("n", "right"), (scale, "right"),
             (f"{round(t.conf_level * 100)}% interval", "right"), ("noise", "right")]
    for col, just in cols:
        table.add_column(col, justify=just, no_wrap=True)
    table.add_column("change here", justify="left", overflow="fold")
    notes = point_notes(t)
    sc = _scale(t)
    for i, p in enumerate(t.points):
        row = [str(i + 1), p.commit[:10]]
        if with_time:
            row.append((p.commit_time or "")[:10])
        if with_branch:
            row.append(p.branch or "")
        row += [str(p.n), sc.fmt(p.center), *_point_spread(t, p, sc), notes.get(i, "")]
        table.add_row(*row)
    return table


def _trend_title(t: CellTrend, mixed: bool, branches: set) -> str:
    """A cell table's title: experiment, response and its scale, cell, and the one branch."""
    said = "log scale" if t.scale == "log" else "mixed scales" if mixed else "original scale"
    title = f"{t.experiment} | {t.response} ({said}) | {t.label}"
    if len(branches) == 1 and None not in branches:
        title += f" | branch {next(iter(branches))}"
    return title


def _point_spread(t: CellTrend, p, sc) -> tuple[str, str]:
    """A point's interval and noise cells; its noise in its own scale's terms (a percentage
    on the log scale)."""
    noise = "-"
    if math.isfinite(p.sd):
        noise = f"{p.sd * 100:.1f}%" if (p.scale or t.scale) == "log" else sc.fmt(p.sd)
    ci = "-" if p.ci_low is None else sc.interval(p.ci_low, p.ci_high)
    return ci, noise


def _false_step(alpha: float) -> str:
    """The search's false-step chance in the words of ``--confidence`` (docs/cli.md): a
    percentage, never the bare fraction of the older ``--false-step-level``."""
    return f"at most a {100 * alpha:.3g}% chance of a false step per host"


def _print_detection(console, t: CellTrend) -> None:
    """Under a cell's table: how many steps were found, and changes not yet confirmed."""
    det = t.detection
    if det is None:
        return
    if det.steps:
        console.print(f"  {plural(len(det.steps), 'step')} found ({_false_step(det.alpha)}).")
    elif len(t.points) >= 3:
        console.print(f"  No step found ({_false_step(det.alpha)}).")
    for u in det.unconfirmed:
        label = "Newest commit" if (u.newest or 1) == 1 else "Commit"
        console.print(f"  {label} {t.points[u.index].commit[:12]}: "
                      f"{unconfirmed_text(t, u)[len('NOT YET CONFIRMED: '):]} "
                      "(not yet confirmed; not counted as a step).", highlight=False)


def _print_step_summary(console, trends: list[CellTrend]) -> None:
    """The steps of all the cell series in one table (or that there are none)."""
    from rich.table import Table

    rows = step_rows(trends)
    summary = Table(title=f"Steps found in {len(trends)} cell series", title_justify="left")
    for col in ("cell", "commit", "kind", "ratio", "interval", "lasts"):
        summary.add_column(col, overflow="fold")
    for r in rows:
        summary.add_row(r["cell"], r["commit"], r["kind"], r["ratio"], r["interval"],
                        r["lasts"])
    if rows:
        console.print(summary)
    else:
        console.print(f"No steps found in {len(trends)} cell series.")


# ------------------------------------------------------------------- HTML

def trend_figure_svg(t: CellTrend) -> str:
    """One trend figure for a cell as an inline <svg> element."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    xs = list(range(len(t.points)))
    ys = [p.center for p in t.points]
    lo = [p.center - (p.ci_low if p.ci_low is not None else p.center) for p in t.points]
    hi = [(p.ci_high if p.ci_high is not None else p.center) - p.center for p in t.points]
    fig, ax = plt.subplots(figsize=(7.5, 3.0), dpi=100)
    try:
        ax.errorbar(xs, ys, yerr=[lo, hi], fmt="o", color="#1f4e79", ms=4, capsize=2, lw=1,
                    label="per commit, with interval")
        det = t.detection
        if det is not None:
            for seg in det.segments:
                level = math.exp(seg.mean)
                ax.hlines(level, seg.start - 0.4, seg.stop - 0.6, color="#7f7f7f", lw=1.5)
            for s in det.steps:
                ax.axvline(s.index - 0.5, color="#b22222", ls="--", lw=1.2)
                ax.annotate(fmt_ratio(s.ratio), (s.index - 0.5, 1), xycoords=("data",
                            "axes fraction"), color="#b22222", fontsize=8, ha="left",
                            va="top", xytext=(3, -3), textcoords="offset points")
            for b in det.breaks:
                ax.axvline(b.index - 0.5, color="#555555", ls=":", lw=1.5)
                ax.annotate("host changed", (b.index - 0.5, 0), xycoords=("data",
                            "axes fraction"), color="#555555", fontsize=8, ha="left",
                            va="bottom", xytext=(3, 3), textcoords="offset points")
        step = max(1, len(xs) // 12)
        ax.set_xticks(xs[::step])
        ax.set_xticklabels([p.commit[:8] for p in t.points][::step], rotation=45, ha="right",
                           fontsize=7)
        ax.set_xlim(-0.7, max(len(xs) - 0.3, 0.7))
        ax.set_ylabel(t.response)
        ax.set_xlabel("commit (oldest first)")
        ax.grid(True, axis="y", alpha=0.3)
        fig.tight_layout()
        buf = io.StringIO()
        fig.savefig(buf, format="svg")
    finally:
        plt.close(fig)
    svg = buf.getvalue()
    svg = svg[svg.index("<svg"):]
    return re.sub(r"<metadata>.*?</metadata>", "", svg, flags=re.S)


_PAGE = """<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>Performance history{% if experiment %} - {{ experiment }}{% endif %}</title>
<style>
body { font-family: system-ui, sans-serif; margin: 2em auto; max-width: 60em; color: #222; }
h1 { font-size: 1.5em; } h2 { font-size: 1.15em; margin-top: 2em; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; font-size: 0.85em; margin: 0.5em 0; }
th, td { padding: 0.2em 0.6em; border-bottom: 1px solid #eee; text-align: right;
         white-space: nowrap; }
td.l:last-child { white-space: normal; }
th { background: #f4f4f4; } td.l, th.l { text-align: left; }
.step { color: #b22222; font-weight: 600; } .host { color: #555; font-style: italic; }
.note { color: #555; } figure { margin: 0.5em 0; } svg { max-width: 100%; height: auto; }
code { font-size: 0.95em; }
</style></head><body>
<h1>Performance history{% if experiment %}: {{ experiment }}{% endif %}</h1>
<p>{{ cells|length }} cell series. Each point is one commit measured on one host
(results folders of the same commit and host pooled); the interval is the
{{ conf_pct }}% confidence interval of its {{ "geometric " if any_log }}mean. Steps are
searched for among the points of each host, with at most a {{ '%.3g' % (100 * alpha) }}% chance of a false step per host; a
change of host is a known break, never a regression.</p>
<h2>Steps found</h2>
{% if all_steps %}<table><thead><tr><th class="l">experiment</th><th class="l">response</th>
<th class="l">cell</th><th class="l">commit</th><th class="l">kind</th><th>ratio</th>
<th>interval</th><th class="l">lasts</th></tr></thead><tbody>
{% for st in all_steps %}<tr><td class="l">{{ st.experiment }}</td><td class="l">{{ st.response }}</td>
<td class="l">{{ st.cell }}</td><td class="l"><code>{{ st.commit }}</code></td>
<td class="l step">{{ st.kind }}</td><td>{{ st.ratio }}</td><td>{{ st.interval }}</td>
<td class="l">{{ st.lasts }}</td></tr>
{% endfor %}</tbody></table>
{% else %}<p class="note">None.</p>{% endif %}
{% for c in cells %}
<section>
<h2>{{ c.trend.experiment }} &middot; {{ c.trend.response }} &middot; {{ c.trend.label }}</h2>
{% if c.summary %}<p class="{{ 'step' if c.trend.detection and c.trend.detection.steps else 'note' }}">{{ c.summary }}</p>{% endif %}
{% if c.trend.note %}<p class="note">Note: {{ c.trend.note }}.</p>{% endif %}
<figure>{{ c.svg|safe }}</figure>
<table><thead><tr><th>#</th><th class="l">commit</th>{% if c.with_time %}<th class="l">committed</th>{% endif %}
<th class="l">branch</th><th>n</th><th>{{ "geometric mean" if c.trend.scale == "log" else "mean" }}</th>
<th>interval</th><th>noise</th><th class="l">change here</th></tr></thead><tbody>
{% for r in c.rows %}<tr><td>{{ r.i }}</td><td class="l"><code>{{ r.commit }}</code></td>
{% if c.with_time %}<td class="l">{{ r.time }}</td>{% endif %}<td class="l">{{ r.branch }}</td><td>{{ r.n }}</td>
<td>{{ r.center }}</td><td>{{ r.ci }}</td><td>{{ r.noise }}</td>
<td class="l {{ r.cls }}">{{ r.note }}</td></tr>
{% endfor %}</tbody></table>
</section>
{% endfor %}
</body></html>
"""


def render_html(trends: list[CellTrend], experiment: str | None = None,
                alpha: float = 0.05) -> str:
    import jinja2

    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined)
    cells = []
    for t in trends:
        notes = point_notes(t)
        cells.append({"trend": t, "rows": _html_rows(t, notes), "svg": trend_figure_svg(t),
                      "summary": _html_summary(t, notes),
                      "with_time": any(p.commit_time for p in t.points)})
    return env.from_string(_PAGE).render(
        cells=cells, experiment=experiment, alpha=alpha, all_steps=step_rows(trends),
        conf_pct=round((trends[0].conf_level if trends else 0.95) * 100),
        any_log=any(t.scale == "log" for t in trends))


def _html_rows(t: CellTrend, notes: dict[int, str]) -> list[dict]:
    """The page's table rows of one cell series; a host change or a step marks its row."""
    det = t.detection
    breaks = {b.index for b in det.breaks} if det is not None else set()
    rows = []
    sc = _scale(t)
    for i, p in enumerate(t.points):
        noise = "-"
        if math.isfinite(p.sd):
            noise = f"{p.sd * 100:.1f}%" if (p.scale or t.scale) == "log" else sc.fmt(p.sd)
        rows.append({"i": i + 1, "commit": p.commit[:12], "time": (p.commit_time or "")[:19],
                     "branch": p.branch or "", "n": p.n, "center": sc.fmt(p.center),
                     "ci": "-" if p.ci_low is None else sc.interval(p.ci_low, p.ci_high),
                     "noise": noise, "note": notes.get(i, ""),
                     "cls": "host" if i in breaks else ("step" if i in notes else "")})
    return rows


def _html_summary(t: CellTrend, notes: dict[int, str]) -> str:
    """One line under a cell's figure: its steps and changes not yet confirmed."""
    det = t.detection
    summary = ""
    if det is not None and det.steps:
        summary = "; ".join(f"{notes[s.index]} at {t.points[s.index].commit[:12]}"
                            for s in det.steps)
    elif det is not None and len(t.points) >= 3:
        summary = "No step found."
    if det is not None and det.unconfirmed:
        summary = "; ".join([summary] * bool(summary) + [
            f"{notes[u.index]} ({t.points[u.index].commit[:12]})" for u in det.unconfirmed])
    return summary
