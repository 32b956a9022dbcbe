"""Adaptive replication: keep adding complete replicates until the effects are precise.

The experiment file asks for it with::

    replicates: {until: {ratio_halfwidth: 2%}, max: 50, min: 3}

(optional ``confidence: 95%`` inside ``until``). The runner first runs ``min``
complete replicates; after each further complete replicate it calls `decide`
with the runs so far. The stopping rule:

1. fewer than ``min`` complete replicates: continue;
2. on ln(response) of the successful runs, fit the cell-means model (every
   cell its own mean; the error is the pooled within-cell variance with
   N - cells degrees of freedom). For every factor and every pair of its
   levels, the main-effect ratio is exp(difference of the level means, each the
   equal-weight average of the cell means at that level) with a t confidence
   interval exp(d ± h); its *half-width* is exp(h) - 1 (2% = the interval
   reaches ×1.02 and ÷1.02 around the estimate);
3. stop when every such half-width is at most the target, or when ``max``
   replicates are complete; otherwise continue.

Why this rule does not bias the estimates: the half-width depends only on the
pooled SD and the counts, never on the effect estimates, and under the normal
model the SD is independent of the means (Cochran's theorem), so stopping when
the intervals are narrow does not select large or small effects (a
precision-based stopping rule, unlike stopping when a test first turns
significant; the fixed-width sequential interval of Chow & Robbins 1965). The cell-means error is valid whatever the
interactions are; interactions are not assumed away.

The decision is plain data (`StopDecision.to_json_dict()`) so the runner can
record it in the results folder after each replicate.
"""

from __future__ import annotations

from benchharness.numbers import plural

import math
from dataclasses import dataclass, field
from typing import Mapping, Sequence

from benchharness.experiment.yamlnodes import (
    as_int, as_percent, expect_mapping, node_error, scalar_text,
)


@dataclass(frozen=True)
class AdaptiveRule:
    ratio_halfwidth: float              # 0.02 = 2%
    max_replicates: int = 50
    min_replicates: int = 3
    confidence: float = 0.95
    response: str = "wall_s"

    def to_json_dict(self) -> dict:
        return {"ratio_halfwidth": self.ratio_halfwidth, "max": self.max_replicates,
                "min": self.min_replicates, "confidence": self.confidence,
                "response": self.response}


def adaptive_rule(exp) -> AdaptiveRule | None:
    """The adaptive rule of an experiment (``replicates:`` as a mapping), or None."""
    node = getattr(exp, "sections", {}).get("replicates")
    if node is None:
        return None
    keys = expect_mapping(node, "'replicates'", ("until", "max", "min"), required=("until",))
    until = expect_mapping(keys["until"], "'replicates: until'",
                           ("ratio_halfwidth", "confidence", "response"),
                           required=("ratio_halfwidth",))
    hw = as_percent(until["ratio_halfwidth"], "'replicates: until: ratio_halfwidth'")
    if not 0 < hw < 1:
        raise node_error(until["ratio_halfwidth"], "ratio_halfwidth must be between 0% and 100%, "
                                                   "like 2%")
    conf = 0.95
    if "confidence" in until:
        conf = as_percent(until["confidence"], "'replicates: until: confidence'")
        if not 0.5 <= conf < 1:
            raise node_error(until["confidence"], "confidence must be between 50% and 100%, "
                                                  "like 95%")
    response = "wall_s"
    if "response" in until:
        response = scalar_text(until["response"], "'response'")
        from benchharness.measure.quality import response_columns

        known = response_columns(exp)
        if response not in known and not (response.startswith("perf_")
                                          and "perf" in exp.sections):
            raise node_error(until["response"], f"'replicates: until: response' {response!r} is "
                                                f"not a measured response; use one of "
                                                f"{', '.join(known)}")
    mn = as_int(keys["min"], "'replicates: min'", minimum=2) if "min" in keys else 3
    mx = as_int(keys["max"], "'replicates: max'", minimum=2) if "max" in keys else 50
    if mx < mn:
        raise node_error(keys["max"], f"'replicates: max' ({mx}) is below 'min' ({mn})")
    return AdaptiveRule(hw, mx, mn, conf, response)


@dataclass(frozen=True)
class StopDecision:
    stop: bool
    reason: str
    replicates: int                        # complete replicates so far
    widest: Mapping | None = None          # the interval with the largest half-width
    intervals: tuple = field(default_factory=tuple)
    projected_replicates: int | None = None

    def to_json_dict(self) -> dict:
        return {"stop": self.stop, "reason": self.reason, "replicates": self.replicates,
                "widest": dict(self.widest) if self.widest else None,
                "projected_replicates": self.projected_replicates,
                "intervals": [dict(i) for i in self.intervals]}


def complete_replicates(runs, n_cells: int) -> int:
    """Replicates with a finished timed run of every cell (whatever its status)."""
    df = runs
    if "status" in df.columns:
        df = df[df["status"] != "warmup"]
    if "replicate" not in df.columns or len(df) == 0:
        return 0
    counts = df.groupby("replicate").size()
    return int((counts >= n_cells).sum())


