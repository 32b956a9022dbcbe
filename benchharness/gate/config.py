"""The ``gate:`` section of an experiment file: parsed and validated into a `GateConfig`.

`gate_settings(exp)` (called by `benchharness.experiment.sections`, so `plan`
and `run` report a malformed section before the first run) and
`parse_gate_section(exp, overrides)` (the gate command, with command-line
values) return the build factor, the baseline and candidate levels, the
response and the decision settings (`GateSettings`), or raise
`ExperimentError` located at ``FILE:LINE:COL``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping

from benchharness.errors import ExperimentError, UsageError
from benchharness.gate.decide import GateSettings

GATE_KEYS = ("factor", "baseline", "candidate", "tolerance", "confidence", "max_pairs",
             "first_look_pairs", "response", "better", "inconclusive",
             # spellings that shipped, still read with a deprecation note (docs/cli.md)
             "max_runs", "min_runs", "direction")

#: old key -> the one spelling now (docs/cli.md)
GATE_OLD_KEYS = {"max_runs": "max_pairs", "min_runs": "first_look_pairs", "direction": "better"}


@dataclass(frozen=True)
class GateConfig:
    """Where the builds live in the experiment, and the decision settings."""

    factor: str
    baseline: str
    candidate: str
    settings: GateSettings
    response: str = "wall_s"
    inconclusive: str | None = None   # None | "pass" | "fail"


def gate_settings(exp, overrides=None):
    """Parse and validate ``exp.sections['gate']``; returns a `GateConfig`."""
    return parse_gate_section(exp, overrides)


def parse_gate_section(exp, overrides: Mapping | None = None) -> GateConfig:
    """Validate ``gate:`` of an experiment file; ``overrides`` are command-line values."""
    from benchharness.experiment import yamlnodes as Y

    node = exp.sections.get("gate")
    if node is None:
        raise ExperimentError("the experiment file has no 'gate:' section; add e.g. "
                              "gate: {factor: build, baseline: old}", path=str(exp.path))
    items = Y.expect_mapping(node, "'gate'", GATE_KEYS, required=("factor", "baseline"))
    items = _new_keys(items)
    factor, baseline, candidate = _builds(exp, items)
    kw = _decision_settings(items)
    if "response" in items:
        response = Y.scalar_text(items["response"], "'gate: response'")
    else:   # the experiment file's own `response:` (checked at its line), else wall_s
        from benchharness.experiment.response import default_response

        response = default_response(exp)
    inconclusive = _inconclusive(items)
    o = {k: v for k, v in (overrides or {}).items() if v is not None}
    if "response" in o:
        response = o.pop("response")
    # a response given on the command line has no line of the file to name
    response_node = None if "response" in (overrides or {}) and \
        (overrides or {}).get("response") is not None else items.get("response")
    _check_response(exp, response, response_node)
    _check_ratio_scale(exp, response, response_node)
    if "better" not in items and "higher_is_better" not in o:
        # a custom metric knows its direction (metrics: NAME: {better: higher})
        if _metric_better(exp, response) == "higher":
            kw["higher_is_better"] = True
    if "inconclusive" in o:   # --inconclusive distinct restores exit 3 over the file's key
        inconclusive = o.pop("inconclusive")
        inconclusive = None if inconclusive == "distinct" else inconclusive
    kw.update(o)
    settings = _settings(node, items, kw, o)
    return GateConfig(factor=factor, baseline=baseline, candidate=candidate,
                      settings=settings, response=response, inconclusive=inconclusive)


def _new_keys(items: dict) -> dict:
    """The gate keys under their one spelling; an old key gets a located deprecation note
    (and both spellings of one key together are refused)."""
    from benchharness.experiment import yamlnodes as Y
    from benchharness.values import deprecated

    out = dict(items)
    for old, new in GATE_OLD_KEYS.items():
        if old not in out:
            continue
        node = out.pop(old)
        if new in out:
            raise Y.node_error(node, f"'gate: {old}' and 'gate: {new}' are one setting; keep "
                               f"only '{new}'")
        mark = node.start_mark
        where = f"{mark.name}:{mark.line + 1}:{mark.column + 1}: " if mark is not None else ""
        deprecated(f"{where}'gate: {old}' is deprecated; write '{new}'")
        out[new] = node
    return out


def _builds(exp, items) -> tuple[str, str, str]:
    """The build factor and its baseline and candidate levels."""
    from benchharness.experiment import yamlnodes as Y

    factor = Y.scalar_text(items["factor"], "'gate: factor'")
    if factor not in exp.factor_names:
        raise Y.node_error(items["factor"], f"'gate: factor' {factor!r} is not a factor of the "
                           f"experiment; factors: {', '.join(exp.factor_names)}")
    space = getattr(exp, "space", None)
    if space is not None and (factor in space.conditions
                              or any(factor in r.match.factors for r in space.rules)):
        raise Y.node_error(items["factor"], f"'gate: factor' {factor!r} is named by 'exclude' or "
                           "'only_when': the gate compares its baseline and candidate on every "
                           "workload, so both must exist on each; exclude other factors only")
    levels = exp.levels_of(factor)
    baseline = Y.scalar_text(items["baseline"], "'gate: baseline'")
    if baseline not in levels:
        raise Y.node_error(items["baseline"], f"'gate: baseline' {baseline!r} is not a level of "
                           f"{factor}; levels: {', '.join(levels)}")
    if "candidate" in items:
        candidate = Y.scalar_text(items["candidate"], "'gate: candidate'")
        if candidate not in levels or candidate == baseline:
            raise Y.node_error(items["candidate"], f"'gate: candidate' {candidate!r} must be "
                               f"another level of {factor}; levels: {', '.join(levels)}")
        return factor, baseline, candidate
    others = [lv for lv in levels if lv != baseline]
    if len(others) != 1:
        raise Y.node_error(items["factor"], f"factor {factor} has {len(levels)} levels; say "
                           "which one is the candidate with 'gate: candidate: LEVEL'")
    return factor, baseline, others[0]


def _decision_settings(items) -> dict:
    """Tolerance, confidence, run limits and direction as `GateSettings` keywords."""
    from benchharness.experiment import yamlnodes as Y
    from benchharness.values import change_of

    kw: dict = {}
    if "tolerance" in items:
        kw["tolerance"] = change_of(Y.as_ratio(items["tolerance"], "'gate: tolerance'"))
        if not 0 < kw["tolerance"] < 1:
            raise Y.node_error(items["tolerance"], "'gate: tolerance' must be above 0% and "
                               "below 100%, e.g. 5%")
    if "confidence" in items:
        c = Y.as_percent(items["confidence"], "'gate: confidence'")
        if not 0.5 < c < 1:
            raise Y.node_error(items["confidence"], "'gate: confidence' must be between 0.5 "
                               "and 1, e.g. 0.95")
        kw["confidence"] = c
    if "max_pairs" in items:
        kw["max_runs"] = Y.as_int(items["max_pairs"], "'gate: max_pairs'", minimum=2)
    if "first_look_pairs" in items:
        kw["min_runs"] = Y.as_int(items["first_look_pairs"], "'gate: first_look_pairs'",
                                  minimum=2)
    if "better" in items:
        d = Y.scalar_text(items["better"], "'gate: better'")
        if d not in ("lower", "higher"):
            raise Y.node_error(items["better"], "'gate: better' must be lower (times: "
                               "lower is better) or higher (throughput: higher is better)")
        kw["higher_is_better"] = d == "higher"
    return kw


def _inconclusive(items) -> str | None:
    """What an inconclusive verdict exits as: None (its own code), "pass" or "fail"."""
    from benchharness.experiment import yamlnodes as Y

    if "inconclusive" not in items:
        return None
    inconclusive = Y.scalar_text(items["inconclusive"], "'gate: inconclusive'")
    if inconclusive not in ("pass", "fail", "distinct"):
        raise Y.node_error(items["inconclusive"], "'gate: inconclusive' must be pass, fail "
                           "or distinct")
    return None if inconclusive == "distinct" else inconclusive


def _settings(node, items, kw: dict, o: Mapping) -> GateSettings:
    from benchharness.experiment import yamlnodes as Y

    if kw.get("min_runs", 6) > kw.get("max_runs", 100):
        if "min_runs" in o or "max_runs" in o:  # a command-line value: no file line to name
            raise UsageError(f"--first-look-pairs ({kw.get('min_runs', 6)}) must not exceed "
                             f"--max-pairs ({kw.get('max_runs', 100)})")
        where = items.get("first_look_pairs") or items.get("max_pairs") or node
        raise Y.node_error(where, "'gate: first_look_pairs' must not exceed "
                           "'gate: max_pairs'")
    try:
        return GateSettings(**kw)
    except ValueError as exc:
        raise Y.node_error(node, f"'gate': {exc}") from None


def _check_response(exp, response: str, node) -> None:
    """The response must be a runs.csv figure or one of the experiment's metrics."""
    from benchharness.measure.quality import response_columns

    known = response_columns(exp)
    if response in known or (response.startswith("perf_") and "perf" in exp.sections):
        return
    from benchharness.experiment.yamlnodes import node_error, suggest

    # suggest() always answers: the closest name, else the list of known ones
    hint = suggest(response, known).replace("known keys", "known responses")
    msg = (f"the gate's response {response!r} is not measured by this experiment; {hint}"
           " (a custom metric needs a 'metrics:' entry in an experiment file)")
    if node is not None:
        raise node_error(node, msg)
    raise UsageError(f"--response: {msg}")


