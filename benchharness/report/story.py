"""The plain-words story of a report: verdict, design summary, warnings, cell table.

Every renderer (HTML, Markdown, terminal) tells the same story, so the sentences
are composed here once, as plain strings and small dicts; renderers only lay them
out (and escape them). The wording is ours. Effect sizes follow the analysis:
ratios from the log scale, partial η² per term (Cohen 1973), and the best cell
by estimated marginal mean.
"""

from __future__ import annotations

import math
from typing import Any

from benchharness.analysis.findings import DIAGNOSTIC_TITLES, TIE_WORDS
from benchharness.report.data import ReportData, finite
from benchharness.report.units import (
    describe, fmt_num, fmt_p, fmt_ratio, fmt_ratio_interval, fmt_value, plural, unit_of,
)


def confidence_pct(data: ReportData) -> str:
    conf = data.analysis.get("confidence")
    if not finite(conf):
        conf = 1.0 - data.alpha
    return f"{round(float(conf) * 100):g}%"


def lower_is_better(data: ReportData) -> bool:
    better = data.better or data.analysis.get("better") or data.analysis.get("direction")
    if isinstance(better, str):
        return better.lower() != "higher"
    return unit_of(data.response) not in ("per s",)


def cell_label(levels: dict, factors) -> str:
    return ", ".join(f"{f}={levels[f]}" for f in factors if f in levels)


def anova_rows(data: ReportData) -> list[dict]:
    """ANOVA rows with a 'significant' flag, in analysis order.

    Significant: below α after Holm's adjustment over the table's terms (``p_holm``,
    the terms the findings state), or the p itself in an analysis without it."""
    rows = []
    for r in data.analysis.get("anova") or []:
        row = dict(r)
        p = row.get("p_holm", row.get("p"))
        row["significant"] = bool(finite(p) and float(p) < data.alpha
                                  and row.get("term") != "Residual")
        rows.append(row)
    return rows


def transform_sentence(data: ReportData) -> str:
    if data.analysis.get("unanalysed"):
        return ""
    tr = data.analysis.get("transform") or {}
    if tr.get("summary"):  # the analysis states its scale and the profile's evidence itself
        return str(tr["summary"])
    name = tr.get("name", "none")
    reason = tr.get("reason") or ""
    if name == "log":
        base = "The analysis works on the logarithm of the response, so effects are ratios."
    elif name == "boxcox":
        base = (f"The analysis works on a Box-Cox transform of the response "
                f"(λ = {fmt_num(tr.get('lambda'))}); ratios quoted are approximate.")
    else:
        base = "The analysis works on the response as measured (no transform)."
    reason = str(reason).strip()
    if reason:
        if reason[0].isascii():  # never turn a symbol such as λ̂ into another one
            reason = reason[0].upper() + reason[1:]
        if not reason.endswith("."):
            reason += "."
    return f"{base} {reason}".strip()


def _effect_phrase(data: ReportData, e: dict) -> str:
    conf = confidence_pct(data)
    what = describe(data.response)
    f = e.get("factor")
    ratio, lo, hi = e.get("ratio"), e.get("lower"), e.get("upper")
    interval = f"{conf} interval {fmt_ratio_interval(lo, hi)}"
    verb = "takes" if unit_of(data.response) == "s" else "gives"
    if finite(ratio):
        r = float(ratio)
        change = (f"{(1 - r) * 100:.0f}% less; " if r < 1
                  else f"{(r - 1) * 100:.0f}% more; " if r < 2 else "")
        return (f"{f}={e['level']} {verb} {fmt_ratio(r)} the {what} of {f}={e['reference']} "
                f"({change}{interval})")
    return f"{f}={e['level']} against {f}={e['reference']}: not estimable"


def cell_means(data: ReportData) -> list[dict]:
    """Estimated means of every observed cell (original units), best first.

    Taken from the analysis' means of the full interaction term when present,
    otherwise from the model's fitted values back-transformed (no interval).
    """
    full = ":".join(data.factors)
    rows = [m for m in data.analysis.get("means") or [] if m.get("term") == full]
    if not rows and data.residuals is not None and len(data.residuals):
        tr = data.analysis.get("transform") or {}
        name, lam = tr.get("name", "none"), tr.get("lambda")
        grp = data.residuals.groupby(list(data.factors), observed=True)["fitted"]
        fitted = grp.mean()
        counts = grp.size()
        for key, z in fitted.items():
            key = key if isinstance(key, tuple) else (key,)
            if name == "log" or (name == "boxcox" and finite(lam) and abs(lam) < 1e-12):
                mean = math.exp(z)
            elif name == "boxcox":
                base = z * lam + 1.0
                mean = base ** (1.0 / lam) if base > 0 else float("nan")
            else:
                mean = float(z)
            rows.append({"term": full, "levels": dict(zip(data.factors, key)),
                         "mean": mean, "lower": None, "upper": None,
                         "n": int(counts[key if len(key) > 1 else key[0]])})
    rows = [r for r in rows if finite(r.get("mean"))]
    rows.sort(key=lambda r: float(r["mean"]), reverse=not lower_is_better(data))
    return rows


