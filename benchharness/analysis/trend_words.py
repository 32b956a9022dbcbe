"""Findings about numeric factors, in plain words: the trend and the parallel scaling.

Turns analysis.json's ``trends`` (`numeric`) into findings of kind ``trend``
and ``scaling`` that `findings.derive` appends after the main effects, so that
every headline and report renders them and none recomputes them:

* ``trend`` — "wall_s grows as n^1.02 [0.98 to 1.06]": the exponent and its
  interval, whether it differs with another factor (and per level when it
  does), and whether a power law fits (lack of fit);
* ``scaling`` — the speed-up and efficiency at the largest level over the
  smallest, and Amdahl's serial fraction with its interval, or that the law
  does not describe the timings; where the speed-up differs with another
  factor (a significant interaction whose adjusted simple effects at the
  partner's extreme levels do not overlap) the speed-up at each of its levels,
  and the overall one called the average it is (`speedup_depends`).

A trend whose interval contains 0 is "no detectable trend", never a growth;
an exponent is called different across levels only when its F test says so.
"""

from __future__ import annotations

import math

from benchharness import numbers as _numbers
from benchharness.numbers import fmt_p_said


def fmt_exponent(b) -> str:
    """An exponent: two decimals (three below 0.1 in size)."""
    if b is None or not math.isfinite(b):
        return "–"
    return f"{b:.3f}" if abs(b) < 0.1 else f"{b:.2f}"


def power_text(name: str, slope: dict) -> str:
    """``n^1.02 [0.98 to 1.06]``."""
    lo, hi = slope.get("lower"), slope.get("upper")
    ci = f" [{fmt_exponent(lo)} to {fmt_exponent(hi)}]" if lo is not None else ""
    return f"{name}^{fmt_exponent(slope['estimate'])}{ci}"


def _excludes_zero(s: dict) -> bool:
    lo, hi = s.get("lower"), s.get("upper")
    return lo is not None and hi is not None and (lo > 0 or hi < 0)


def trend_finding(t: dict, response: str, conf: str) -> dict | None:
    """The ``trend`` finding of one numeric factor (None when it was skipped)."""
    name = t["factor"]
    slope = t.get("slope")
    if slope is None:
        return None
    if t.get("untested"):
        return _untested_trend(t, response, name, slope)
    sig = _excludes_zero(slope)
    if sig:
        verb = "grows" if slope["estimate"] > 0 else "falls"
        short = f"{response} {verb} as {power_text(name, slope)}"
    else:
        short = f"{response} shows no detectable trend over {name} ({power_text(name, slope)})"
    text = short + f" ({conf} interval of the log-log slope"
    # averaged over the other factors that have more than one level here (one with a
    # single level left, e.g. a filtered table, is not averaged over)
    over = [b["factor"] for b in t.get("by") or [] if len(b.get("slopes") or []) > 1]
    text += (", averaged over " + ", ".join(over) + ")") if over else ")"
    differ = [b for b in t.get("by") or [] if b.get("differ")]
    lof = t.get("lack_of_fit")
    alpha = 1 - float(conf.rstrip("%")) / 100
    bends = bool(lof and lof["p"] < alpha)
    short = _short_caveats(short, name, differ, bends and not t.get("scaling"), lof)
    for b in differ:
        per = "; ".join(f"{power_text(name, s)} at {b['factor']}={s['level']}"
                        for s in b["slopes"])
        text += (f"; the exponent differs with {b['factor']} ({fmt_p_said(b['test']['p'])}): "
                 + per)
    text += _shape_text(t, lof, bends, alpha)
    return {"kind": "trend", "terms": [name], "factors": [name], "significant": sig,
            "exponent": slope["estimate"], "lower": slope.get("lower"),
            "upper": slope.get("upper"), "p": slope.get("p"),
            "differs_with": [b["factor"] for b in differ], "lack_of_fit": bends,
            "parallel": bool(t.get("scaling")),
            "headline": bool(t.get("headline")), "short": short, "statement": text}


