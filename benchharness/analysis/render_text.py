"""Plain-text rendering of an `Analysis` for terminals and logs (no colour, no markup).

Owns our own plain layout: a heading with what was analysed, the findings
(rendered from ``analysis.json``'s ``findings``, never recomputed), the ANOVA table
(source, df, sum of squares, mean square, F, p, partial η², ω²), the scale
chosen and why, level ratios in plain sentences, diagnostics verdicts,
failed-run counts, comparisons whose adjusted p is below α, and notes.
"""

from __future__ import annotations

from benchharness.numbers import fmt_p, fmt_ratio, fmt_ratio_interval, pick_scale, plural
from benchharness.analysis.findings import notes_not_said


def _unit(response: str) -> str:
    """The unit a response's name carries (``wall_s`` -> s), else none."""
    from benchharness.analysis.findings import seconds_per_unit

    sec = seconds_per_unit(response)
    if sec is not None:
        return {1.0: "s", 1e-3: "ms", 1e-6: "µs", 1e-9: "ns"}[sec]
    return "KiB" if str(response).lower().endswith("_kib") else ""


def _g(x, digits=4):
    if x is None:
        return "-"
    if isinstance(x, int):
        return str(x)
    if x == 0:
        return "0"
    a = abs(x)
    if a >= 10 ** max(digits + 1, 5) or a < 1e-3:
        return f"{x:.{digits - 1}e}"
    return f"{x:.{digits}g}"


def _p(p):
    return "-" if p is None else fmt_p(p)


def _table(headers, rows, align):
    cols = list(zip(*([headers] + rows))) if rows else [[h] for h in headers]
    widths = [max(len(str(c)) for c in col) for col in cols]
    out = []
    for r in [headers] + rows:
        cells = []
        for v, w, a in zip(r, widths, align):
            cells.append(str(v).ljust(w) if a == "<" else str(v).rjust(w))
        out.append("  ".join(cells).rstrip())
    out.insert(1, "  ".join("-" * w for w in widths))
    return out


def _levels(d):
    return ", ".join(f"{k}={v}" for k, v in d.items())


def _findings_lines(d: dict) -> list[str]:
    """The findings in plain words, interactions' simple effects left inside them."""
    lines = []
    found = d.get("findings") or []
    if found:
        lines.append("Findings")
        for f in found:
            if f["kind"] == "simple effect":
                continue        # stated inside its interaction
            mark = {"caution": "!", "best": ">"}.get(f["kind"], "-")
            lines.append(f"  {mark} {f['statement']}")
        lines.append("")
    return lines


def _anova_lines(d: dict, scale: str) -> list[str]:
    """The ANOVA table, aliased terms named with their chain."""
    lines = [f"Analysis of variance on the {scale}, Type {d['model']['ss_type']} sums of "
             "squares"]
    rows = []
    for r in d["anova"]:
        label = r.get("chain") or (
            r["term"] + (f" (+ {', '.join(r['aliases'])})" if r.get("aliases") else ""))
        rows.append([label, _g(r["df"]), _g(r["sum_sq"], 7), _g(r["mean_sq"], 7), _g(r["F"]),
                     _p(r["p"]), _g(r["partial_eta_sq"], 3), _g(r["omega_sq"], 3)])
    lines += _table(["Source", "df", "Sum of squares", "Mean square", "F", "p",
                     "partial η²", "ω²"], rows, "<>>>>>>>")
    lines.append("")
    return lines


def _effects_lines(d: dict, t: dict) -> list[str]:
    """Each level against its reference, with a note when the ratios are approximate."""
    lines = []
    if d["effects"]:
        lines.append("Effects (each level against its reference; unadjusted intervals)")
        if t["name"] != "log":
            lines.append("  (ratios of back-transformed means; their intervals are approximate"
                         + (", differences are exact" if t["name"] == "none" else "") + ")")
        for e in d["effects"]:
            lines.append("  " + e["wording"])
        lines.append("")
    return lines


def _check_lines(dg: dict) -> list[str]:
    """The tests of the model's assumptions, the hosts and the outlying runs and cells."""
    lines = []
    for key, label in (("normality", "normality"), ("equal_variance", "equal variances"),
                       ("drift", "drift"), ("load", "machine load")):
        if key not in dg:
            continue
        item = dg.get(key) or {}
        test = item.get("test")
        extra = f" [{test}, p {_p(item.get('p'))}]" if test else (
            f" [p {_p(item.get('p'))}]" if item.get("p") is not None else "")
        lines.append(f"  {label}: {item.get('verdict', '-')}{extra}")
    if dg.get("hosts"):
        h = dg["hosts"]
        b, w = h["between_hosts"], h["blocks_within_hosts"]
        lines.append(f"  hosts ({len(h['hosts'])}): {h['verdict']} [between hosts: df {b['df']}, "
                     f"SS {_g(b['sum_sq'])}, p {_p(b['p'])}; blocks within hosts: df {w['df']}, "
                     f"SS {_g(w['sum_sq'])}]")
    if dg.get("outlier_verdict"):
        lines.append(f"  outliers: {dg['outlier_verdict']}")
        for o in dg["outliers"][:10]:
            lines.append(f"    run {o['run']}: studentized residual {o['studentized']:+.2f}")
    for s in dg.get("small_cells", [])[:10]:
        lines.append(f"  cell {_levels(s['levels'])}: {s['problem']} (n={s['n']})")
    return lines