def findings(data: ReportData) -> list[dict]:
    """The analysis' findings (derived again for an analysis.json written before they existed)."""
    found = data.analysis.get("findings")
    if found is None and not data.analysis.get("unanalysed") and data.analysis.get("anova"):
        from benchharness.analysis.findings import derive

        found = derive(data.analysis)
    return list(found or [])


def printed_notes(data: ReportData) -> list:
    """The analysis' notes a report prints: those no finding says already (each once)."""
    from benchharness.analysis.findings import notes_not_said

    return notes_not_said(data.analysis, findings(data))


def headline(found: list[dict]) -> str | None:
    """One sentence from the findings: interactions with their per-level effects, then the
    factors that matter, then those that made no detectable difference."""
    from benchharness.analysis.findings import fmt_interval as fi, fmt_ratio as fr

    parts, nothing, untested = [], [], []
    numeric = numeric_clauses(found)
    lists = {"said": parts, "nothing": nothing, "untested": untested}
    for f in found:
        where, clause = _headline_clause(f, found, numeric, fr, fi)
        if where:
            lists[where].append(clause)
    parts += numeric.values()     # trends of factors with no main-effect finding
    if not parts and not nothing and not untested:
        return None
    return _headline_sentence(parts, nothing, untested)


def _headline_clause(f: dict, found: list[dict], numeric: dict[str, str], fr, fi):
    """(list, clause) one finding adds to the headline: ``said``, ``nothing`` (made no
    detectable difference) or ``untested``; (None, None) when it adds nothing. A numeric
    factor's trend words are taken out of ``numeric`` when its main finding says them."""
    if f["kind"] == "main" and f["factors"][0] in numeric:
        said = numeric.pop(f["factors"][0])    # its trend says more than its labels
        return "said", (f"{f['terms'][0]} matters: {said}" if f["significant"] else said)
    if f["kind"] == "interaction":
        names = " and ".join(f["factors"]) if len(f["factors"]) == 2 else _and(f["factors"])
        alias = ""
        if f.get("aliased"):
            alias = (f" (or {_and(f['aliased'])}: the fraction cannot tell "
                     f"{f['terms'][0].split(' (')[0]} from {_and(f['aliased'])})")
        short = "" if _said_by_scaling(f, found) else _interaction_clause(f, found, fr, fi)
        return "said", f"{names} interact{alias}" + (f" ({short})" if short else "")
    if f["kind"] != "main":
        return None, None
    if f["significant"]:
        lead = f"{f['terms'][0]} matters"
        if f.get("ratio") is not None:
            lead += (f" ({f['factors'][0]}={f['level']} {fr(f['ratio'])} "
                     f"{fi(f.get('lower'), f.get('upper'))} against "
                     f"{f['factors'][0]}={f['reference']}"
                     + (f", {f['adjusted']}" if f.get("adjusted") else "")
                     + (f"; {f['qualifier']})" if f.get("qualifier") else ")"))
        return "said", lead
    if f.get("untested"):
        why = f.get("why_untested")
        return "untested", f["terms"][0] + (f" ({why})" if why else "")
    if f["significant"] is None:
        return None, None    # in a larger significant interaction, stated there
    return "nothing", f["terms"][0]


def _said_by_scaling(inter: dict, found: list[dict]) -> bool:
    """Whether a headline scaling finding already gives this two-factor interaction's
    effect per level (its speed-up at each level of the partner): said once, not twice."""
    pair = set(inter["factors"])
    return len(pair) == 2 and any(
        f["kind"] == "scaling" and f.get("headline") and f.get("depends_on")
        and {f["factors"][0], f["depends_on"]} == pair for f in found)