def _untested_trend(t: dict, response: str, name: str, slope: dict) -> dict:
    """The trend of a factor whose cells were repeated without any variation: the exponents
    as measured, and no claim that one is detectable or that they differ."""
    short = f"{response} changes as {power_text(name, slope)} over {name}, as measured"
    text = short + " (untested: every run in a cell gave the same value, so there is no " \
        "run-to-run variation to judge the exponent against)"
    for b in t.get("by") or []:
        per = "; ".join(f"{power_text(name, s)} at {b['factor']}={s['level']}"
                        for s in b["slopes"])
        text += f"; as measured at each level of {b['factor']}: {per}"
    return {"kind": "trend", "terms": [name], "factors": [name], "significant": False,
            "exponent": slope["estimate"], "lower": None, "upper": None, "p": None,
            "differs_with": [], "lack_of_fit": False, "parallel": bool(t.get("scaling")),
            "headline": bool(t.get("headline")), "short": short + " (untested)",
            "statement": text, "untested": True}


def _shape_text(t: dict, lof: dict | None, bends: bool, alpha: float) -> str:
    """The trend statement's last clause: whether a power law fits the levels (the lack of
    fit against pure error), and for a parallel factor whether a serial part explains a bend."""
    if bends and t.get("scaling") and _amdahl_fits(t["scaling"], alpha):
        return (f"; the points bend away from a straight line on log-log axes (lack of fit "
                f"{fmt_p_said(lof['p'])}), as they do when part of the work is serial: see the "
                "speed-up and the serial fraction")
    if bends and t.get("scaling"):
        return (f"; the points bend away from a straight line on log-log axes (lack of fit "
                f"{fmt_p_said(lof['p'])}), and not only as a serial part of the work would bend "
                "them (Amdahl's law does not fit either): see the speed-up of each level")
    if bends:
        return (f"; the points do not lie on a straight line on log-log axes (lack of fit "
                f"{fmt_p_said(lof['p'])}), so the exponent is an average over the levels "
                f"tested, not a law to extrapolate")
    if lof:
        return f"; a power law fits these levels (lack of fit {fmt_p_said(lof['p'])})"
    if len(t.get("levels") or []) <= 2:
        return "; with two levels the shape between them cannot be checked"
    return ("; whether a power law fits cannot be checked without repeated runs of a "
            "cell (no pure error to judge the lack of fit by)")


def _amdahl_fits(sc: dict, alpha: float) -> bool:
    """False when the law's lack of fit is significant (True when it fits or is unchecked)."""
    lof = sc.get("lack_of_fit")
    return not (lof and lof["p"] < alpha)


def _peak_text(sc: dict, name: str, top: dict) -> str:
    """When a level below the largest has the largest speed-up (an overhead that grows
    with the workers overtakes the gain), that level and its speed-up; else ''."""
    peak = max(sc["speedups"], key=lambda s: s["speedup"])
    if peak is top or peak["speedup"] <= top["speedup"]:
        return ""
    ci = _numbers.fmt_ratio_interval(peak["lower"], peak["upper"])
    return (f"the largest measured speed-up is at {name}={peak['level']} "
            f"({_numbers.fmt_ratio(peak['speedup'])} [{ci}]), not at the most {name}")


def _short_caveats(short: str, name: str, differ: list[dict], bends: bool, lof) -> str:
    """The headline's words for a trend, qualified where one exponent would mislead: when
    the points do not lie on a power law, the exponent is an average over the levels
    tested; when it differs with another factor, the average describes no level of it, so
    the extreme levels' exponents are given (the strongest difference first)."""
    if bends:
        short += (f" on average over the levels tested (not a power law: lack of fit "
                  f"{fmt_p_said(lof['p'])})")
    if differ:
        first = min(differ, key=lambda b: b["test"]["p"])
        lo = min(first["slopes"], key=lambda s: s["estimate"])
        hi = max(first["slopes"], key=lambda s: s["estimate"])
        short += ("" if bends else " on average") + (
            f", the exponent differing with {first['factor']}: {power_text(name, lo)} at "
            f"{first['factor']}={lo['level']} to {power_text(name, hi)} at "
            f"{first['factor']}={hi['level']}")
        rest = [b["factor"] for b in differ if b is not first]
        if rest:
            short += " (and with " + ", ".join(rest) + ")"
    return short