def _diagnostics_lines(d: dict) -> list[str]:
    """Diagnostics: the checks, the failed runs per cell and the rank-based cross-check."""
    lines = ["Diagnostics"] + _check_lines(d["diagnostics"])
    lines.append(f"  failed runs: {d['failures']['verdict']}")
    for cell in d["failures"]["cells"][:10]:
        flag = " — has timeouts" if cell["flag"] else ""
        lines.append(f"    {_levels(cell['levels'])}: {cell['ok']} of {cell['runs']} ok "
                     f"({cell['failed']} failed, {cell['timeout']} timed out){flag}")
    if d["art"]:
        lines.append("  rank-based cross-check (aligned rank transform):")
        for r in d["art"]["terms"]:
            agree = {True: "agrees", False: "DISAGREES", None: "-"}[r["agrees"]]
            lines.append(f"    {r['term']}: p {_p(r['p'])} vs ANOVA p {_p(r['anova_p'])} — {agree}")
    lines.append("")
    return lines


def _comparison_rows(d: dict, t: dict, shown: list) -> list[list[str]]:
    """The first 40 shown comparisons as table rows: differences on the original scale,
    else ratios."""
    adj = d["model"]["adjust"]
    label = {"pairwise": f"pairwise ({adj})", "tukey": "Tukey HSD",
             "simple": f"simple effect ({adj})", "declared": f"declared ({adj})"}
    diff = t["name"] == "none"
    dscale = pick_scale(d.get("unit") or (d.get("transform") or {}).get("unit")
                        or _unit(d["response"]),
                        [x.get("difference") for x in shown])
    rows = []
    for x in shown[:40]:
        within = f" within {_levels(x['within'])}" if x["within"] else ""
        if diff:
            est = [dscale.fmt(x.get("difference"), 4),
                   dscale.interval(x.get("difference_lower"), x.get("difference_upper"))]
        else:
            est = [fmt_ratio(x["ratio"]), fmt_ratio_interval(x["lower"], x["upper"])]
        rows.append([label[x["method"]], f"{x['factor']}: {x['a']} over {x['b']}{within}",
                     *est, _p(x["p_adj"])])
    return rows


def _comparisons_lines(d: dict, t: dict) -> list[str]:
    """The comparisons whose adjusted p is below alpha (and whose interval excludes 1×)."""
    lines = []
    alpha = d["model"]["alpha"]
    shown = [x for x in d["comparisons"] if x["p_adj"] is not None and x["p_adj"] < alpha
             and x.get("lower") is not None and x.get("upper") is not None
             and (x["lower"] > 1 or x["upper"] < 1 or t["name"] == "none")]
    if d["comparisons"]:
        lines.append(f"Comparisons with adjusted p < {alpha:g} ({len(shown)} of "
                     f"{len(d['comparisons'])}; a over b)")
        diff = t["name"] == "none"
        rows = _comparison_rows(d, t, shown)
        if not rows:
            lines.append("  none")
        if rows:
            head = ["method", "comparison", "difference" if diff else "ratio", "interval",
                    "p adj"]
            lines += ["  " + s for s in _table(head, rows, "<<>>>")]
        if len(shown) > 40:
            lines.append(f"  ... {len(shown) - 40} more in the JSON output")
        lines.append("")
    return lines


def format_analysis(a) -> str:
    d = a.to_dict()
    lines = []
    c = d["counts"]
    t = d["transform"]
    scale = {"none": "original scale", "log": "log scale"}.get(
        t["name"], f"Box-Cox scale (λ = {t['lambda']:.2f})")
    # the headline in plain words; the scale and the kind of sums of squares head the table
    lines.append(f"Analysis of {d['response']} — {plural(c['rows'], 'run')} in "
                 f"{plural(c['cells'], 'cell')}"
                 + (f", in blocks of {d['block']}" if d["block"] else ""))
    lines.append("")
    lines += _findings_lines(d)
    lines.append(f"Scale: {t.get('summary') or t['reason']}")
    lines += _anova_lines(d, scale)
    lines += _effects_lines(d, t)
    lines += _diagnostics_lines(d)
    lines += _comparisons_lines(d, t)
    notes = notes_not_said(d, d.get("findings") or [])
    if notes:
        lines.append("Notes")
        for n in notes:
            lines.append(f"  - {n}")
    return "\n".join(lines).rstrip() + "\n"