def _headline_sentence(parts: list[str], nothing: list[str], untested: list[str]) -> str:
    """The headline's sentence from what matters, what made no difference and what could
    not be tested."""
    text = "; ".join(parts)
    if nothing:
        if parts:
            text += f"; {_and(nothing)} made no detectable difference"
        else:
            text = (f"None of the factors ({_and(nothing)}) made a difference this experiment "
                    "could detect")
    if untested:
        text = (text + "; " if text else "") + f"{_and(untested)} could not be tested"
    # no capital letter forced on the first word: it is a factor's name (exact text, so
    # ``codec`` must not read ``Codec``) or already "None"
    return text + "."


def numeric_clauses(found: list[dict]) -> dict[str, str]:
    """factor -> the headline's words for its trend and scaling (analysis/trend_words.py),
    for the quantities that lead the headline (parallel, workload or declared numeric)."""
    out: dict[str, list[str]] = {}
    for f in found:
        if not f.get("headline") or f["kind"] not in ("trend", "scaling"):
            continue
        if f["kind"] == "trend" and f.get("parallel"):
            continue     # a parallel factor is said by its speed-up and serial fraction
        out.setdefault(f["factors"][0], []).append(f["short"])
    return {k: "; ".join(v) for k, v in out.items()}


def _interaction_clause(inter: dict, found: list[dict], fr, fi, most: int = 4) -> str:
    """The first factor's effect per level of its partner, for the level whose effect
    changes most (the full statement lists every level)."""
    import math as _m

    if len(inter["factors"]) != 2:
        return ""
    x, y = inter["factors"]
    rows = [f for f in found if f["kind"] == "simple effect" and f["terms"] == inter["terms"]
            and f.get("factor") == x and f.get("ratio")]
    if not rows:
        return ""
    by_level: dict[str, list[dict]] = {}
    for f in rows:
        by_level.setdefault(f["level"], []).append(f)

    # On the original scale the interaction is one of differences (the ratios may all be
    # alike): the level whose difference changes most, each said by its difference.
    additive = all(f.get("difference") is not None for f in rows)
    size = (lambda f: f["difference"]) if additive else (lambda f: _m.log(f["ratio"]))

    def spread(fs):
        vals = [size(f) for f in fs if additive or f["ratio"] > 0]
        return max(vals) - min(vals) if vals else 0.0

    level, fs = max(by_level.items(), key=lambda kv: spread(kv[1]))
    if len(fs) > most:    # the two extremes, still in the partner's level order
        lo, hi = min(fs, key=size), max(fs, key=size)
        fs = [f for f in fs if f is lo or f is hi]
    each = "; ".join((f["size"] if additive and f.get("size") else
                      f"{fr(f['ratio'])} {fi(f.get('lower'), f.get('upper'))}")
                     + f" when {y}={f['within'][y]}" for f in fs)
    adj = f"; {fs[0]['adjusted']}" if fs[0].get("adjusted") else ""
    return f"{x}={level} against {x}={fs[0]['reference']}: {each}{adj}"


def _recommendation(data: ReportData, f: dict) -> str | None:
    """The recommendation line from the best-cell finding: the one best cell, the best with
    the cells tied with it, or none when every cell is tied."""
    cells = f.get("cells") or []
    if len(cells) == 1:
        return "Recommended: " + cell_label(cells[0], list(cells[0]))
    if cells and len(cells) < len(data.analysis.get("best", {}).get("cells") or []):
        top = f.get("best") or cells[0]
        others = [c for c in cells if c != top]
        how = ("best predicted, not run in this fraction"
               if top in (f.get("not_run") or []) else "best measured")
        return ("Recommended: " + cell_label(top, list(top)) + f" ({how}; "
                + "; ".join(cell_label(c, list(c)) for c in others[:5])
                + (" …" if len(others) > 5 else "")
                + f" {TIE_WORDS.replace('the best', 'it')})")
    if cells:
        return "No recommendation: every cell " + TIE_WORDS
    return None


def _best_text(data: ReportData, f: dict) -> str:
    """The best-cell finding as a sentence, with a caution when some of its runs were lost."""
    text = f["statement"] + "."
    if f.get("best") is not None:
        lost = _lost_runs(data, f["best"])
        if lost:
            text += (f" Caution: {lost} of this cell's runs did not finish "
                     "(failed or timed out), so its mean counts only the runs "
                     "that did and may flatter it.")
    return text


def _headline_or_default(data: ReportData, found) -> str:
    """The headline, or why there is none."""
    head = headline(found)
    if head is None:
        if data.analysis.get("unanalysed"):
            head = ("No timed run finished successfully, so there is nothing to analyse; "
                    "see the data-quality warnings for why the runs failed.")
        else:
            head = "The analysis could not test any factor (see the ANOVA section)."
    return head