def _speedup_lead(name: str, base: str, top: dict) -> str:
    """``threads=8 is 4.61× [4.49× to 4.74×] as fast as threads=1`` (or slower, or not
    detectably faster, as its interval says)."""
    fr = _numbers.fmt_ratio
    ci = _numbers.fmt_ratio_interval(top["lower"], top["upper"])
    if top["lower"] > 1:
        return f"{name}={top['level']} is {fr(top['speedup'])} [{ci}] as fast as {base}"
    if top["upper"] < 1:
        return (f"{name}={top['level']} is slower than {base} ({fr(top['speedup'])} [{ci}] "
                "of its speed)")
    return (f"{name}={top['level']} is not detectably faster than {base} "
            f"({fr(top['speedup'])} [{ci}])")


def scaling_finding(t: dict, conf: str, depends: dict | None = None) -> dict | None:
    """The ``scaling`` finding of a parallel factor (None when it has no scaling).

    ``depends`` (`speedup_depends`): the factor whose significant interaction with this
    one makes the speed-up differ between its levels, with the speed-up at each of them;
    then no single speed-up is said as if it held at every level, in the headline or the
    statement: the range over the partner's levels leads, the average follows."""
    sc = t.get("scaling")
    if not sc:
        return None
    name = t["factor"]
    if not sc.get("speedups"):
        return _serial_only(sc, name)
    top = max(sc["speedups"], key=lambda s: s["workers"])
    base = f"{name}={sc['smallest']}"
    fr = _numbers.fmt_ratio
    faster = top["lower"] > 1
    lead = _speedup_lead(name, base, top)
    eff = (f"parallel efficiency {_pct(top['efficiency'])} [{_pct(top['efficiency_lower'])} "
           f"to {_pct(top['efficiency_upper'])}] of the ideal {top['ideal']:g}×")
    text = f"{lead}{' on average over ' + depends['factor'] if depends else ''}: {eff}"
    peak = _peak_text(sc, name, top)
    text += f"; {peak}" if peak else ""
    sf = sc.get("serial_fraction") or {}
    lof = sc.get("lack_of_fit")
    alpha = 1 - float(conf.rstrip("%")) / 100
    fits = _amdahl_fits(sc, alpha)
    s_text = _fraction_text(sf)
    if sf.get("estimate") is not None:
        if fits:
            text += (f"; Amdahl's law fits with a serial fraction of {s_text}" if lof else
                     f"; by Amdahl's law (whose fit cannot be checked with these levels) the "
                     f"serial fraction is {s_text}")
            if sf.get("max_speedup"):
                text += (f", so no number of {name} can make it more than "
                         f"{fr(sf['max_speedup'])} as fast")
        else:
            text += (f"; Amdahl's law does not describe these timings (lack of fit "
                     f"{fmt_p_said(lof['p'])}): its serial fraction {s_text} is only a summary")
    per = ((sc.get("by") or {}).get("serial_fractions")) or []
    if len(per) > 1 and sf.get("estimate") is not None:
        by = sc["by"]["factor"]
        text += "; serial fraction by " + by + ": " + "; ".join(
            f"{_fraction_text(p)} at {by}={p['level']}" for p in per)
    short = f"{lead} (efficiency {_pct(top['efficiency'])}"
    short += f", serial fraction {s_text})" if sf.get("estimate") is not None and fits else ")"
    short += f"; {peak}" if peak else ""
    if depends:
        short = _depends_short(name, base, top, depends)
        text += "; " + _depends_text(name, top, depends)
    return {"kind": "scaling", "terms": [name], "factors": [name], "significant": faster,
            "depends_on": depends["factor"] if depends else None,
            "speedup": top["speedup"], "lower": top["lower"], "upper": top["upper"],
            "serial_fraction": sf.get("estimate"), "serial_lower": sf.get("lower"),
            "serial_upper": sf.get("upper"), "amdahl_fits": fits,
            "headline": bool(t.get("headline")), "short": short, "statement": text}


