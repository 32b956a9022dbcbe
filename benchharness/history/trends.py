"""Trends: each cell's series over commits, with its steps and host breaks.

Owns: turning history rows (see `store.read_history`) into per-cell series --
one point per commit and host, folders of the same commit measured on the same
host pooled as if their runs were one sample -- running the step detection of
`changepoint.detect_steps` on each series, and plain-data summaries of the
result (`to_json_dict`) for the terminal, HTML and JSON renderers.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass

_LOWER_IS_BETTER = re.compile(r"(_s|_ms|_us|_ns|_kib|_kb|_mib|_bytes|_faults|_switches|"
                              r"_blocks)$")


def lower_is_better(response: str) -> bool | None:
    """True for times, memory and counts (by unit suffix); None when we cannot tell."""
    return True if _LOWER_IS_BETTER.search(response) else None


@dataclass(frozen=True)
class Point:
    commit: str
    commit_time: str | None
    branch: str | None
    host: str
    n: int
    mean: float            # mean of ln(response), or of the response on linear scale
    sd: float              # SD within the point (NaN when n = 1)
    center: float
    ci_low: float | None
    ci_high: float | None
    folders: tuple[str, ...]
    scale: str | None = None  # a point's own scale when its cell mixes scales, else None


@dataclass(frozen=True)
class CellTrend:
    experiment: str
    response: str
    cell: dict
    scale: str
    points: tuple[Point, ...]
    detection: object | None = None      # changepoint.Detection
    note: str = ""
    conf_level: float = 0.95

    @property
    def label(self) -> str:
        return ", ".join(f"{k}={v}" for k, v in self.cell.items()) or "(single cell)"


def _pool(rows, scale: str, conf_level: float) -> Point:
    from scipy import stats

    ns = [int(r["n"]) for r in rows]
    ms = [float(r["mean"]) for r in rows]
    sds = [math.nan if _num(r["noise_sd"]) is None else _num(r["noise_sd"]) for r in rows]
    N = sum(ns)
    m = sum(n * x for n, x in zip(ns, ms)) / N
    if len(rows) == 1:
        sd = sds[0]
    else:
        ss = sum((n - 1) * s * s for n, s in zip(ns, sds) if n > 1 and math.isfinite(s))
        ss += sum(n * (x - m) ** 2 for n, x in zip(ns, ms))
        sd = math.sqrt(ss / (N - 1)) if N > 1 else math.nan
    back = math.exp if scale == "log" else (lambda v: v)
    lo = hi = None
    if N > 1 and math.isfinite(sd):
        half = float(stats.t.ppf(0.5 + conf_level / 2, N - 1)) * sd / math.sqrt(N)
        lo, hi = back(m - half), back(m + half)
    first = rows[0]
    return Point(commit=first["commit_id"], commit_time=first["commit_time"],
                 branch=first["branch"], host=first["host_fingerprint"], n=N, mean=m, sd=sd,
                 center=back(m), ci_low=lo, ci_high=hi,
                 folders=tuple(r["folder_name"] for r in rows))


def _num(v):
    return None if v is None or (isinstance(v, float) and math.isnan(v)) else float(v)


def _as_recorded(r) -> Point:
    sd = _num(r["noise_sd"])
    return Point(commit=r["commit_id"], commit_time=r["commit_time"], branch=r["branch"],
                 host=r["host_fingerprint"], n=int(r["n"]), mean=float(r["mean"]),
                 sd=math.nan if sd is None else sd, center=float(r["center"]),
                 ci_low=_num(r["ci_low"]), ci_high=_num(r["ci_high"]),
                 folders=(r["folder_name"],), scale=r["scale"])


def build_trends(history, alpha: float = 0.05, conf_level: float = 0.95,
                 n_sim: int | None = None) -> list[CellTrend]:
    """Per-cell trends (with step detection) from a `read_history` DataFrame."""
    trends: list[CellTrend] = []
    if history is None or len(history) == 0:
        return trends
    for (exp, resp, cell_json), grp in history.groupby(["experiment", "response", "cell"],
                                                       sort=False):
        trends.append(_cell_trend(exp, resp, cell_json, grp.to_dict("records"), alpha,
                                  conf_level, n_sim))
    return trends


def _cell_trend(exp: str, resp: str, cell_json: str, rows: list[dict], alpha: float,
                conf_level: float, n_sim: int | None) -> CellTrend:
    """One cell's trend: its points over commits and, on the log scale, the steps found."""
    import numpy as np

    from benchharness.history import changepoint as cp

    scales = {r["scale"] for r in rows}
    scale = "log" if scales == {"log"} else "linear"
    note = ""
    if len(scales) > 1:
        # an analysis that chose the original scale for one folder (or values <= 0 in it)
        # and the log scale for another: the points cannot be pooled or compared as ratios
        note = ("its folders were summarised on different scales (log for some, the "
                "original scale for others), so each folder is shown as recorded and steps "
                "are not searched for")
    points = _cell_points(rows, scale, len(scales) > 1, conf_level)
    det = None
    if scale == "log" and len(scales) == 1:
        kw = {} if n_sim is None else {"n_sim": n_sim}
        det = cp.detect_steps(np.array([p.mean for p in points]),
                              np.array([p.sd for p in points]),
                              np.array([p.n for p in points]),
                              hosts=[p.host for p in points], alpha=alpha,
                              conf_level=conf_level, **kw)
        if len(points) < 3:
            note = ("steps are searched for from 3 commits on one host (a change at the "
                    f"newest commits), {cp.MIN_POINTS} for the whole series")
    elif scale == "linear" and not note:
        note = "values <= 0 occur, so steps (ratios) are not searched for"
    return CellTrend(experiment=exp, response=resp, cell=json.loads(cell_json),
                     scale=scale, points=tuple(points), detection=det, note=note,
                     conf_level=conf_level)