def verdict(data: ReportData) -> dict[str, Any]:
    """The plain-words answer, rendered from the analysis' findings: headline, one line per
    factor and interaction, the recommendation (best cell or tied set) and how sure."""
    found = findings(data)
    out: dict[str, Any] = {"factors": [], "interactions": [], "trends": [], "best": None,
                           "sure": [], "recommendation": None, "cautions": [],
                           "findings": found,
                           "surface": [f["statement"] + "." for f in found
                                       if f["kind"] == "surface"]}
    for f in found:
        if f["kind"] == "main":
            out["factors"].append({"factor": f["factors"][0], "significant": bool(f["significant"]),
                                   "p": f.get("p"), "summary": f["statement"] + "."})
        elif f["kind"] == "interaction":
            out["interactions"].append(f["statement"] + ".")
        elif f["kind"] in ("trend", "scaling"):
            out["trends"].append(f["statement"] + ".")
        elif f["kind"] == "best":
            out["best"] = f["statement"] + "."
            rec = _recommendation(data, f)
            if rec is not None:
                out["recommendation"] = rec
            out["best"] = _best_text(data, f)
        elif f["kind"] == "caution":
            out["cautions"].append(f["statement"] + ".")
    out["headline"] = _headline_or_default(data, found)
    if out["surface"]:      # a response surface: its proposal is the answer (analysis/surface.py)
        out["headline"] = out["surface"].pop()
    out["sure"] = sureness(data)
    out["transform"] = transform_sentence(data)
    return out


def _lost_runs(data: ReportData, levels: dict) -> int:
    """Timed runs of one cell that failed or timed out."""
    timed = data.timed_runs
    if "status" not in timed.columns or not len(timed):
        return 0
    mask = timed["status"].astype(str).isin(["failed", "timeout"])
    for f, v in levels.items():
        if f in timed.columns:
            mask &= timed[f].astype(str) == str(v)
    return int(mask.sum())


def _p_words(p) -> str:
    s = fmt_p(p)
    return s if s.startswith("<") else f"= {s}"


def _and(items) -> str:
    items = list(items)
    if len(items) <= 1:
        return "".join(items)
    return ", ".join(items[:-1]) + " and " + items[-1]


def _outlier_check(diag: dict) -> dict:
    """The outlier check's count, cut-off and verdict, from either layout."""
    check = diag.get("outlier_check") if isinstance(diag.get("outlier_check"), dict) else {}
    if not check:  # the keys analysis.json carries (benchharness.analysis)
        check = {k: diag.get(f"outlier_{k}") for k in ("count", "cutoff", "verdict")
                 if diag.get(f"outlier_{k}") is not None}
    return check


def _outliers_item(key, val, check: dict) -> dict:
    """The outlying runs as one display item: how many, which, and the cut-off used."""
    outl = val if isinstance(val, list) else (val or {}).get("runs", [])
    n = int(check.get("count", len(outl)) or 0) if check else len(outl)
    listed = ", ".join(f"run {o.get('run')} ({fmt_num(o.get('studentized'))})"
                       for o in outl[:12]) + (" …" if len(outl) > 12 else "")
    verdict = check.get("verdict") or ("No run stands out." if not n else "")
    if listed:
        verdict = f"{verdict}: {listed}" if verdict else listed
    cut = check.get("cutoff")
    return {
        "key": key, "name": DIAGNOSTIC_TITLES[key], "test": "externally studentized residuals, "
        "Bonferroni cut-off" + (f" ±{fmt_num(cut)}" if finite(cut) else ""),
        "statistic": None, "stat_text": "", "p": None, "verdict": verdict,
        "concern": n > 0,
    }


def _small_cells_item(key, val, factors) -> dict:
    """The cells with too few runs as one display item."""
    text = "; ".join(
        f"{cell_label(c.get('levels') or {}, factors)}: {c.get('problem', '')}"
        f" (n={c.get('n')})" for c in val[:8]) + (" …" if len(val) > 8 else "")
    return {"key": key, "name": DIAGNOSTIC_TITLES[key], "test": "", "statistic": None,
            "stat_text": "", "p": None, "verdict": text, "concern": True}


