"""What the gate tells people and CI systems: terminal lines, Markdown, JUnit XML, JSON.

Pure functions from a `GateOutcome` to text (the command writes the files).
Every output speaks the same five verdict words (`WORDS`: worse, not worse,
better, undecided, broken) and writes numbers with `benchharness.numbers`.
JUnit XML is the de facto format CI systems read: one ``testsuite`` named
``benchharness gate``, one ``testcase`` per workload, a ``failure`` element when
the verdict is *worse*, a ``skipped`` element when it is *undecided* (so it shows
up without failing the job; the exit code still reports it), an ``error``
element when it is *broken* (a build never ran successfully: nothing was measured).
"""

from __future__ import annotations

import math
from pathlib import Path

from benchharness.gate.failures import rate_interval, rate_pair
from benchharness.gate.orchestrate import GateOutcome
from benchharness.numbers import fmt_change, fmt_ratio, fmt_ratio_interval, plural

#: The gate's verdict words: the same strings in the terminal, the Markdown summary, the
#: JSON (``verdict``) and JUnit XML (docs/gate.md, "Verdict words"). Keys are the
#: decision's internal names (`benchharness.gate.decide.VERDICTS`).
WORDS = {
    "regression": "worse",
    "no_regression": "not worse",
    "improvement": "better",
    "inconclusive": "undecided",
    "never_ok": "broken",
}

#: What each verdict word means, in one sentence (the overall line, the Markdown summary).
OVERALL = {
    "regression": "the candidate is slower than the tolerance allows",
    "no_regression": "no workload got slower beyond the tolerance",
    "improvement": "every workload got faster",
    "inconclusive": "not enough evidence either way within the budget",
    "never_ok": "a build never ran successfully, so nothing was compared (exit code 5)",
}


def word(verdict: str) -> str:
    """The verdict word of an internal verdict name ('?' for an unknown one)."""
    return WORDS.get(verdict, "?")


def by_failures(j) -> bool:
    """A regression called by the failure-rate test (the candidate fails more often),
    not by the timings: its ratio may be well inside the tolerance."""
    return j.verdict == "regression" and j.extra.get("cause") == "failures"


def _word(j) -> str:
    return word(j.verdict)


def _why(j) -> str:
    """The reason column; a regression called by the failure-rate test says so first."""
    if by_failures(j) and "fails more often" not in j.reason:
        return f"fails more often than the baseline: {j.reason}"
    return j.reason


def _overall(out: GateOutcome) -> str:
    """The overall verdict in words; a regression says whether the candidate was
    slower, failed more often, or both (in different workloads)."""
    if out.verdict != "regression":
        return OVERALL[out.verdict]
    regs = [j for j in out.judgements.values() if j.verdict == "regression"]
    fails = sum(by_failures(j) for j in regs)
    if regs and fails == len(regs):
        return "the candidate fails more often than the baseline"
    if fails:
        return ("the candidate is slower than the tolerance allows in some workloads and "
                "fails more often than the baseline in others")
    return OVERALL["regression"]


def _pct(r: float | None) -> str:
    return "n/a" if r is None or not math.isfinite(r) else fmt_change(r)


def _ratio(r: float | None) -> str:
    return "n/a" if r is None or not math.isfinite(r) else fmt_ratio(r)


def _interval(j, confidence: float = 0.95) -> str:
    """The bounds column: the ratio's bounds; for a regression by failure rate the
    failure rates with their intervals, the evidence that decided it."""
    if by_failures(j):
        return _fail_rates(j, confidence)
    if j.lower is None or j.upper is None:
        return "no bounds"
    return fmt_ratio_interval(j.lower, j.upper)


def _fail_rates(j, confidence: float) -> str:
    """"fails 50% [28% to 72%] vs 0% [0% to 19%]": candidate vs baseline."""
    c, b = rate_pair(j.candidate_failures, j.baseline_failures, j.blocks, confidence)
    return f"fails {c} vs {b}"


def _bounds_words(j, confidence: float = 0.95) -> str:
    """"bounds 0.91× to 1.04×", or "no bounds" when none were computed (never "bounds no
    bounds"); a regression by failure rate gives the failure rates instead."""
    if by_failures(j):
        return (f"{_fail_rates(j, confidence)} of runs ({confidence * 100:g}% Wilson "
                "intervals)")
    return "no bounds" if j.lower is None or j.upper is None else f"bounds {_interval(j)}"


def failure_rates(j, confidence: float) -> dict | None:
    """gate.json's ``failure_rates`` of one workload: each build's failed timed runs, their
    share and its two-sided Wilson interval (Wilson 1927) at the gate's confidence."""
    def one(failed):
        r = rate_interval(failed, j.blocks, confidence)
        return {"failed": failed, "runs": j.blocks, "rate": r[0], "lower": r[1], "upper": r[2]}

    if not j.blocks:
        return None
    return {"confidence": confidence, "interval": "wilson",
            "baseline": one(j.baseline_failures), "candidate": one(j.candidate_failures)}


def _question(out: GateOutcome) -> str:
    s = out.settings
    kind = "higher is better" if s.higher_is_better else "lower is better"
    return (f"Is the candidate worse than the baseline by more than {s.tolerance * 100:g}%? "
            f"{plural(len(out.judgements), 'workload')}; {out.response} ({kind}) judged by the "
            f"slowdown ratio candidate vs baseline on the log scale, {s.confidence * 100:g}% "
            "confidence")


def _table(headers: list[str], rows: list[list[str]], right: set[int]) -> list[str]:
    """Columns padded to their widest cell; the last column is never padded."""
    widths = [max(len(r[i]) for r in [headers, *rows]) for i in range(len(headers))]
    out = []
    for r in [headers, *rows]:
        cells = [c.rjust(w) if i in right else c.ljust(w)
                 for i, (c, w) in enumerate(zip(r, widths))]
        cells[-1] = r[-1]
        out.append(("  " + "  ".join(cells)).rstrip())
    return out