def _cell_points(rows: list[dict], scale: str, mixed: bool, conf_level: float) -> list[Point]:
    """One point per run of consecutive folders of one commit on one host, pooled; with
    ``mixed`` scales (which cannot be pooled), one point per folder as recorded."""
    if mixed:
        # a mixture of scales cannot be pooled: one point per folder, as recorded
        return [_as_recorded(r) for r in rows]
    points: list[Point] = []
    group: list[dict] = []
    for r in rows:
        if group and (r["commit_id"] != group[0]["commit_id"]
                      or r["host_fingerprint"] != group[0]["host_fingerprint"]):
            points.append(_pool(group, scale, conf_level))
            group = []
        group.append(r)
    if group:
        points.append(_pool(group, scale, conf_level))
    return points


def step_kind(response: str, ratio: float, persists) -> str:
    """Plain wording for a step: regression / improvement / increase / decrease (+ transient)."""
    better_low = lower_is_better(response)
    up = ratio > 1
    if better_low:
        word = "regression" if up else "improvement"
    else:
        word = "increase" if up else "decrease"
    if persists is False:
        word += " (did not last)"
    return word


def to_json_dict(trends: list[CellTrend]) -> dict:
    """Plain data of the trends, for `history show --json`."""
    cells = []
    for t in trends:
        det = t.detection
        steps = []
        breaks = []
        unconfirmed = []
        if det is not None:
            for s in det.steps:
                p = t.points[s.index]
                steps.append({"commit": p.commit, "index": s.index, "ratio": s.ratio,
                              "ratio_low": s.ratio_low, "ratio_high": s.ratio_high,
                              "persists": s.persists,
                              "kind": step_kind(t.response, s.ratio, s.persists),
                              "found_by": s.found_by})
            for s in det.unconfirmed:
                p = t.points[s.index]
                unconfirmed.append({"commit": p.commit, "index": s.index, "ratio": s.ratio,
                                    "ratio_low": s.ratio_low, "ratio_high": s.ratio_high,
                                    "kind": step_kind(t.response, s.ratio, None)})
            for b in det.breaks:
                p = t.points[b.index]
                breaks.append({"commit": p.commit, "index": b.index, "from_host": b.from_host,
                               "to_host": b.to_host, "ratio": b.ratio,
                               "ratio_low": b.ratio_low, "ratio_high": b.ratio_high,
                               "kind": "host change"})
        cells.append({
            "experiment": t.experiment, "response": t.response, "cell": t.cell,
            "scale": t.scale, "note": t.note, "conf_level": t.conf_level,
            "false_step_level": det.alpha if det is not None else None,
            "points": [{"commit": p.commit, "commit_time": p.commit_time, "branch": p.branch,
                        "host_fingerprint": p.host, "n": p.n, "center": p.center,
                        "ci_low": p.ci_low, "ci_high": p.ci_high,
                        "noise_sd": None if not math.isfinite(p.sd) else p.sd,
                        "scale": p.scale or t.scale,
                        "folders": list(p.folders)} for p in t.points],
            "steps": steps, "not_yet_confirmed": unconfirmed, "host_breaks": breaks,
        })
    return {"cells": cells}