def _test_item(key, val: dict, alpha: float) -> dict:
    """One test-like diagnostic (normality, spread, drift...) as a display item; a concern
    when the analysis says so, else when p is below alpha."""
    p = val.get("p")
    concern = val.get("concern")
    if concern is None and "ok" in val:
        concern = not bool(val["ok"])
    if concern is None:
        concern = bool(finite(p) and float(p) < alpha)
    stat = val.get("statistic")
    stat_text = f"statistic {fmt_num(stat)}" if finite(stat) else ""
    if key == "drift":
        pct = val.get("percent_per_100_runs")
        if finite(pct):
            stat_text = f"{float(pct):+.1f}% per 100 runs"
        elif finite(val.get("slope_per_100_runs")):
            stat_text = f"slope {fmt_num(val['slope_per_100_runs'])} per 100 runs"
    return {
        "key": key, "name": DIAGNOSTIC_TITLES.get(key, key.replace("_", " ")),
        "test": val.get("test") or ("slope of residuals on run position"
                                    if key == "drift" else ""),
        "statistic": stat, "stat_text": stat_text, "p": p,
        "verdict": str(val.get("verdict") or ""), "concern": bool(concern),
    }


def diagnostic_items(data: ReportData) -> list[dict]:
    """Each diagnostic as {name, test, statistic, p, verdict, concern} for display."""
    diag = data.analysis.get("diagnostics") or {}
    items = []
    check = _outlier_check(diag)
    for key, val in diag.items():
        if key == "outliers":
            items.append(_outliers_item(key, val, check))
            continue
        if key == "small_cells":
            if val:
                items.append(_small_cells_item(key, val, data.factors))
            continue
        if not isinstance(val, dict) or key == "outlier_check":
            continue
        items.append(_test_item(key, val, data.alpha))
    return items


def _error_df_sentences(data: ReportData) -> list[str]:
    """What the lack of residual degrees of freedom means, and how many runs the verdict
    rests on."""
    out = []
    d = data.design
    res_df = next((r.get("df") for r in data.analysis.get("anova") or []
                   if r.get("term") == "Residual"), None)
    lenth = any(r.get("test") for r in data.analysis.get("anova") or [])
    if res_df is not None and finite(res_df) and float(res_df) == 0 and lenth:
        out.append("There are no replicates, so each effect was judged by Lenth's method "
                   "against the spread of the smaller effects (see the alias chains); the "
                   "model's assumptions could not be checked. Replicate to be surer.")
    elif res_df is not None and finite(res_df) and float(res_df) == 0:
        out.append("There are no residual degrees of freedom (one run per cell): no test "
                   "could be made, so nothing here is a verdict. Add replicates.")
    n_ok = d.get("runs_ok")
    if n_ok is not None and not data.analysis.get("unanalysed"):
        reps = d.get("replicates")
        out.append(f"Based on {plural(n_ok, 'timed run')}"
                   + (f" ({plural(reps, 'replicate')} per cell)" if reps else "") + ".")
    return out


def _assumption_sentence(data: ReportData) -> str | None:
    """What the checks of the model's assumptions say, in one sentence."""
    concerns = [i for i in diagnostic_items(data) if i["concern"]]
    no_var = ((data.analysis.get("model") or {}).get("no_variation") or {}).get("kind")
    if no_var:
        return ("The model's assumption checks could not be made: "
                + ("no run differed from any other." if no_var == "constant"
                   else "runs did not vary within cells.")
                + " Nothing here is a test result.")
    if concerns:
        return ("The checks of the model's assumptions raise concerns about "
                + _and([c["name"].lower() for c in concerns])
                + "; see Diagnostics before relying on p-values near the threshold.")
    if diagnostic_items(data):
        return "The model's assumption checks raise no concern."
    return None


def _cross_check_sentence(data: ReportData) -> str | None:
    """Whether the rank-based cross-check agrees with the ANOVA."""
    art = data.analysis.get("art") or {}
    disagree = [t.get("term") for t in (art.get("terms") or []) if t.get("agrees") is False]
    if disagree and any(f.get("check") == "rank_check" for f in findings(data)):
        return None     # a caution of the findings says it
    if disagree:
        return ("The rank-based cross-check disagrees with the ANOVA for "
                + _and([str(t) for t in disagree])
                + ": treat the verdict on those terms as uncertain.")
    if art.get("terms"):
        return ("A rank-based cross-check (which does not assume normal residuals) agrees "
                "with the ANOVA on every term.")
    return None


def _failed_runs_sentence(data: ReportData) -> str | None:
    """What the failed and timed-out runs mean for the verdict."""
    d = data.design
    bad = d.get("runs_failed", 0) + d.get("runs_timeout", 0)
    if bad and data.analysis.get("unanalysed"):
        return (f"{bad} run{'s' if bad != 1 else ''} failed or timed out; fix what the "
                "runs report (see Data-quality warnings) and run the experiment again.")
    if bad:
        return (f"{bad} run{'s' if bad != 1 else ''} failed or timed out and "
                "{} not in the analysis; the affected cells may look faster than they are."
                .format("is" if bad == 1 else "are"))
    return None