def speedup_depends(d: dict, name: str, top_level: str, smallest: str) -> dict | None:
    """The partner whose significant two-factor interaction with ``name`` (Holm-adjusted p
    of the ANOVA term below α) makes the speed-up of ``name=top_level`` over
    ``name=smallest`` differ between its levels, with that speed-up at each of them.

    The speed-ups are the interaction's own simple effects (`analysis.comparisons`,
    inverted for a time), with their adjusted intervals, so that the scaling finding and
    the interaction state one interval for one quantity. None when there is no such
    interaction, or when the speed-ups at its levels do not differ materially
    (`_differ_materially`); ``per_level`` is empty when the simple effects were not
    computed.
    """
    best = _interacting_partner(d, name)
    if best is None:
        return None
    partner, term, p = best
    per = _speedups_within(d, name, partner, top_level, smallest)
    if per and not _differ_materially(per):
        return None     # the interaction lies elsewhere: this speed-up holds at every level
    return {"factor": partner, "term": term, "p": p, "per_level": per}


def _interacting_partner(d: dict, name: str):
    """(partner, term, Holm-adjusted p) of the strongest significant two-factor
    interaction of ``name`` in the ANOVA (not a fraction's alias chain), or None."""
    alpha = float(d.get("alpha") or 0.05)
    best = None
    for r in d.get("anova") or []:
        parts = str(r.get("term") or "").split(":")
        p = r.get("p_holm", r.get("p"))
        if (len(parts) != 2 or name not in parts or r.get("chain") or p is None
                or p >= alpha):
            continue
        if best is None or p < best[2]:
            best = (parts[1] if parts[0] == name else parts[0], r["term"], p)
    return best


def _speedups_within(d: dict, name: str, partner: str, top_level: str,
                     smallest: str) -> list[dict]:
    """The speed-up of ``name=top_level`` over ``name=smallest`` at each level of
    ``partner``, from the simple effects (inverted for a time), with their intervals."""
    higher = d.get("better") == "higher"
    per = []
    for c in d.get("comparisons") or []:
        within = c.get("within") or {}
        if (c.get("method") != "simple" or c.get("factor") != name or set(within) != {partner}
                or c.get("ratio") is None or c.get("lower") is None):
            continue
        pair = (c["a"], c["b"])
        if pair not in ((top_level, smallest), (smallest, top_level)):
            continue
        r, lo, hi = c["ratio"], c["lower"], c["upper"]
        if (pair == (smallest, top_level)) != (not higher):
            r, lo, hi = 1 / r, 1 / hi, 1 / lo      # a time: the speed-up is its inverse
        per.append({"level": within[partner], "speedup": r, "lower": lo, "upper": hi,
                    "adjust": c.get("adjust")})
    return per


def _differ_materially(per: list[dict]) -> bool:
    """Whether the speed-ups at the partner's levels differ beyond their noise: the
    smallest one's adjusted interval lies wholly below the largest one's (intervals that
    do not overlap: a conservative reading of a difference). A significant interaction
    carried by other levels leaves this speed-up one ratio."""
    lo = min(per, key=lambda s: s["speedup"])
    hi = max(per, key=lambda s: s["speedup"])
    return lo["upper"] < hi["lower"]


def adjusted_words(adjust) -> str:
    """How a family of intervals was adjusted, in a word every output uses beside them
    (``Tukey-adjusted``, ``Bonferroni-adjusted``, ``Holm-adjusted``): two intervals of one
    quantity that differ by their adjustment say so."""
    return {"bonferroni": "Bonferroni-adjusted", "holm": "Holm-adjusted",
            "tukey": "Tukey-adjusted"}.get(str(adjust or ""), "adjusted")