def main_effect_intervals(runs, factor_levels: Mapping[str, Sequence[str]],
                          cells: Sequence[Mapping[str, str]] | None = None,
                          response: str = "wall_s", confidence: float = 0.95):
    """Ratio intervals of every pair of levels of every factor (cell-means model, log scale).

    Returns (intervals, problem): ``intervals`` a list of dicts
    ``{factor, level, reference, ratio, low, high, halfwidth}``; ``problem`` a
    reason string when they cannot be computed yet (None otherwise).
    """
    from scipy import stats

    names = list(factor_levels)
    groups, problem = _log_groups(runs, names, response)
    if problem:
        return [], problem
    design_cells = _design_cells(factor_levels, names, cells)
    missing = [c for c in design_cells if c not in groups]
    if missing:
        label = ", ".join(f"{n}={v}" for n, v in zip(names, missing[0]))
        return [], f"cell {label} has no successful run yet"
    means, counts, sigma2, dof = _cell_means_fit(groups, design_cells)
    if dof == 0:
        return [], "no cell has two successful runs yet (no error estimate)"
    tq = float(stats.t.ppf(0.5 + confidence / 2, dof))
    out = []
    for i, name in enumerate(names):
        out += _level_pairs(i, name, list(factor_levels[name]), design_cells, means, counts,
                            sigma2, tq, dof)
    return out, None


def _log_groups(runs, names, response):
    """``(groups, problem)``: the log responses of the successful runs by cell (a tuple
    of level labels); ``problem`` a reason when there are none to group."""
    import numpy as np

    df = runs
    if "status" in df.columns:
        df = df[df["status"] == "ok"]
    if response not in df.columns:
        return {}, f"no column {response!r} in the runs"
    y = df[response].astype(float)
    df = df[y > 0]
    if len(df) == 0:
        return {}, "no successful runs yet"
    keys = [tuple(str(v) for v in row) for row in df[names].astype(str).itertuples(index=False)]
    logy = np.log(df[response].astype(float).to_numpy())
    groups: dict[tuple, list[float]] = {}
    for k, v in zip(keys, logy):
        groups.setdefault(k, []).append(float(v))
    return groups, None


def _design_cells(factor_levels, names, cells) -> list[tuple]:
    """The design's cells as tuples of labels: the full factorial, or the given cells."""
    if cells is None:
        import itertools
        return [tuple(c) for c in itertools.product(*(factor_levels[n] for n in names))]
    return [tuple(str(c[n]) for n in names) for c in cells]


def _cell_means_fit(groups, design_cells):
    """``(means, counts, sigma2, dof)`` of the cell-means model: each cell's mean and run
    count, the pooled within-cell variance and its degrees of freedom."""
    import numpy as np

    ss = 0.0
    dof = 0
    means = {}
    counts = {}
    for c in design_cells:
        v = np.asarray(groups[c])
        means[c] = float(v.mean())
        counts[c] = len(v)
        ss += float(((v - v.mean()) ** 2).sum())
        dof += len(v) - 1
    sigma2 = ss / dof if dof else None
    return means, counts, sigma2, dof


def _level_pairs(i, name, levels, design_cells, means, counts, sigma2, tq, dof) -> list[dict]:
    """The ratio interval of every pair of levels of factor ``name`` (position ``i`` in a
    cell), each level's mean averaged over the cells it appears in."""
    lm = {}
    lv = {}
    for lev in levels:
        cs = [c for c in design_cells if c[i] == lev]
        if not cs:
            continue
        lm[lev] = sum(means[c] for c in cs) / len(cs)
        lv[lev] = sigma2 * sum(1.0 / counts[c] for c in cs) / len(cs) ** 2
    present = [lev for lev in levels if lev in lm]
    out = []
    for a in range(len(present)):
        for b in range(a + 1, len(present)):
            ref, lev = present[a], present[b]
            d = lm[lev] - lm[ref]
            h = tq * math.sqrt(lv[lev] + lv[ref])
            out.append({"factor": name, "level": lev, "reference": ref,
                        "ratio": math.exp(d), "low": math.exp(d - h), "high": math.exp(d + h),
                        "halfwidth": math.expm1(h), "log_halfwidth": h, "df": dof})
    return out


def decide(runs, factor_levels: Mapping[str, Sequence[str]], rule: AdaptiveRule,
           cells: Sequence[Mapping[str, str]] | None = None) -> StopDecision:
    """Apply the stopping rule to the runs so far (see the module docstring)."""
    n_cells = len(cells) if cells is not None else math.prod(len(v) for v in factor_levels.values())
    done = complete_replicates(runs, n_cells)
    target = rule.ratio_halfwidth
    if done < rule.min_replicates:
        return StopDecision(False, f"{plural(done, 'complete replicate')}, the minimum is "
                                   f"{rule.min_replicates}", done)
    intervals, problem = main_effect_intervals(runs, factor_levels, cells, rule.response,
                                               rule.confidence)
    if problem is not None:
        if done >= rule.max_replicates:
            return StopDecision(True, f"reached the maximum of {rule.max_replicates} replicates; "
                                      f"intervals cannot be computed: {problem}", done)
        return StopDecision(False, f"intervals cannot be computed yet: {problem}", done)
    if not intervals:
        return StopDecision(True, "no factor with two levels to estimate", done)
    widest = max(intervals, key=lambda r: r["halfwidth"])
    desc = (f"{widest['factor']} {widest['level']} vs {widest['reference']} "
            f"±{widest['halfwidth'] * 100:.2f}%")
    # Half-widths shrink about as 1/sqrt(n): a projection, for the progress note.
    h_target = math.log1p(target)
    projected = max(done, math.ceil(done * (widest["log_halfwidth"] / h_target) ** 2))
    if widest["halfwidth"] <= target:
        return StopDecision(True, f"every main-effect ratio interval is within ±{target * 100:g}% "
                                  f"(widest: {desc}) after {done} replicates", done, widest,
                            tuple(intervals), projected)
    if done >= rule.max_replicates:
        return StopDecision(True, f"reached the maximum of {rule.max_replicates} replicates; the "
                                  f"widest interval is {desc}, above ±{target * 100:g}%", done,
                            widest, tuple(intervals), projected)
    return StopDecision(False, f"widest interval {desc} is above ±{target * 100:g}%; about "
                               f"{projected} replicates projected", done, widest,
                        tuple(intervals), projected)