def sureness(data: ReportData) -> list[str]:
    """Sentences on how far to trust the verdict."""
    out = _error_df_sentences(data)
    for sentence in (_assumption_sentence(data), _cross_check_sentence(data),
                     _failed_runs_sentence(data)):
        if sentence is not None:
            out.append(sentence)
    return out


def _host_get(host: dict, *names):
    for n in names:
        cur: Any = host
        for part in n.split("."):
            if isinstance(cur, dict) and part in cur:
                cur = cur[part]
            else:
                cur = None
                break
        if cur not in (None, "", [], {}):
            return cur
    return None


def _hardware_pairs(host: dict) -> list[tuple[str, str]]:
    """CPU, cores and memory, under whichever of the known key names host.json uses."""
    pairs = []
    cpu = _host_get(host, "cpu_model", "cpu.model", "processor", "cpu")
    if cpu is not None and not isinstance(cpu, dict):
        pairs.append(("CPU", str(cpu)))
    phys = _host_get(host, "cores_physical", "physical_cores", "cpu.physical_cores",
                     "cpu_count_physical")
    logi = _host_get(host, "cores_logical", "logical_cores", "cpu.logical_cores",
                     "cpu_count_logical", "cpu_count")
    if phys is not None or logi is not None:
        pairs.append(("cores", f"{phys if phys is not None else '?'} physical, "
                               f"{logi if logi is not None else '?'} logical"))
    mem = _host_get(host, "memory_total_bytes", "mem_total_bytes", "memory.total_bytes",
                    "memory_bytes", "memory_total")
    mem_kib = _host_get(host, "memory_total_kib", "mem_total_kib", "memory.total_kib")
    if finite(mem):
        pairs.append(("memory", f"{float(mem) / 1024 ** 3:.1f} GiB"))
    elif finite(mem_kib):
        pairs.append(("memory", f"{float(mem_kib) / 1024 ** 2:.1f} GiB"))
    return pairs


def _software_pairs(host: dict) -> list[tuple[str, str]]:
    """Operating system, Python and the frequency governor."""
    pairs = []
    osname = _host_get(host, "os", "platform", "system", "os.name")
    kernel = _host_get(host, "kernel", "release", "os.kernel")
    if osname is not None:
        pairs.append(("OS", f"{osname}" + (f" (kernel {kernel})" if kernel else "")))
    py = _host_get(host, "python", "python_version", "python.version")
    if py is not None:
        pairs.append(("Python", str(py) if not isinstance(py, dict) else
                      str(py.get("version", py))))
    gov = _host_get(host, "governor", "cpu_governor", "frequency_governor", "cpu.governor")
    if gov is not None:
        pairs.append(("frequency governor", str(gov)))
    return pairs


def _load_pairs(host: dict) -> list[tuple[str, str]]:
    """The load average at the start and at the end of the runs."""
    pairs = []
    load = _host_get(host, "load_average_start", "load_start", "loadavg", "load_average", "load.start",
                     "load_avg_start")
    if load is not None:
        pairs.append(("load average at start", _fmt_load(load)))
    load_end = _host_get(host, "load_average_end", "load_end", "load.end", "load_avg_end")
    if load_end is not None:
        pairs.append(("load average at end", _fmt_load(load_end)))
    return pairs


def host_summary(host: dict) -> list[tuple[str, str]]:
    """Readable (what, value) pairs from host.json."""
    if not host:
        return []
    pairs = _hardware_pairs(host) + _software_pairs(host) + _load_pairs(host)
    hostname = _host_get(host, "hostname", "node", "host")
    if hostname is not None and not isinstance(hostname, dict):
        pairs.insert(0, ("host", str(hostname)))
    if not pairs:  # unknown layout: show the plain scalar facts as they are
        for k, v in host.items():
            if isinstance(v, (str, int, float, bool)):
                pairs.append((str(k), str(v)))
            if len(pairs) >= 12:
                break
    return pairs


def _fmt_load(load) -> str:
    if isinstance(load, (list, tuple)):
        return " / ".join(fmt_num(x, 3) for x in load[:3])
    if isinstance(load, dict):
        return " / ".join(fmt_num(v, 3) for v in list(load.values())[:3])
    return fmt_num(load, 3)