def _depends_short(name: str, base: str, top: dict, dep: dict) -> str:
    """The headline's speed-up when it differs with another factor: its range over the
    partner's levels (lowest and highest), then the average, which holds at none."""
    y = dep["factor"]
    per = dep["per_level"]
    fr = _numbers.fmt_ratio
    avg = f"{fr(top['speedup'])} on average over {y}"
    if not per:
        return (f"the speed-up of {name}={top['level']} over {base} depends on {y} "
                f"({dep['term']}, {fmt_p_said(dep['p'])}; {avg})")
    lo = min(per, key=lambda s: s["speedup"])
    hi = max(per, key=lambda s: s["speedup"])

    def one(s):
        return (f"{fr(s['speedup'])} [{_numbers.fmt_ratio_interval(s['lower'], s['upper'])}] "
                f"at {y}={s['level']}")

    return (f"the speed-up of {name}={top['level']} over {base} depends on {y}: "
            f"from {one(lo)} to {one(hi)} ({adjusted_words(lo['adjust'])}; {avg})")


def _depends_text(name: str, top: dict, dep: dict) -> str:
    """The statement's clause on a speed-up that differs with another factor: each level's."""
    y = dep["factor"]
    head = (f"the speed-up differs with {y} ({dep['term']}, {fmt_p_said(dep['p'])}), so the "
            f"{_numbers.fmt_ratio(top['speedup'])} above is an average over its levels, not the "
            "speed-up at each")
    if not dep["per_level"]:
        return head
    each = "; ".join(f"{_numbers.fmt_ratio(s['speedup'])} "
                     f"[{_numbers.fmt_ratio_interval(s['lower'], s['upper'])}] at {y}={s['level']}"
                     for s in dep["per_level"])
    return f"{head}: {each} ({adjusted_words(dep['per_level'][0]['adjust'])} intervals)"


def _serial_only(sc: dict, name: str) -> dict | None:
    """Without replicates (no pure error): the serial fraction alone, its fit unchecked."""
    sf = sc.get("serial_fraction") or {}
    if sf.get("estimate") is None or sf.get("lower") is None:
        return None
    text = (f"Amdahl's law gives {name} a serial fraction of {_fraction_text(sf)} (without "
            "replicates neither the speed-ups' intervals nor the law's fit can be checked)")
    return {"kind": "scaling", "terms": [name], "factors": [name], "significant": None,
            "speedup": None, "lower": None, "upper": None,
            "serial_fraction": sf["estimate"], "serial_lower": sf["lower"],
            "serial_upper": sf["upper"], "amdahl_fits": None, "headline": False,
            "short": text, "statement": text}


def _pct(x) -> str:
    return "–" if x is None else f"{100 * x:.0f}%"


def _fraction_text(sf: dict) -> str:
    est, lo, hi = sf.get("estimate"), sf.get("lower"), sf.get("upper")
    if est is None:
        return "–"
    text = f"{est:.3f}"
    if lo is not None and hi is not None:
        text += f" [{lo:.3f} to {hi:.3f}]"
    return text


def findings(d: dict) -> list[dict]:
    """The trend and scaling findings of an analysis (plain analysis.json content)."""
    alpha = float(d.get("alpha") or 0.05)
    conf = _numbers.fmt_confidence(alpha)
    out = []
    for t in d.get("trends") or []:
        if t.get("skipped"):
            if t.get("source") != "declared":
                continue        # numbers as labels that cannot carry a trend: nothing to say
            out.append({"kind": "caution", "terms": [], "factors": [t["factor"]],
                        "significant": None, "ratio": None, "lower": None, "upper": None,
                        "p": None, "check": "trend",
                        "statement": f"No trend over {t['factor']}: {t['skipped']}"})
            continue
        sc = t.get("scaling") or {}
        depends = None
        if sc.get("speedups"):
            top = max(sc["speedups"], key=lambda s: s["workers"])
            depends = speedup_depends(d, t["factor"], top["level"], sc["smallest"])
        for f in (trend_finding(t, d.get("response") or "the response", conf),
                  scaling_finding(t, conf, depends)):
            if f is not None:
                out.append(f)
    return out