def terminal_lines(out: GateOutcome) -> list[str]:
    """The question, any warnings, one row per workload, then the verdict line."""
    lines = [_question(out)]
    for w in out.warnings:
        lines.append(w)
    conf = out.settings.confidence
    rows = [[key, _word(j), _ratio(j.ratio), _pct(j.ratio), _interval(j, conf), str(j.blocks),
             _why(j)] for key, j in out.judgements.items()]
    lines += _table(["workload", "verdict", "ratio", "change", "bounds", "runs each", "why"],
                    rows, right={2, 3, 5})
    lines.append(f"verdict: {word(out.verdict)}: {_overall(out)} "
                 f"({plural(out.runs, 'timed run')}, {plural(out.warmups, 'warm-up run')})")
    return lines


def markdown_summary(out: GateOutcome, folder: Path | None = None) -> str:
    s = out.settings
    md = [f"### Performance gate: {word(out.verdict)}", "",
          f"{_overall(out).capitalize()} (response `{out.response}`, tolerance "
          f"{s.tolerance * 100:g}%, {s.confidence * 100:g}% confidence).", ""]
    for w in out.warnings:
        md += [f"> {w}", ""]
    md += ["| workload | verdict | slowdown ratio | bounds | runs per build | why |",
           "| --- | --- | ---: | --- | ---: | --- |"]
    for key, j in out.judgements.items():
        md.append(f"| {_md(key)} | {_word(j)} | {_ratio(j.ratio)} ({_pct(j.ratio)}) "
                  f"| {_interval(j, s.confidence)} | {j.blocks} | {_md(_why(j))} |")
    if folder is not None:
        md += ["", f"Results folder: `{folder}`"]
    return "\n".join(md) + "\n\n"


def _md(text: str) -> str:
    """Text safe inside a Markdown table cell."""
    return str(text).replace("|", "\\|").replace("\n", " ")


def junit_xml(out: GateOutcome) -> str:
    import xml.etree.ElementTree as ET

    cases = list(out.judgements.items())
    suite = ET.Element("testsuite", {
        "name": "benchharness gate", "tests": str(len(cases)),
        "failures": str(sum(j.verdict == "regression" for _, j in cases)),
        "skipped": str(sum(j.verdict == "inconclusive" for _, j in cases)),
        "errors": str(sum(j.verdict == "never_ok" for _, j in cases)),
    })
    for key, j in cases:
        tc = ET.SubElement(suite, "testcase", {"classname": "benchharness.gate", "name": key})
        conf = out.settings.confidence
        text = (f"verdict {_word(j)}; slowdown ratio {_ratio(j.ratio)} ({_pct(j.ratio)}), "
                f"{_bounds_words(j, conf)}, {plural(j.blocks, 'run')} per build; {_why(j)}")
        if j.verdict == "regression":
            f = ET.SubElement(tc, "failure", {
                "message": (f"{_word(j)}: fails more often than the baseline: "
                            f"{_bounds_words(j, conf)}"
                            if by_failures(j)
                            else f"{_word(j)}: slower than "
                                 f"{fmt_ratio(1 + out.settings.tolerance)}: {_pct(j.ratio)}"),
                "type": _word(j)})
            f.text = text
        elif j.verdict == "inconclusive":
            ET.SubElement(tc, "skipped", {"message": f"{_word(j)}: {text}"})
        elif j.verdict == "never_ok":
            e = ET.SubElement(tc, "error", {"message": f"{_word(j)}: never ran successfully: "
                                                       f"{j.reason}",
                                            "type": _word(j)})
            e.text = text
        so = ET.SubElement(tc, "system-out")
        so.text = text
    suites = ET.Element("testsuites")
    suites.append(suite)
    ET.indent(suites)
    return '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(suites, encoding="unicode") + "\n"


def _method(s) -> str:
    est = ("outlier-resistant location of the block log differences (Huber proposal 2 "
           "scale, Tukey biweight location, sandwich standard error)" if s.estimator == "robust"
           else "mean of the block log differences (t statistic)")
    return (f"{est}; group-sequential repeated confidence bounds, Lan-DeMets "
            "O'Brien-Fleming-type alpha spending; failure rates by an exact sequential sign "
            "test on discordant blocks (Pocock-type spending); Bonferroni across workloads")


def to_json_dict(out: GateOutcome, folder: Path | None = None) -> dict:
    s = out.settings
    return {
        "verdict": word(out.verdict),
        "response": out.response,
        "higher_is_better": s.higher_is_better,
        "scale": "log",
        "tolerance": s.tolerance,
        "confidence": s.confidence,
        "max_pairs": s.max_runs,
        "first_look_pairs": s.min_runs,
        # the names before the options were renamed (they held pair counts too);
        # kept with the same values so existing readers of gate.json keep working
        "max_runs": s.max_runs,
        "min_runs": s.min_runs,
        "method": _method(s),
        "stored_baseline": out.stored_baseline,
        "warnings": list(out.warnings),
        "runs": out.runs,
        "warmup_runs": out.warmups,
        "results_folder": str(folder) if folder is not None else None,
        "workloads": [
            {"workload": key, "levels": dict(out.workload_levels.get(key, {})),
             **j.to_json_dict(), "verdict": _word(j),
             "cause": "failures" if by_failures(j) else
                      ("timings" if j.verdict == "regression" else None),
             "failure_rates": failure_rates(j, s.confidence)}
            for key, j in out.judgements.items()
        ],
    }
