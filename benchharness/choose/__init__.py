"""Choosing a default with statistical backing: best or tied, robust, trade-offs.

`choose` answers "which setting should ship as the default?" from a runs
table. It combines:

* `model` -- per-setting means on the analysis scale and the pooled noise;
* `mcb` -- Hsu's constrained multiple comparisons with the best (Hsu 1981,
  1984): the settings not shown worse than the best;
* `prefer` -- ties broken toward the declared default or first listed level;
* `robust` -- minimax regret across the ``across`` environments (Savage 1951)
  against the best on average;
* `pareto` -- the confident Pareto front over several responses.

The result is a frozen `Choice` whose ``to_dict()`` is plain JSON.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from benchharness.errors import DataError, UsageError

__all__ = ["choose", "Choice", "choice_section"]


@dataclass(frozen=True)
class Choice:
    """The outcome of `choose`, as plain data (see docs/choose.md for every key)."""

    response: str
    better: str
    scale: str
    confidence: float
    control: tuple[str, ...]
    across: tuple[str, ...]
    best: dict
    estimated_best: dict
    tied: list
    robust: dict
    on_average: dict
    disagreement: dict | None
    candidates: list
    residual: dict
    prefer: dict
    also: tuple[str, ...] = ()
    pareto: list | None = None
    responses: dict = field(default_factory=dict)
    reasons: list = field(default_factory=list)
    runs_used: int = 0
    runs_dropped: int = 0
    #: settings that were run but have no ok run with a value of the response
    without_runs: list = field(default_factory=list)

    def to_dict(self) -> dict:
        d = {
            "response": self.response,
            "better": self.better,
            "scale": self.scale,
            "confidence": self.confidence,
            "factors": list(self.control),
            "across": list(self.across),
            "best": dict(self.best),
            "estimated_best": dict(self.estimated_best),
            "tied": [dict(t) for t in self.tied],
            "robust": dict(self.robust),
            "on_average": dict(self.on_average),
            "disagreement": None if self.disagreement is None else dict(self.disagreement),
            "prefer": dict(self.prefer),
            "residual": dict(self.residual),
            "runs_used": self.runs_used,
            "runs_dropped": self.runs_dropped,
            "without_runs": [dict(w) for w in self.without_runs],
            "candidates": [dict(c) for c in self.candidates],
            "reasons": list(self.reasons),
        }
        if self.also:
            d["also"] = list(self.also)
            d["pareto"] = [dict(p) for p in (self.pareto or [])]
            d["responses"] = {k: dict(v) for k, v in self.responses.items()}
        return d


def _as_list(x) -> list[str]:
    if x is None:
        return []
    if isinstance(x, str):
        return [s.strip() for s in x.split(",") if s.strip()]
    return [str(s) for s in x]


def _pct(ratio: float) -> str:
    return f"{(ratio - 1) * 100:.1f}%"


def _describe(setting: Mapping) -> str:
    return ", ".join(f"{k}={v}" for k, v in setting.items()) or "(all runs)"


def choose(data, response: str | None = "wall_s", factors=None, across=None, also=None,
           confidence: float | None = 0.95, prefer: Mapping | None = None, better=None,
           scale: str = "auto", residual: str = "auto", block=None) -> Choice:
    """Choose a default setting from a runs table.

    ``data``: a DataFrame, a CSV path or a results folder. ``factors``: the
    factor columns (default: the experiment's factors); the control factors
    are those not in ``across``. ``across`` may also name non-factor columns
    (e.g. ``host``). ``also``: further responses for the Pareto front.
    ``prefer``: mapping factor -> level of the current default. ``better``:
    ``lower``/``higher`` for ``response`` or a mapping response -> direction
    (default: the experiment's ``metrics:`` section, else lower).
    Settings from the experiment's ``choose:`` section fill whatever is not
    given here: ``across``/``also`` left as None come from the section (an
    empty list means none); pass ``response=None`` / ``confidence=None`` to
    take those from the section too (else ``wall_s`` and 0.95). ``prefer`` is
    merged over the section's. ``block``: None/"auto" fits the default block
    term (``block`` for ``order: blocked`` experiments, ``host`` when the runs
    span several hosts), a column name fits that one, False fits none.
    """
    from benchharness.choose.config import choose_settings, load_source, metric_directions
    from benchharness.choose.mcb import mcb
    from benchharness.choose.model import fit_response, level_orders
    from benchharness.choose.pareto import pareto_front
    from benchharness.choose.prefer import preference_rank, resolve_prefer
    from benchharness.choose.robust import robust_choice

    factors_list = _as_list(factors) or None
    df, experiment = load_source(data, factors_list)
    section = choose_settings(experiment)
    if response is None:
        response = section.get("response", "wall_s")
    if confidence is None:
        confidence = section.get("confidence", 0.95)
    try:
        confidence = float(confidence)
    except (TypeError, ValueError):
        raise UsageError(f"confidence must be a number between 0 and 1, not {confidence!r}")
    if not 0 < confidence < 1:
        raise UsageError(f"confidence must be between 0 and 1 (e.g. 0.95), not {confidence}")
    across = _as_list(section.get("across") if across is None else across)
    also = _as_list(section.get("also") if also is None else also)
    prefer = {**section.get("prefer", {}), **{str(k): str(v) for k, v in (prefer or {}).items()}}
    if factors_list is None:
        if experiment is not None:
            factors_list = list(experiment.factor_names)
        else:
            raise UsageError("name the factors (factors=... / --factors A,B) for a table "
                             "without an experiment file")
    for c in factors_list + across:
        if c not in df.columns:
            raise DataError(f"column {c!r} is not in the table")
    control = [f for f in factors_list if f not in across]
    if not control:
        raise UsageError("every factor is in --across; nothing is left to choose")
    also = [a for a in also if a != response]

    directions = metric_directions(experiment)
    if isinstance(better, Mapping):
        directions.update({str(k): str(v) for k, v in better.items()})
    elif better is not None:
        directions[response] = str(better)

    block = _block_column(block, df, experiment, factors_list, across, response)

    orders = level_orders(df[df["status"].astype(str) == "ok"] if "status" in df.columns else df,
                          control + across, experiment)

    def fit(resp):
        return fit_response(df, resp, control, across, better=directions.get(resp, "lower"),
                            scale=scale if resp == response else "auto", orders=orders,
                            residual=residual, block=block)

    main = fit(response)
    settings = main.settings
    k = len(settings)
    names = tuple(control)

    def as_map(s):
        return dict(zip(names, s))

    default, declared = resolve_prefer(prefer, names, orders)
    g = main.goodness
    rank = preference_rank(settings, names, default, declared, g)

    res = mcb(g, main.weights, main.sigma, main.df, confidence)
    tied_idx = [i for i in range(k) if res.tied[i]]
    tied_idx.sort(key=lambda i: rank[i])
    best_i = tied_idx[0]
    top_i = int(np.argmax(g))

    rob = robust_choice(main.cell_goodness, rank)
    is_log = main.scale == "log"

    def ratio(x):
        return float(np.exp(x)) if is_log else None

    def env_map(e):
        return dict(zip(main.across, main.environments[e]))

    # Pareto front over several responses
    pareto_idx = None
    dominated_by = [None] * k
    responses_info: dict = {}
    if also:
        models = [main]
        for a in also:
            m = fit(a)
            if m.settings != settings:
                raise DataError(f"{a!r} is missing for some settings that have {response!r}")
            models.append(m)
        par = pareto_front(models, confidence)
        pareto_idx = list(par.front)
        dominated_by = list(par.dominated_by)
        for m, q in zip(models, par.allowance):
            responses_info[m.response] = {
                "better": m.better, "scale": m.scale, "sigma": m.sigma, "df": m.df,
                "residual_model": m.residual_model, "allowance": q,
                "means": [float(x) for x in m.to_response_units(m.setting_means)],
            }

    means_units = main.to_response_units(main.setting_means)
    candidates = []
    for i, s in enumerate(settings):
        # loss vs the best of the others (+0.0 turns -0.0 into 0.0)
        loss_low, loss_high = -res.high[i] + 0.0, -res.low[i] + 0.0
        worst_case = ratio(loss_high) if is_log else loss_high
        c = {
            "setting": as_map(s),
            "mean": float(means_units[i]),
            "runs": int(main.cell_counts[i].sum()),
            "tied": bool(res.tied[i]),
            "recommended": i == best_i,
            "loss_vs_best_of_others": {"low": float(loss_low), "high": float(loss_high)},
            "ratio_vs_best_of_others": ({"low": ratio(loss_low), "high": ratio(loss_high)}
                                        if is_log else None),
            "worst_case_loss": float(worst_case),
            "worst_ratio": ratio(rob.worst_loss[i]),
            "worst_loss": float(rob.worst_loss[i]),
            "worst_environment": env_map(int(rob.worst_env[i])),
            "mean_ratio": ratio(rob.mean_loss[i]),
            "mean_loss": float(rob.mean_loss[i]),
            "preference_rank": int(rank[i]),
        }
        if also:
            c["on_front"] = i in pareto_idx
            c["dominated_by"] = None if dominated_by[i] is None else as_map(settings[dominated_by[i]])
        c["reason"] = _candidate_reason(i, c, res, best_i, top_i, default, declared, names,
                                        is_log, confidence, settings, dominated_by, bool(also))
        candidates.append(c)

    robust = {"setting": as_map(settings[rob.robust]), "worst_ratio": ratio(rob.worst_loss[rob.robust]),
              "worst_loss": float(rob.worst_loss[rob.robust]),
              "worst_environment": env_map(int(rob.worst_env[rob.robust]))}
    on_average = {"setting": as_map(settings[rob.on_average]),
                  "mean_ratio": ratio(rob.mean_loss[rob.on_average]),
                  "mean_loss": float(rob.mean_loss[rob.on_average])}
    disagreement = None
    if rob.separating_env is not None:
        e = rob.separating_env
        a, r = rob.on_average, rob.robust
        disagreement = {
            "environment": env_map(e),
            "on_average_ratio": ratio(rob.loss[a, e]), "robust_ratio": ratio(rob.loss[r, e]),
            "on_average_loss": float(rob.loss[a, e]), "robust_loss": float(rob.loss[r, e]),
        }

    reasons = _top_reasons(main, res, best_i, top_i, tied_idx, settings, as_map, rob,
                           disagreement, pareto_idx, also, is_log, confidence, default, declared)

    return Choice(
        response=response, better=main.better, scale=main.scale, confidence=confidence,
        control=names, across=tuple(main.across), best=as_map(settings[best_i]),
        estimated_best=as_map(settings[top_i]), tied=[as_map(settings[i]) for i in tied_idx],
        robust=robust, on_average=on_average, disagreement=disagreement,
        candidates=candidates,
        residual={"model": main.residual_model, "block": main.block, "sigma": main.sigma,
                  "df": main.df, "critical": list(res.critical)},
        prefer=dict(default), also=tuple(also),
        pareto=None if pareto_idx is None else [as_map(settings[i]) for i in pareto_idx],
        responses=responses_info, reasons=reasons, runs_used=main.n_runs,
        runs_dropped=main.dropped_runs,
        without_runs=[as_map(w) for w in main.without_runs],
    )


def _block_column(block, df, experiment, factors, across, response):
    """The block column to fit, following the analysis's default (see model.py)."""
    if block is False or block == "":
        return None
    taken = set(factors) | set(across) | {response}
    if block is None or block == "auto":
        ok = df[df["status"].astype(str) == "ok"] if "status" in df.columns else df
        if getattr(experiment, "order", None) == "blocked" and "block" in df.columns \
                and "block" not in taken:
            return "block"
        if "host" in df.columns and "host" not in taken and ok["host"].nunique() > 1:
            return "host"
        return None
    block = str(block)
    if block not in df.columns:
        raise DataError(f"no block column {block!r} in the table")
    if block in taken:
        raise UsageError(f"{block!r} cannot be both the block and a factor, an --across "
                         "column or the response")
    return block


def _loss_words(x: float, is_log: bool) -> str:
    return _pct(float(np.exp(x))) if is_log else f"{x:.4g}"


def _candidate_reason(i, c, res, best_i, top_i, default, declared, names, is_log, confidence,
                      settings, dominated_by, with_also) -> str:
    conf = f"{confidence * 100:g}%"
    hi = c["loss_vs_best_of_others"]["high"]
    lo = c["loss_vs_best_of_others"]["low"]
    parts = []
    if i == best_i:
        if i == top_i:
            parts.append("recommended: the best estimate")
        else:
            top = _describe(dict(zip(names, settings[top_i])))
            parts.append(f"recommended: tied with the best estimate ({top}) and closer to "
                         "the default")
        if all(v == default[f] for f, v in zip(names, settings[i])):
            parts.append("it is the current default")
    if res.tied[i]:
        if lo >= 0 and hi <= 0:
            parts.append("as good as the best (the data show no difference at all)")
        elif lo < 0 and hi <= 0:
            parts.append(f"better than every other setting ({conf} confidence), by at most "
                         f"{_loss_words(-lo, is_log)}")
        elif hi <= 0:
            parts.append("better than every other setting")
        else:
            parts.append(f"not shown worse than the best: at most {_loss_words(hi, is_log)} "
                         f"worse ({conf} confidence)")
    else:
        parts.append(f"shown worse than the best ({conf} confidence): by at most "
                     f"{_loss_words(hi, is_log)}")
    if with_also:
        d = dominated_by[i]
        if d is None:
            parts.append("on the trade-off front")
        else:
            parts.append("off the trade-off front (beaten on every response by "
                         + _describe(dict(zip(names, settings[d]))) + ")")
    return "; ".join(parts)


def _top_reasons(main, res, best_i, top_i, tied_idx, settings, as_map, rob, disagreement,
                 pareto_idx, also, is_log, confidence, default, declared) -> list[str]:
    conf = f"{confidence * 100:g}%"
    out = []
    best = _describe(as_map(settings[best_i]))
    n_t = len(tied_idx)
    if n_t == 1:
        out.append(f"{best} is better than every other setting at {conf} confidence.")
    else:
        why = ("it is the best estimate" if best_i == top_i
               else "the data cannot tell it from the best estimate "
                    f"({_describe(as_map(settings[top_i]))}) and it stays closest to the default")
        out.append(f"{n_t} settings cannot be told apart from the best at {conf} confidence; "
                   f"recommending {best} because {why}.")
    if main.across:
        across_words = " and ".join(main.across)
        r = _describe(as_map(settings[rob.robust]))
        a = _describe(as_map(settings[rob.on_average]))
        wr = _loss_words(rob.worst_loss[rob.robust], is_log)
        if disagreement is None and rob.worst_loss[rob.robust] <= 1e-12:
            out.append(f"Across {across_words}, {r} has the best estimate in every "
                       "environment.")
        elif disagreement is None:
            out.append(f"Across {across_words}, {r} is both the safest choice "
                       f"(never more than {wr} worse than the best of an environment) and the "
                       "best on average.")
        else:
            env = _describe(disagreement["environment"])
            there = (f"{r} is the best there" if disagreement["robust_loss"] <= 1e-12 else
                     f"{r}: {_loss_words(disagreement['robust_loss'], is_log)} worse there")
            out.append(
                f"Across {across_words}, {r} is the safest choice (never more than "
                f"{wr} worse than the best of an environment), while {a} is best on average "
                f"but {_loss_words(disagreement['on_average_loss'], is_log)} worse than the "
                f"best where {env} ({there}).")
    if main.across and best_i not in (rob.robust, rob.on_average):
        e = int(rob.worst_env[best_i])
        env = _describe(dict(zip(main.across, main.environments[e])))
        safe = _describe(as_map(settings[rob.robust]))
        safe_words = (f"{safe} is the best in every environment"
                      if rob.worst_loss[rob.robust] <= 1e-12 else
                      f"{safe} never loses more than "
                      f"{_loss_words(rob.worst_loss[rob.robust], is_log)}")
        out.append(f"Mind that {best} is {_loss_words(rob.worst_loss[best_i], is_log)} worse "
                   f"than the best where {env}; {safe_words}.")
    if also and pareto_idx is not None:
        if len(pareto_idx) == len(settings):
            out.append(f"Trading {main.response} against {', '.join(also)}: all "
                       f"{len(settings)} settings are on the front; none is beaten on every "
                       f"response at {conf} confidence.")
        else:
            out.append(f"Trading {main.response} against {', '.join(also)}: {len(pareto_idx)} "
                       f"of {len(settings)} settings are on the front; the others are beaten on "
                       f"every response at {conf} confidence.")
    return out


def choice_section(folder_or_choice, **kwargs) -> dict:
    """The choice as a report section (plain dict; see docs/choose.md).

    Given a `Choice`, renders it; given a results folder (or any source), runs
    `choose` with the experiment's ``choose:`` section and ``kwargs``.
    """
    from benchharness.choose.render import section_dict

    choice = folder_or_choice if isinstance(folder_or_choice, Choice) else choose(
        folder_or_choice, **kwargs)
    return section_dict(choice)
