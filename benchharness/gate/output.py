"""What the gate tells people and CI systems: terminal lines, Markdown, JUnit XML, JSON.

Pure functions from a `GateOutcome` to text (the command writes the files).
JUnit XML is the de facto format CI systems read: one ``testsuite`` named
``benchharness gate``, one ``testcase`` per workload, a ``failure`` element on
a regression, a ``skipped`` element on an inconclusive verdict (so it shows up
without failing the job; the exit code still reports it), an ``error`` element
when a build never ran successfully (nothing was measured).
"""

from __future__ import annotations

import math
from pathlib import Path

from benchharness.gate.orchestrate import GateOutcome

WORDS = {
    "regression": "SLOWER",
    "no_regression": "ok",
    "improvement": "FASTER",
    "inconclusive": "UNDECIDED",
    "never_ok": "NEVER-OK",
}

OVERALL = {
    "regression": "the candidate is slower than the tolerance allows",
    "no_regression": "no workload got slower beyond the tolerance",
    "improvement": "every workload got faster",
    "inconclusive": "not enough evidence either way within the budget",
    "never_ok": "a build never ran successfully, so nothing was compared (exit code 5)",
}


def by_failures(j) -> bool:
    """A regression called by the failure-rate test (the candidate fails more often),
    not by the timings: its ratio may be well inside the tolerance."""
    return j.verdict == "regression" and j.extra.get("cause") == "failures"


def _word(j) -> str:
    return "FAILS" if by_failures(j) else WORDS.get(j.verdict, "?")


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
    if r is None or not math.isfinite(r):
        return "n/a"
    return f"{(r - 1) * 100:+.1f}%"


def _ratio(r: float | None) -> str:
    return "n/a" if r is None or not math.isfinite(r) else f"{r:.3f}"


def _interval(j) -> str:
    if j.lower is None or j.upper is None:
        return "[n/a]"
    return f"[{_ratio(j.lower)}, {_ratio(j.upper)}]"


def terminal_lines(out: GateOutcome) -> list[str]:
    s = out.settings
    kind = "higher is better" if s.higher_is_better else "lower is better"
    lines = [
        f"gate on {out.response} ({kind}): slowdown ratio candidate vs baseline on the log "
        "scale, "
        f"tolerance {s.tolerance * 100:g}%, confidence {s.confidence:g}, "
        f"{len(out.judgements)} workload(s)",
    ]
    for w in out.warnings:
        lines.append(w)
    width = max([len(k) for k in out.judgements] + [8])
    lines.append(f"  {'workload':<{width}}  {'verdict':<9}  {'ratio':>6}  {'change':>7}  "
                 f"{'bounds':<17}  runs  why")
    for key, j in out.judgements.items():
        lines.append(f"  {key:<{width}}  {_word(j):<9}  {_ratio(j.ratio):>6}  "
                     f"{_pct(j.ratio):>7}  {_interval(j):<17}  {j.blocks:>4}  {j.reason}")
    lines.append(f"verdict: {_overall(out)} ({out.runs} timed runs, "
                 f"{out.warmups} warm-up runs)")
    return lines


def markdown_summary(out: GateOutcome, folder: Path | None = None) -> str:
    s = out.settings
    icon = {"regression": "FAIL", "no_regression": "PASS", "improvement": "PASS",
            "inconclusive": "UNDECIDED", "never_ok": "BROKEN"}[out.verdict]
    md = [f"### Performance gate: {icon}", "",
          f"{_overall(out).capitalize()} (response `{out.response}`, tolerance "
          f"{s.tolerance * 100:g}%, confidence {s.confidence:g}).", ""]
    for w in out.warnings:
        md += [f"> {w}", ""]
    md += ["| workload | verdict | slowdown ratio | bounds | runs per build |",
           "| --- | --- | ---: | --- | ---: |"]
    for key, j in out.judgements.items():
        md.append(f"| {key} | {_word(j)} | {_ratio(j.ratio)} ({_pct(j.ratio)}) "
                  f"| {_interval(j)} | {j.blocks} |")
    if folder is not None:
        md += ["", f"Results folder: `{folder}`"]
    return "\n".join(md) + "\n\n"


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
        text = (f"slowdown ratio {_ratio(j.ratio)} ({_pct(j.ratio)}), bounds {_interval(j)}, "
                f"{j.blocks} runs per build; {j.reason}")
        if j.verdict == "regression":
            f = ET.SubElement(tc, "failure", {
                "message": (f"fails more often than the baseline: {j.candidate_failures} "
                            f"failed runs against {j.baseline_failures}" if by_failures(j)
                            else f"slower than {1 + out.settings.tolerance:g}x: "
                                 f"{_pct(j.ratio)}"),
                "type": "performance regression"})
            f.text = text
        elif j.verdict == "inconclusive":
            ET.SubElement(tc, "skipped", {"message": f"inconclusive: {text}"})
        elif j.verdict == "never_ok":
            e = ET.SubElement(tc, "error", {"message": f"never ran successfully: {j.reason}",
                                            "type": "build never ran successfully"})
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
        "verdict": out.verdict,
        "response": out.response,
        "higher_is_better": s.higher_is_better,
        "scale": "log",
        "tolerance": s.tolerance,
        "confidence": s.confidence,
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
             **j.to_json_dict()}
            for key, j in out.judgements.items()
        ],
    }