def _check_ratio_scale(exp, response: str, node) -> None:
    """The gate judges slowdown ratios on the log scale: refuse a metric whose unit is a difference.

    One scale per response (``benchharness.analysis.transform``): a metric declared
    in a unit that is a difference or an interval scale (°C, a change in ms) has no
    meaningful ratio, so a ratio gate could not decide anything true about it.
    """
    from benchharness.measure.quality import quality_config

    metrics = quality_config(exp).metrics
    unit = next((m.unit for m in (metrics.metrics if metrics is not None else ())
                 if m.name == response), None)
    if unit is None:
        return
    from benchharness.analysis.transform import ratio_scaled

    is_ratio, why = ratio_scaled(unit)
    if is_ratio:
        return
    msg = (f"the gate judges slowdown ratios on the log scale, but the response {response!r}: "
           f"{why}, where ratios mean nothing; gate on a ratio-scaled response (a time, a size, "
           "a rate) or compare this one with `benchharness analyze`")
    if node is not None:
        from benchharness.experiment.yamlnodes import node_error

        raise node_error(node, msg)
    raise UsageError(f"--response: {msg}")


def _metric_better(exp, response: str) -> str | None:
    from benchharness.measure.quality import quality_config

    metrics = quality_config(exp).metrics
    for m in (metrics.metrics if metrics is not None else ()):
        if m.name == response:
            return m.better
    return None