def _first_load(load):
    if isinstance(load, (list, tuple)) and load:
        return load[0]
    if isinstance(load, dict) and load:
        return next(iter(load.values()))
    return load


def _diagnostic_warnings(data: ReportData) -> list[dict]:
    """The diagnostics that concern the data's quality: drift, outliers, sign runs, load."""
    out = []
    for item in diagnostic_items(data):
        if item["key"] in ("drift", "outliers", "runs_test") and item["concern"]:
            out.append({"kind": item["name"], "text": item["verdict"] or item["name"]})
        elif item["key"] == "load" and item["concern"]:
            # timings that follow the machine's load: a noisy host, seen in the data
            out.append({"kind": "Noisy host", "text": item["verdict"] or item["name"]})
    return out


def _first_message(g) -> str:
    """The first non-empty message of a cell's lost runs, quoted and cut at 200 characters."""
    if "message" in g.columns:
        msgs = [str(m) for m in g["message"].dropna() if str(m).strip()]
        if msgs:
            first = " ".join(msgs[0].split())
            return f" First message: “{first[:200]}{'…' if len(first) > 200 else ''}”"
    return ""


def _lost_run_warnings(data: ReportData) -> list[dict]:
    """One warning per cell with failed or timed-out runs, since what is left flatters it."""
    out = []
    timed = data.timed_runs
    if "status" in timed.columns and len(timed):
        st = timed["status"].astype(str)
        bad = timed[st.isin(["failed", "timeout"]).to_numpy()]
        for key, g in bad.groupby(list(data.factors), observed=True, sort=False):
            key = key if isinstance(key, tuple) else (key,)
            label = cell_label(dict(zip(data.factors, key)), data.factors)
            gst = g["status"].astype(str)
            n_to, n_bad = int((gst == "timeout").sum()), len(g)
            why = _first_message(g)
            if n_to:
                out.append({"kind": "Timeouts",
                            "text": f"{label}: {plural(n_to, 'run')} timed out. Only the runs that "
                                    "finished are analysed, so this cell looks faster than "
                                    f"it is.{why}"})
            else:
                out.append({"kind": "Failed runs",
                            "text": f"{label}: {plural(n_bad, 'run')} failed and "
                                    f"{'is' if n_bad == 1 else 'are'} left out of the "
                                    f"analysis.{why}"})
    return out


def _host_warnings(host: dict) -> list[dict]:
    """A busy machine at the start, a varying clock, and the host's own warnings."""
    out = []
    load = _first_load(_host_get(host, "load_average_start", "load_start", "loadavg", "load_average", "load.start",
                                 "load_avg_start"))
    cores = _host_get(host, "cores_logical", "logical_cores", "cpu.logical_cores",
                      "cpu_count_logical", "cpu_count")
    host_said_load = any("load average" in str(w) for w in host.get("warnings") or [])
    if (finite(load) and finite(cores) and float(cores) > 0 and float(load) > 0.5 * float(cores)
            and not host_said_load):
        out.append({"kind": "Noisy host",
                    "text": f"The load average was {fmt_num(load)} on {cores} logical CPUs when "
                            "the experiment started: other work competed with the runs and "
                            "widened the spread."})
    gov = _host_get(host, "governor", "cpu_governor", "frequency_governor", "cpu.governor")
    if isinstance(gov, str) and gov not in ("performance",):
        out.append({"kind": "Noisy host",
                    "text": f"The CPU frequency governor was '{gov}': clock speed may have "
                            "changed during the experiment. 'performance' holds it steady."})
    for w in host.get("warnings") or []:
        text = w.get("text") or w.get("message") if isinstance(w, dict) else str(w)
        if text:
            out.append({"kind": "Noisy host", "text": str(text)})
    return out


def warnings(data: ReportData, notes: list[str] | None = None) -> list[dict]:
    """Data-quality warnings: {kind, text}; ``notes`` adds renderer notes (subsampling)."""
    out = _diagnostic_warnings(data) + _lost_run_warnings(data)
    out += _host_warnings(dict(data.host or {}))
    for w in data.analysis.get("warnings") or []:
        out.append({"kind": "Analysis", "text": w if isinstance(w, str) else
                    str(w.get("text") or w.get("message") or w)})
    for n in notes or []:
        out.append({"kind": "Figures", "text": n})
    return out


