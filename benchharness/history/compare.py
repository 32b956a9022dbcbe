"""Comparing two results folders cell by cell: the ratio B/A with its interval.

Owns: matching the cells two results folders share and estimating, per cell,
the ratio of B's geometric mean to A's with a confidence interval, from the
linear model that pools both folders with a ``session`` factor (cell x session,
fitted as one mean per cell and session on ln(response); the residual variance
is pooled over all cells and both sessions -- Montgomery, *Design and Analysis
of Experiments*, ch. 5, the two-factor model with interaction). A response
with values <= 0 is compared on its own scale as a difference.

A verdict compares the interval with a tolerance band [1/(1+tol), 1+tol]:
entirely above it -> B higher (slower, for times), entirely below -> B lower,
entirely inside -> the same within tolerance, otherwise unclear.

The intervals are adjusted for the number of cells by default (Sidak 1967), so
they hold for all cells together: comparing two folders of the same program flags
a difference in some cell with probability at most ``1 - conf_level``, however many
cells there are. Per-cell intervals are available on request.

Two folders are two sessions: whatever differed in the machine between them
(load, temperature, frequency, other tenants) is mixed into every ratio. The
result always carries that warning and points to `benchharness gate`, which
runs both versions interleaved in one session.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

from benchharness.errors import DataError

SESSION_WARNING = (
    "A and B were measured in different sessions, so each ratio mixes the change with "
    "whatever differed in the machine between the sessions (load, temperature, CPU "
    "frequency, other tenants). To decide on a change, run both versions interleaved in "
    "one session with `benchharness gate`.")

SAME_FOLDER_WARNING = (
    "A and B are the same results folder: every ratio is 1 by construction, and the "
    "intervals count each run twice, so they are narrower than two real sessions would give.")


@dataclass(frozen=True)
class CellComparison:
    cell: dict
    n_a: int
    n_b: int
    center_a: float
    center_b: float
    estimate: float        # ratio B/A (log scale) or difference B - A (linear)
    low: float
    high: float
    p_value: float | None
    verdict: str           # higher | lower | within | unclear
    wording: str


@dataclass(frozen=True)
class Comparison:
    a: str
    b: str
    response: str
    scale: str             # log | linear
    tolerance: float
    conf_level: float
    residual_df: int
    residual_sd: float | None
    cells: tuple[CellComparison, ...]
    adjustment: str = "sidak"      # sidak | bonferroni | none
    only_in_a: tuple[dict, ...] = ()
    only_in_b: tuple[dict, ...] = ()
    warnings: tuple[str, ...] = field(default=())
    scale_reason: str = ""         # which scale, and why (one scale per response)

    @property
    def per_cell_level(self) -> float:
        return per_cell_level(self.conf_level, len(self.cells), self.adjustment)

    def adjustment_sentence(self) -> str:
        """One line saying how the intervals hold, for the output."""
        m = len(self.cells)
        lvl = f"{self.conf_level * 100:g}%"
        if m == 1:
            return (f"The interval holds at {lvl} for the one shared cell; two folders of the "
                    f"same program flag it with probability at most "
                    f"{(1 - self.conf_level) * 100:g}%.")
        if self.adjustment == "none":
            return (f"Intervals are per cell ({lvl} each), not adjusted for the {m} cells: "
                    "with many cells some miss by chance, so a flagged cell may be noise.")
        name = {"sidak": "Sidak", "bonferroni": "Bonferroni"}[self.adjustment]
        return (f"Intervals hold for all {m} cells together at {lvl} ({name} adjustment: "
                f"each cell at {self.per_cell_level * 100:.4g}%); two folders of the same "
                f"program flag some cell with probability at most "
                f"{(1 - self.conf_level) * 100:g}%.")

    def to_json_dict(self) -> dict:
        return {
            "a": self.a, "b": self.b, "response": self.response, "scale": self.scale,
            "scale_reason": self.scale_reason,
            "estimate": "ratio_b_over_a" if self.scale == "log" else "difference_b_minus_a",
            "tolerance": self.tolerance, "conf_level": self.conf_level,
            "interval_adjustment": self.adjustment,
            "per_cell_conf_level": self.per_cell_level,
            "residual_df": self.residual_df, "residual_sd": self.residual_sd,
            "cells": [{"cell": c.cell, "n_a": c.n_a, "n_b": c.n_b, "center_a": c.center_a,
                       "center_b": c.center_b, "estimate": c.estimate, "low": c.low,
                       "high": c.high, "p_value": c.p_value, "verdict": c.verdict,
                       "wording": c.wording} for c in self.cells],
            "only_in_a": list(self.only_in_a), "only_in_b": list(self.only_in_b),
            "warnings": list(self.warnings),
        }


def pooled_table(folder_a, folder_b, response: str = "wall_s"):
    """The two folders' timed runs (status ok) of shared cells in one table with `session`.

    Returns ``(DataFrame[factors..., session, y], factors, only_a, only_b, data_a, data_b)``.
    """
    import numpy as np
    import pandas as pd

    from benchharness.history.folder import read_folder

    da, db = read_folder(folder_a), read_folder(folder_b)
    if set(da.factors) != set(db.factors):
        raise DataError(f"{db.path}: factors {', '.join(db.factors)} differ from "
                        f"{da.path}: {', '.join(da.factors)}; compare needs the same factors")
    factors = list(da.factors)
    parts = []
    for label, d in (("A", da), ("B", db)):
        if response not in d.runs.columns:
            raise DataError(f"{d.path}: no response column `{response}`")
        ok = d.runs[d.runs["status"].astype(str) == "ok"]
        y = pd.to_numeric(ok[response], errors="coerce")
        t = ok[factors].astype(str).assign(session=label, y=y.to_numpy())
        parts.append(t[np.isfinite(t["y"])])
    both = pd.concat(parts, ignore_index=True)
    keys = both[factors].astype(str).agg("\x1f".join, axis=1) if factors else ""
    both = both.assign(_cell=keys)
    cells_a = list(dict.fromkeys(both.loc[both["session"] == "A", "_cell"]))
    cells_b = set(both.loc[both["session"] == "B", "_cell"])
    shared = [c for c in cells_a if c in cells_b]
    only_a = [c for c in cells_a if c not in cells_b]
    only_b = [c for c in dict.fromkeys(both.loc[both["session"] == "B", "_cell"])
              if c not in set(cells_a)]
    to_dict = lambda key: dict(zip(factors, key.split("\x1f")))  # noqa: E731
    pooled = both[both["_cell"].isin(shared)].reset_index(drop=True)
    return (pooled, factors, [to_dict(c) for c in only_a], [to_dict(c) for c in only_b],
            da, db)


ADJUSTMENTS = ("sidak", "bonferroni", "none")


def per_cell_level(conf_level: float, m: int, adjust: str = "sidak") -> float:
    """Confidence level of each cell's interval so the family of ``m`` has ``conf_level``.

    ``sidak``: ``conf_level ** (1/m)`` (Sidak 1967, "Rectangular confidence regions for
    the means of multivariate normal distributions", JASA 62:626-633: two-sided t
    intervals that share one pooled variance estimate cover together with probability
    at least the product of their levels). ``bonferroni``: ``1 - (1 - conf_level)/m``
    (Dunn 1961), slightly wider. ``none``: ``conf_level``, per cell.
    """
    if adjust not in ADJUSTMENTS:
        raise DataError(f"interval adjustment {adjust!r}: choose one of "
                        f"{', '.join(ADJUSTMENTS)}")
    m = max(int(m), 1)
    if adjust == "sidak":
        return conf_level ** (1.0 / m)
    if adjust == "bonferroni":
        return 1 - (1 - conf_level) / m
    return conf_level


def compare_pooled(pooled, factors, response: str = "wall_s", tolerance: float = 0.05,
                   conf_level: float = 0.95, adjust: str = "sidak", log_scale=None):
    """The per-cell comparisons of a `pooled_table` (columns factors, session, y, _cell).

    ``log_scale``: the response's scale (`comparison_scale`); None means log when every
    value is positive. Returns ``(log_scale, residual df, residual SD or None,
    [CellComparison])``, cells in the order they first appear.
    """
    import numpy as np
    from scipy import stats

    from benchharness.history.trends import lower_is_better

    if log_scale is None:
        log_scale = bool((pooled["y"] > 0).all())
    pooled = pooled.assign(x=np.log(pooled["y"]) if log_scale else pooled["y"])
    groups = pooled.groupby(["_cell", "session"], sort=False)["x"]
    means = groups.mean()
    counts = groups.size()
    ss = float(((pooled["x"] - groups.transform("mean")) ** 2).sum())
    df = int(len(pooled) - len(means))
    s = math.sqrt(ss / df) if df > 0 else None
    m_cells = len(means) // 2
    per_cell = per_cell_level(conf_level, m_cells, adjust)
    tq = float(stats.t.ppf(0.5 + per_cell / 2, df)) if df > 0 else math.nan
    band_hi, band_lo = 1 + tolerance, 1 / (1 + tolerance)
    low_better = lower_is_better(response)
    words = {"higher": "slower" if low_better else "higher",
             "lower": "faster" if low_better else "lower"}
    out = []
    for key in dict.fromkeys(pooled["_cell"]):
        ma, mb = float(means[(key, "A")]), float(means[(key, "B")])
        na, nb = int(counts[(key, "A")]), int(counts[(key, "B")])
        d = mb - ma
        if s is not None:
            se = s * math.sqrt(1 / na + 1 / nb)
            lo, hi = d - tq * se, d + tq * se
            p = float(2 * stats.t.sf(abs(d) / se, df)) if se > 0 else None
        else:
            lo = hi = math.nan
            p = None
        back = math.exp if log_scale else (lambda v: v)
        est, elo, ehi = back(d), back(lo), back(hi)
        if log_scale:
            rel_lo, rel_hi = elo, ehi
        else:
            scale = abs(ma) if ma != 0 else 1.0
            rel_lo, rel_hi = 1 + lo / scale, 1 + hi / scale
        if s is None:
            verdict = "unclear"
        elif rel_lo > band_hi:
            verdict = "higher"
        elif rel_hi < band_lo:
            verdict = "lower"
        elif rel_lo >= band_lo and rel_hi <= band_hi:
            verdict = "within"
        else:
            verdict = "unclear"
        pct = f"{tolerance * 100:g}%"
        wording = {
            "higher": f"{words['higher']} (beyond {pct})",
            "lower": f"{words['lower']} (beyond {pct})",
            "within": f"same within {pct}",
            "unclear": "unclear" if s is not None else "unclear (no replicates)",
        }[verdict]
        cell = dict(zip(factors, key.split("\x1f"))) if factors else {}
        out.append(CellComparison(cell=cell, n_a=na, n_b=nb, center_a=back(ma),
                                  center_b=back(mb), estimate=est, low=elo, high=ehi,
                                  p_value=p, verdict=verdict, wording=wording))
    return log_scale, df, s, out


def compare_folders(folder_a, folder_b, response: str = "wall_s", tolerance: float = 0.05,
                    conf_level: float = 0.95, simultaneous: bool = False,
                    adjust: str | None = None) -> Comparison:
    """Compare two results folders cell by cell (see the module docstring).

    ``adjust`` (default ``sidak``): how each interval is widened for the number m of
    shared cells so that all m hold together with probability at least
    ``conf_level`` (`per_cell_level`). Verdicts use the adjusted intervals, so two
    folders of the same program flag a difference in some cell with probability at
    most ``1 - conf_level`` (less with a tolerance above 0). ``simultaneous=True``
    (the older spelling) means ``bonferroni``; ``adjust="none"`` gives per-cell
    intervals.
    """
    from benchharness.history.fingerprint import host_fingerprint

    if adjust is None:
        adjust = "bonferroni" if simultaneous else "sidak"
    if not (0 <= tolerance < 1):
        raise DataError(f"tolerance {tolerance!r} must be a fraction in [0, 1), e.g. 5%")
    pooled, factors, only_a, only_b, da, db = pooled_table(folder_a, folder_b, response)
    if pooled.empty:
        raise DataError(f"{da.path} and {db.path} share no cell with timed runs of "
                        f"`{response}`; nothing to compare")
    scale_name, scale_reason = comparison_scale(response, pooled["y"].to_numpy(), da, db)
    log_scale, df, s, out = compare_pooled(pooled, factors, response, tolerance, conf_level,
                                           adjust, log_scale=scale_name == "log")

    def rank(c: CellComparison):
        return tuple(da.levels[f].index(c.cell[f]) if c.cell[f] in da.levels.get(f, [])
                     else len(da.levels.get(f, [])) for f in factors)

    out.sort(key=rank)
    same = Path(da.path).resolve() == Path(db.path).resolve()
    warnings = [SAME_FOLDER_WARNING if same else SESSION_WARNING]
    fa, fb = host_fingerprint(da.host), host_fingerprint(db.host)
    if fa != fb:
        warnings.append(f"A and B were measured on different hosts (fingerprints {fa} and "
                        f"{fb}): the ratios mostly compare the machines.")
    if da.experiment != db.experiment:
        warnings.append(f"the experiments are named differently ({da.experiment!r} and "
                        f"{db.experiment!r}); cells were matched by factor levels.")
    return Comparison(a=str(da.path), b=str(db.path), response=response,
                      scale="log" if log_scale else "linear", tolerance=tolerance,
                      conf_level=conf_level, residual_df=df, residual_sd=s, cells=tuple(out),
                      adjustment=adjust,
                      only_in_a=tuple(only_a), only_in_b=tuple(only_b),
                      warnings=tuple(warnings), scale_reason=scale_reason)


def comparison_scale(response: str, values, da, db) -> tuple[str, str]:
    """("log" | "linear", why): the scale the folders' analyses record, else the same rule.

    One scale per response (see ``benchharness.analysis.transform``): A's
    analysis.json first, then B's; a Box-Cox scale or values <= 0 mean the
    response's own scale, compared as a difference.
    """
    import numpy as np

    from benchharness.analysis.transform import recorded_transform, scale_for

    v = np.asarray(values, dtype=float)
    if len(v) and not np.all(v > 0):
        return "linear", (f"the original scale: `{response}` has values <= 0, so B - A "
                          "differences are shown instead of ratios")
    # A's analysis.json first; B's when A has none for this response
    folder = da.path if recorded_transform(da.path, response) is not None else db.path
    name, lam, why = scale_for(response, v, folder, None)
    if name == "boxcox":
        return "linear", (f"the original scale: the analysis records a Box-Cox scale "
                          f"(λ = {lam:g}) for `{response}`, so B - A differences in its own "
                          "units are shown")
    return ("log" if name == "log" else "linear"), why
