"""What `choose` says when its pick is the largest level of a parallel setting.

A choice is made among the settings that ran. When the recommended setting of a
parallel factor (threads, workers, jobs; `benchharness.experiment.quantities`) is
the largest level tested, the natural next question is whether more would help.
This module answers from Amdahl's law (Amdahl 1967) fitted to the same runs
(`benchharness.analysis.scaling`): with serial fraction s, doubling the workers
from p to 2p makes the job at most (s + (1 − s)/p) / (s + (1 − s)/(2p)) times
as fast, an interval from the interval of s (the bound falls as s grows). It
never recommends an untested level; it says how much one could give, and only
when the law describes the timings (no lack of fit against the pure error).
"""

from __future__ import annotations

import numpy as np


def gain_from_doubling(s: float, p: float) -> float:
    """How many times as fast 2p workers are as p, by Amdahl's law with serial fraction s."""
    return (s + (1.0 - s) / p) / (s + (1.0 - s) / (2.0 * p))


def beyond_tested(df, experiment, response: str, better: str, control, across,
                  best: dict, confidence: float) -> list[str]:
    """Reasons to add when ``best`` sits at the largest level of a parallel setting."""
    from benchharness.experiment.quantities import numeric_factors

    names = list(control) + [a for a in across if a in df.columns]
    ok = df["status"].astype(str) == "ok" if "status" in df.columns else slice(None)
    levels = {f: sorted(set(df.loc[ok, f].astype(str))) for f in names}
    out = []
    for name, q in numeric_factors(experiment, names, levels).items():
        if name not in control or not q["parallel"] or name not in best:
            continue
        values = dict(zip(levels[name], q["values"]))
        top = max(values, key=values.get)
        if str(best[name]) != top:
            continue
        sc = _scaling(df, response, better, names, name, 1.0 - confidence)
        out.append(_words(name, top, values[top], sc))
    return out


def _scaling(df, response, better, names, name, alpha):
    """analysis.scaling's result for factor ``name`` on the ok runs of ``df``, or None."""
    from benchharness.analysis import trend as tn
    from benchharness.analysis.prepare import prepare
    from benchharness.analysis.scaling import scaling
    from benchharness.errors import BenchharnessError
    from benchharness.experiment.quantities import level_values

    try:
        prep = prepare(df, response=response, factors=names, block=False)
    except BenchharnessError:
        return None
    y = np.asarray(prep.y, dtype=float)
    if not len(y) or not np.all(y > 0):
        return None
    j = names.index(name)
    values = level_values(prep.levels[j])
    if values is None:
        return None
    cd = tn.cell_data(prep.codes, None, y)
    sat = tn.saturated(cd)
    lv = {f: list(v) for f, v in zip(names, prep.levels)}
    return scaling(cd, j, values, names, lv, [len(v) for v in prep.levels], alpha, sat, None,
                   better)


def _words(name: str, top: str, p: float, sc) -> str:
    from benchharness.numbers import fmt_ratio

    lead = (f"{name}={top} is the largest {name} tested; no larger one was run, so none is "
            "recommended")
    sf = (sc or {}).get("serial_fraction") or {}
    lof = (sc or {}).get("lack_of_fit")
    if sf.get("estimate") is None or sf.get("lower") is None or lof is None:
        return lead + ": the runs cannot say how more would do"
    if lof["p"] < 0.05:
        return (lead + f": the timings do not follow Amdahl's law (lack of fit p = "
                f"{lof['p']:.3g}), so how more would do is not predicted; run it to know")
    hi, lo = gain_from_doubling(sf["lower"], p), gain_from_doubling(sf["upper"], p)
    return (lead + f". By Amdahl's law with the serial fraction fitted to these runs, "
            f"{sf['estimate']:.3f} [{sf['lower']:.3f} to {sf['upper']:.3f}], {name}={2 * p:g} "
            f"would be at most {fmt_ratio(gain_from_doubling(sf['estimate'], p))} "
            f"[{fmt_ratio(lo)} to {fmt_ratio(hi)}] as fast as {name}={top}: worth a run only "
            "if that is worth the extra workers")