def cell_summary(data: ReportData) -> list[dict]:
    """Per-cell table: runs ok / failed / timed out, median, IQR, min, max, model mean."""
    import numpy as np
    import pandas as pd

    timed = data.timed_runs
    resp = pd.to_numeric(timed[data.response], errors="coerce")
    st = timed["status"].astype(str) if "status" in timed.columns else pd.Series(
        "ok", index=timed.index)
    frame = pd.DataFrame({f: timed[f].astype(str) for f in data.factors})
    frame["_y"] = resp.where(st == "ok")
    frame["_ok"] = (st == "ok").astype(int)
    frame["_failed"] = (st == "failed").astype(int)
    frame["_timeout"] = (st == "timeout").astype(int)
    g = frame.groupby(list(data.factors), observed=True, sort=False)
    agg = g.agg(ok=("_ok", "sum"), failed=("_failed", "sum"), timeout=("_timeout", "sum"),
                median=("_y", "median"), q1=("_y", lambda s: s.quantile(0.25)),
                q3=("_y", lambda s: s.quantile(0.75)), min=("_y", "min"), max=("_y", "max"))
    model_means = {tuple(m["levels"][f] for f in data.factors): m for m in cell_means(data)}
    order = {f: {lv: i for i, lv in enumerate(data.levels[f])} for f in data.factors}
    rows = []
    for key, r in agg.iterrows():
        key = key if isinstance(key, tuple) else (key,)
        m = model_means.get(tuple(key))
        rows.append({
            "levels": dict(zip(data.factors, key)),
            "ok": int(r["ok"]), "failed": int(r["failed"]), "timeout": int(r["timeout"]),
            "median": r["median"], "iqr": r["q3"] - r["q1"], "min": r["min"], "max": r["max"],
            "mean": m["mean"] if m else np.nan,
            "lower": m.get("lower") if m else None, "upper": m.get("upper") if m else None,
            "_sort": tuple(order[f].get(k, 1 << 30) for f, k in zip(data.factors, key)),
        })
    rows.sort(key=lambda r: r["_sort"])
    for r in rows:
        r.pop("_sort")
    return rows


def comparisons(data: ReportData, limit: int | None = None) -> list[dict]:
    """Comparison rows with a readable 'within' and a significance flag."""
    out = []
    for c in data.analysis.get("comparisons") or []:
        row = dict(c)
        within = c.get("within") or {}
        row["within_text"] = ", ".join(f"{k}={v}" for k, v in within.items()) if within else ""
        p = c.get("p_adj")
        lo, hi = c.get("lower"), c.get("upper")
        # significant only when the interval shown agrees with the adjusted p
        excludes = finite(lo) and finite(hi) and (float(lo) > 1 or float(hi) < 1)
        row["significant"] = bool(finite(p) and float(p) < data.alpha and excludes)
        out.append(row)
    return out[:limit] if limit else out


def top_comparisons(data: ReportData, n: int = 10) -> list[dict]:
    """The ``n`` comparisons that matter most: significant first, then by size of the ratio."""
    rows = comparisons(data)

    def size(c):
        r = c.get("ratio")
        return abs(math.log(float(r))) if finite(r) and float(r) > 0 else 0.0

    rows.sort(key=lambda c: (not c["significant"], -size(c)))
    return rows[:n]


def design_rows(data: ReportData) -> list[tuple[str, str]]:
    d = data.design
    rows = [("factors", ", ".join(f"{f} ({len(data.levels[f])} levels)" for f in data.factors))]
    cells = d.get("cells_planned")
    if cells is not None:
        obs = d.get("cells_observed")
        rows.append(("cells", f"{cells}" + (f" ({obs} with runs)" if obs is not None
                                             and obs != cells else "")))
    if d.get("replicates") is not None:
        rows.append(("replicates per cell", str(d["replicates"])))
    elif d.get("replicates_seen") is not None:
        rows.append(("replicates per cell", str(d["replicates_seen"])))
    if d.get("warmup"):
        rows.append(("untimed warm-up runs per cell", str(d["warmup"])))
    if d.get("order"):
        rows.append(("run order", str(d["order"])))
    rows.append(("seed", "not recorded" if d.get("seed") is None else str(d["seed"])))
    if d.get("timeout_s") is not None:
        rows.append(("timeout per run", f"{fmt_num(d['timeout_s'])} s"))
    rows.append(("timed runs", f"{d.get('runs_total', 0)}: {d.get('runs_ok', 0)} ok, "
                               f"{d.get('runs_failed', 0)} failed, "
                               f"{d.get('runs_timeout', 0)} timed out"))
    rows.append(("response", f"{data.response} ({describe(data.response)})"))
    if data.block:
        rows.append(("block", data.block))
    if d.get("command"):
        rows.append(("command", d["command"]))
    return rows

