"""Choosing a default with statistical backing: best or tied, robust, trade-offs.

`choose` answers "which setting should ship as the default?" from a runs
table. It combines:

* `model` -- per-setting means on the analysis scale and the pooled noise;
* `mcb` -- Hsu's constrained multiple comparisons with the best (Hsu 1981,
  1984): the settings not shown worse than the best;
* `prefer` -- ties broken toward the declared default, else the better estimate;
* `robust` -- minimax regret across the ``across`` conditions (Savage 1951)
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
    #: why the runs not used were left out: {failed, no_value, warmup, unavailable} counts
    runs_left_out: dict = field(default_factory=dict)
    #: settings that were run but have no ok run with a value of the response
    without_runs: list = field(default_factory=list)
    #: settings left out because the experiment excludes them in some condition (choose.space)
    unavailable: list = field(default_factory=list)
    #: the role of every factor and where it came from (`benchharness.experiment.roles.Roles.to_dict`)
    roles: dict = field(default_factory=dict)
    #: the declared default (``prefer``), only the factors actually declared
    declared_default: dict = field(default_factory=dict)
    #: the practical margin of the trade-off front (with ``also``), a fraction
    within: float | None = None
    #: one entry per limit: what it asks, how it was judged, which settings meet it
    limits: list = field(default_factory=list)
    #: which scale the choice was made on, and why (the analysis's scale for this response)
    scale_reason: str = ""
    #: a response surface's proposal between the tested levels (`benchharness.choose.surface`)
    surface: dict | None = None

    def to_dict(self) -> dict:
        d = {
            "response": self.response,
            "better": self.better,
            "scale": self.scale,
            "scale_reason": self.scale_reason,
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
            "runs_left_out": dict(self.runs_left_out),
            "without_runs": [dict(w) for w in self.without_runs],
            "unavailable": [dict(u) for u in self.unavailable],
            "roles": dict(self.roles),
            "declared_default": dict(self.declared_default),
            "limits": [dict(x) for x in self.limits],
            "candidates": [dict(c) for c in self.candidates],
            "reasons": list(self.reasons),
        }
        if self.surface is not None:
            d["surface"] = dict(self.surface)
        if self.also:
            d["also"] = list(self.also)
            d["pareto"] = [dict(p) for p in (self.pareto or [])]
            d["responses"] = {k: dict(v) for k, v in self.responses.items()}
            d["within"] = self.within
        return d


#: The practical margin of the trade-off front when none is given (`--within`).
DEFAULT_WITHIN = 0.03


def _within(x) -> float:
    """A margin from 0.03, "3%" or "0.03"; `UsageError` when it is not one."""
    if isinstance(x, str):
        from benchharness.experiment.yamlnodes import parse_percent

        v = parse_percent(x)
    else:
        try:
            v = float(x)
        except (TypeError, ValueError):
            v = None
    if v is None or not np.isfinite(v) or not 0 <= v < 1:
        raise UsageError(f"--within {x!r}: give a margin such as 3% (at least 0%, under 100%)")
    return float(v)


def _limit_list(x) -> list:
    from benchharness.choose.limits import Limit, parse_limit

    if isinstance(x, (str, Limit)):
        x = [x]
    return [v if isinstance(v, Limit) else parse_limit(str(v)) for v in x]


def _resolve_roles(roles, experiment, df, factors, across_given):
    """The roles to use: given here, else declared in the file, else guessed."""
    from benchharness.experiment.roles import Roles, factor_roles

    if isinstance(roles, Roles):
        return roles
    if roles is not None:
        return _roles_given(roles, experiment, factors)
    levels = None
    if experiment is None:
        levels = _table_levels(df, factors)
    return factor_roles(experiment, factors=factors, levels=levels, exclude=across_given)


def _roles_given(roles, experiment, factors):
    """Roles given in the call (role -> factors) over those the file declares; a factor
    named nowhere is a setting."""
    from benchharness.experiment.roles import ROLES, Roles

    if not isinstance(roles, Mapping):
        raise UsageError("roles must map a role (setting, workload, environment) to "
                         "factor names")
    from benchharness.experiment.roles import declared_roles

    base = declared_roles(experiment)
    role = {}
    if base is not None:
        for r in ROLES:
            role.update({f: r for f in getattr(base, r)})
    role.update(_role_of_each(roles, factors))
    return Roles(setting=tuple(f for f in factors if role.get(f, "setting") == "setting"),
                 workload=tuple(f for f in factors if role.get(f) == "workload"),
                 environment=tuple(f for f in factors if role.get(f) == "environment"),
                 source="command line")


def _role_of_each(roles, factors) -> dict:
    """Factor -> role from a mapping role -> factors; `UsageError` for an unknown role, a
    name that is not a factor, or a factor given two roles."""
    from benchharness.experiment.roles import ROLES

    given: dict = {}
    for r, fs in roles.items():
        if r not in ROLES:
            raise UsageError(f"unknown role {r!r}; roles are {', '.join(ROLES)}")
        for f in _as_list(fs):
            if f not in factors:
                raise UsageError(f"roles: {f!r} is not a factor (factors: "
                                 f"{', '.join(factors)})")
            if f in given and given[f] != r:
                raise UsageError(f"{f!r} is given two roles ({given[f]} and {r}); give "
                                 "each factor one role")
            given[f] = r
    return given


def _table_levels(df, factors) -> dict:
    """Each factor's levels as text, in the table's order (a categorical's own order)."""
    import pandas as pd

    levels = {}
    for f in factors:
        col = df[f]
        levels[f] = ([str(c) for c in col.cat.categories]
                     if isinstance(col.dtype, pd.CategoricalDtype)
                     else [str(v) for v in pd.unique(col.astype(str))])
    return levels


def _half_widths(m, confidence):
    """Half-width of each setting's own interval (analysis scale), for the figure."""
    from scipy.stats import t

    q = float(t.ppf(0.5 + confidence / 2, m.df)) if np.isfinite(m.df) else 1.96
    return q * m.sigma * np.sqrt(m.weights)


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
           scale: str = "auto", residual: str = "auto", block=None, roles=None,
           within=None, limits=None) -> Choice:
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
    take those from the section too (the response: else the file's top-level
    ``response:``, else ``wall_s``; the confidence else 0.95). ``prefer`` is
    merged over the section's. ``block``: None/"auto" fits the default block
    term (``block`` for ``order: blocked`` experiments, ``host`` when the runs
    span several hosts), a column name fits that one, False fits none.

    ``roles``: a `benchharness.experiment.roles.Roles` or a mapping role -> factors
    (``{"workload": ["size"]}``; unnamed factors are settings) overriding the
    experiment's ``roles:`` section. Only settings are chosen; workloads and
    environments join ``across``. With no roles declared anywhere, factors
    that look like inputs are treated as workloads (`benchharness.experiment.roles`),
    and the reasons say so. ``within``: the practical margin of the
    trade-off front (a fraction, 0.03, or text, "3%"; default 3%).
    ``limits``: constraints such as ``"max_rss_kib within 5%"`` (see
    `benchharness.choose.limits`); only settings that meet them are chosen.
    """
    from benchharness.choose.config import choose_settings, load_source
    from benchharness.choose.model import level_orders, subset_settings
    from benchharness.choose.prefer import resolve_prefer

    factors_list = _as_list(factors) or None
    df, experiment = load_source(data, factors_list)
    ask = _asked(_with_file_response(choose_settings(experiment), experiment), response,
                 confidence, across, also, within,
                 limits, prefer)
    response, confidence = ask.response, ask.confidence
    factors_list, role_info, across, control = _factors_and_roles(
        df, experiment, factors_list, ask.across_given, roles)
    also = [a for a in ask.also if a != response]
    directions = _directions(experiment, better, response)
    block = _block_column(block, df, experiment, factors_list, across, response)
    orders = level_orders(df[df["status"].astype(str) == "ok"] if "status" in df.columns else df,
                          control + across, experiment)

    from benchharness.choose.space import drop_unavailable

    table = df
    df, unavailable = drop_unavailable(df, experiment, control, across, response)  # exclude:
    fits = _Fits(df, data, experiment, response, scale, control, across, directions, orders,
                 residual, block)
    full = fits.first()
    names = tuple(control)
    _check_prefer(ask.prefer, across, factors_list, role_info)
    default, declared = resolve_prefer(ask.prefer, names, orders)

    # the trade-off front (over every setting, before any limit), then the limits
    pareto_idx, dominated_by, responses_info = _front(fits, full, also, confidence, ask.within)
    limit_results, eligible = _eligible(fits, ask.limits, confidence, len(full.settings))
    main = full if len(eligible) == len(full.settings) else subset_settings(full, eligible)

    j = _judge(names, full, main, default, declared, confidence, eligible, dominated_by,
               pareto_idx, also, ask, limit_results)
    choice = _choice(j, ask, role_info, responses_info, fits.scale_reasons.get(response, ""))
    choice = _with_surface(choice, df, experiment)
    choice = _with_scaling(choice, df, experiment)
    choice = _with_left_out(choice, table, df, response)
    return _with_unavailable(choice, unavailable, len(_role_reasons(role_info, names,
                                                                     ask.across_given)))


def _with_left_out(choice: Choice, table, kept, response: str) -> Choice:
    """The choice counting every run of ``table`` it did not use, by why: failed or timed
    out, ok without a value, warm-up, or of a setting an exclusion kept out (``kept`` is
    the table without those)."""
    from dataclasses import replace

    from benchharness.choose.space import left_out_counts

    counts = left_out_counts(table, kept, response)
    return replace(choice, runs_left_out=counts,
                   runs_dropped=len(table) - choice.runs_used)


def _with_unavailable(choice: Choice, unavailable, after: int) -> Choice:
    """The choice with the settings an exclusion kept out (`choose.space`), said after the
    roles."""
    if not unavailable:
        return choice
    from dataclasses import replace

    from benchharness.choose.render import condition_word
    from benchharness.choose.space import unavailable_reasons

    reasons = list(choice.reasons)
    reasons[after:after] = unavailable_reasons(unavailable,
                                               condition_word(choice.across, choice.roles))
    return replace(choice, unavailable=list(unavailable), reasons=reasons)


def _with_surface(choice: Choice, df, experiment) -> Choice:
    """The choice with a response surface's proposal between the tested levels
    (`choose.surface`; unchanged when the design is not a response surface)."""
    from dataclasses import replace

    from benchharness.choose.surface import proposal

    surface = proposal(df, experiment, choice.response, choice.better, choice.scale,
                       choice.confidence, choice.control, choice.across, choice.best)
    return choice if surface is None else replace(choice, surface=surface)


def _with_scaling(choice: Choice, df, experiment) -> Choice:
    """The choice with what Amdahl's law says about a larger parallel setting, when the
    recommended one is the largest tested (`choose.scaling`)."""
    from dataclasses import replace

    from benchharness.choose.scaling import beyond_tested

    more = beyond_tested(df, experiment, choice.response, choice.better, choice.control,
                         choice.across, choice.best, choice.confidence)
    return choice if not more else replace(choice, reasons=list(choice.reasons) + more)


def _judge(names, full, main, default, declared, confidence, eligible, dominated_by,
           pareto_idx, also, ask, limit_results) -> "_Judgement":
    """Hsu's comparisons with the best among the eligible settings (ties going the way
    of the declared default) and the robust choice across the conditions."""
    from benchharness.choose.mcb import mcb, tie_confidence
    from benchharness.choose.prefer import preference_rank
    from benchharness.choose.robust import robust_choice

    rank = preference_rank(main.settings, names, default, declared, main.goodness)
    # the tie drawn as analyze draws it (`analysis.mcb.tie_confidence`): one tied set
    res = mcb(main.goodness, main.weights, main.sigma, main.df, tie_confidence(confidence))
    tied_idx = [i for i in range(len(main.settings)) if res.tied[i]]
    tied_idx.sort(key=lambda i: rank[i])
    best_i = tied_idx[0]
    top_i = int(np.argmax(main.goodness))
    return _Judgement(
        names=names, full=full, main=main, res=res, rob=robust_choice(main.cell_goodness, rank),
        rank=rank, best_i=best_i, top_i=top_i, tied_idx=tied_idx,
        eligible=eligible, dominated_by=dominated_by, pareto_idx=pareto_idx, also=also,
        limits=bool(ask.limits), limit_results=limit_results, default=default,
        declared=declared, confidence=confidence, within=ask.within)


def _choice(j: "_Judgement", ask: "_Asked", role_info, responses_info,
            scale_reason: str) -> Choice:
    """The `Choice`: the judgement put as candidates, summaries and reasons in words."""
    main, res, also, confidence = j.main, j.res, j.also, ask.confidence
    candidates = _candidates(j)
    robust, on_average, disagreement = _robust_summaries(j)
    reasons = _role_reasons(role_info, j.names, ask.across_given)
    reasons += _limit_reasons(j.limit_results, j.all_settings, j.eligible, j.as_map, confidence)
    from benchharness.choose.render import condition_word

    reasons += _top_reasons(main, res, j.best_i, j.top_i, j.tied_idx, j.settings, j.as_map,
                            j.rob, disagreement, j.pareto_idx, also, j.is_log, confidence,
                            j.default, j.declared, j.all_settings, ask.within,
                            unit=_unit(main.response),
                            noun=condition_word(main.across, role_info.to_dict()))
    return Choice(
        response=ask.response, better=main.better, scale=main.scale, confidence=confidence,
        control=j.names, across=tuple(main.across), best=j.as_map(j.settings[j.best_i]),
        estimated_best=j.as_map(j.settings[j.top_i]),
        tied=[j.as_map(j.settings[i]) for i in j.tied_idx],
        robust=robust, on_average=on_average, disagreement=disagreement,
        candidates=candidates,
        residual={"model": main.residual_model, "block": main.block, "sigma": main.sigma,
                  "df": main.df, "critical": list(res.critical)},
        prefer=dict(j.default), also=tuple(also),
        pareto=(None if j.pareto_idx is None
                else [j.as_map(j.all_settings[i]) for i in j.pareto_idx]),
        responses=responses_info, reasons=reasons, runs_used=j.full.n_runs,
        runs_dropped=j.full.dropped_runs,
        without_runs=[j.as_map(w) for w in j.full.without_runs],
        roles=role_info.to_dict(), declared_default={f: j.default[f] for f in j.names
                                                     if f in j.declared},
        within=ask.within if also else None,
        limits=[_limit_dict(lr, j.all_settings, j.as_map) for lr in j.limit_results],
        scale_reason=scale_reason,
    )


@dataclass(frozen=True)
class _Asked:
    """The options of one `choose` call, the experiment's ``choose:`` section filling
    whatever the call left out."""

    response: str
    confidence: float
    across_given: list
    also: list
    within: float
    limits: list
    prefer: dict


def _with_file_response(section, experiment) -> dict:
    """The ``choose:`` section with the experiment file's ``response:`` as the response
    when the section names none (precedence: the call, the section, the file, wall_s)."""
    if "response" in section or experiment is None:
        return section
    from benchharness.experiment.response import declared_response

    declared = declared_response(experiment)
    return section if declared is None else {**section, "response": declared}


def _asked(section, response, confidence, across, also, within, limits, prefer) -> _Asked:
    """The call's options over the section's; `UsageError` for a confidence that is not
    a number strictly between 0 and 1, a bad margin or a bad limit."""
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
    return _Asked(
        response=response, confidence=confidence,
        across_given=_as_list(section.get("across") if across is None else across),
        also=_as_list(section.get("also") if also is None else also),
        within=_within(section.get("within", DEFAULT_WITHIN) if within is None else within),
        limits=list(section.get("limits", []) if limits is None else _limit_list(limits)),
        prefer={**section.get("prefer", {}),
                **{str(k): str(v) for k, v in (prefer or {}).items()}})


def _factors_and_roles(df, experiment, factors_list, across_given, roles):
    """``(factors, roles, across, control)``: the factor columns, the role of each, the
    conditions the choice must hold up across, and the settings left to choose."""
    if factors_list is None:
        if experiment is not None:
            factors_list = list(experiment.factor_names)
        else:
            raise UsageError("name the factors (factors=... / --factors A,B) for a table "
                             "without an experiment file")
    for c in factors_list + across_given:
        if c not in df.columns:
            raise DataError(f"column {c!r} is not in the table")
    role_info = _resolve_roles(roles, experiment, df, factors_list, across_given)
    across = list(dict.fromkeys([f for f in factors_list if f in role_info.conditions]
                                + across_given))
    control = [f for f in factors_list if f not in across]
    if not control:
        _refuse_nothing_to_choose(role_info)
    return factors_list, role_info, across, control


def _refuse_nothing_to_choose(role_info) -> None:
    """`UsageError` when every factor is a condition; says how to declare settings when
    the roles were guessed."""
    if not role_info.declared and role_info.workload:
        raise UsageError(
            "every factor looks like an input or is in --across, so nothing is left to "
            f"choose ({'; '.join(f'{f}: {role_info.reasons[f]}' for f in role_info.workload)}"
            "); declare the settings, e.g. roles: {setting: ["
            + ", ".join(role_info.workload) + "]} or --setting "
            + ",".join(role_info.workload))
    raise UsageError("every factor is in --across or declared a workload or environment; "
                     "nothing is left to choose")


def _directions(experiment, better, response) -> dict:
    """Response -> "lower"/"higher": the ``metrics:`` section, overridden by ``better``."""
    from benchharness.choose.config import metric_directions

    directions = metric_directions(experiment)
    if isinstance(better, Mapping):
        directions.update({str(k): str(v) for k, v in better.items()})
    elif better is not None:
        directions[response] = str(better)
    return directions


class _Fits:
    """The fits of one choice: each response fitted once over the same settings, on the
    scale the folder's analysis recorded for it, else the same rule (`_scale_of`;
    choose.config.recorded_scale reads the same record)."""

    def __init__(self, df, data, experiment, response, scale, control, across, directions,
                 orders, residual, block):
        self.df, self.data, self.experiment = df, data, experiment
        self.response, self.scale = response, scale
        self.control, self.across, self.directions = control, across, directions
        self.orders, self.residual, self.block = orders, residual, block
        self.scale_reasons: dict[str, str] = {}
        self.fitted: dict = {}

    def fit(self, resp):
        from benchharness.choose.model import fit_response

        name, why = _scale_of(self.df, resp, self.scale if resp == self.response else "auto",
                              self.data, self.experiment)
        self.scale_reasons[resp] = why
        return fit_response(self.df, resp, self.control, self.across,
                            better=self.directions.get(resp, "lower"), scale=name,
                            orders=self.orders, residual=self.residual, block=self.block)

    def first(self):
        """The fit of the response chosen on."""
        self.fitted[self.response] = full = self.fit(self.response)
        return full

    def same(self, resp, what):
        """The fit of a further response (``what`` names why it is needed); `DataError`
        when it lacks some settings the main response has."""
        if resp not in self.fitted:
            m = self.fit(resp)
            if m.settings != self.fitted[self.response].settings:
                raise DataError(f"{resp!r} ({what}) is missing for some settings that have "
                                f"{self.response!r}")
            self.fitted[resp] = m
        return self.fitted[resp]


def _check_prefer(prefer, across, factors_list, role_info) -> None:
    """A declared default may name settings only."""
    for f in prefer:
        if f in across and f in factors_list:
            role = role_info.role_of(f) or "condition (--across)"
            raise UsageError(
                f"prefer names {f!r}, which is a {role}, not a setting: a default is chosen "
                f"among settings only; drop it from prefer, or declare it a setting "
                f"(roles: {{setting: [{f}]}} or --setting {f})")


def _front(fits, full, also, confidence, within):
    """``(front, dominated_by, responses)``: the confident trade-off front over the
    response and ``also`` (indices into every setting), which setting dominates each,
    and each response's fit in brief; ``(None, [None, ...], {})`` without ``also``."""
    from benchharness.choose.pareto import pareto_front

    if not also:
        return None, [None] * len(full.settings), {}
    models = [full] + [fits.same(a, "--also") for a in also]
    par = pareto_front(models, confidence, within=within)
    responses_info: dict = {}
    for m, q, mg in zip(models, par.allowance, par.margins):
        responses_info[m.response] = {
            "better": m.better, "scale": m.scale, "sigma": m.sigma, "df": m.df,
            "residual_model": m.residual_model, "allowance": q, "margin": mg,
            "means": [float(x) for x in m.to_response_units(m.setting_means)],
            "half_width": [float(x) for x in _half_widths(m, confidence)],
        }
    return list(par.front), list(par.dominated_by), responses_info


def _eligible(fits, limits, confidence, n_settings):
    """``(limit results, eligible indices)``: which settings the limits
    ("max_rss_kib within 5%") let be chosen at all."""
    if not limits:
        return [], list(range(n_settings))
    from benchharness.choose.limits import apply_limits

    limit_models = [fits.same(lim.response, "a limit") for lim in limits]
    return apply_limits(limits, limit_models, confidence)


@dataclass
class _Judgement:
    """What the comparisons found, for wording the candidates: ``full`` covers every
    setting, ``main`` the eligible ones (``eligible`` maps its indices to ``full``'s)."""

    names: tuple
    full: object
    main: object
    res: object
    rob: object
    rank: object
    best_i: int
    top_i: int
    tied_idx: list
    eligible: list
    dominated_by: list
    pareto_idx: list | None
    also: list
    limits: bool
    limit_results: list
    default: dict
    declared: object
    confidence: float
    within: float

    @property
    def settings(self):
        return self.main.settings

    @property
    def all_settings(self):
        return self.full.settings

    @property
    def is_log(self) -> bool:
        return self.main.scale == "log"

    def as_map(self, s) -> dict:
        return dict(zip(self.names, s))

    def ratio(self, x):
        return float(np.exp(x)) if self.is_log else None

    def env_map(self, e) -> dict:
        return dict(zip(self.main.across, self.main.environments[e]))


def _candidates(j: _Judgement) -> list:
    """One entry per setting run (in the fit's order): the eligible ones judged, the
    others marked outside the limits."""
    sub_dominated = [j.dominated_by[f] for f in j.eligible]
    means_full = j.full.to_response_units(j.full.setting_means)
    candidates: list = [None] * len(j.all_settings)
    for i, s in enumerate(j.settings):
        fi = j.eligible[i]
        candidates[fi] = _judged_candidate(j, i, s, float(means_full[fi]), sub_dominated)
    for fi, s in enumerate(j.all_settings):
        if candidates[fi] is None:
            candidates[fi] = _excluded_candidate(j, fi, s, float(means_full[fi]))
    return candidates


def _judged_candidate(j: _Judgement, i: int, s, mean: float, sub_dominated) -> dict:
    """An eligible setting: its loss against the best of the others, its worst and mean
    loss across the conditions, and the reason in words."""
    res, rob, ratio = j.res, j.rob, j.ratio
    fi = j.eligible[i]
    # loss vs the best of the others (+0.0 turns -0.0 into 0.0)
    loss_low, loss_high = -res.high[i] + 0.0, -res.low[i] + 0.0
    worst_case = ratio(loss_high) if j.is_log else loss_high
    c = {
        "setting": j.as_map(s),
        "mean": mean,
        "runs": int(j.main.cell_counts[i].sum()),
        "tied": bool(res.tied[i]),
        "recommended": i == j.best_i,
        "loss_vs_best_of_others": {"low": float(loss_low), "high": float(loss_high)},
        "ratio_vs_best_of_others": ({"low": ratio(loss_low), "high": ratio(loss_high)}
                                    if j.is_log else None),
        "worst_case_loss": float(worst_case),
        "worst_ratio": ratio(rob.worst_loss[i]),
        "worst_loss": float(rob.worst_loss[i]),
        "worst_environment": j.env_map(int(rob.worst_env[i])),
        "mean_ratio": ratio(rob.mean_loss[i]),
        "mean_loss": float(rob.mean_loss[i]),
        "preference_rank": int(j.rank[i]),
    }
    if j.limits:
        c["within_limits"] = True
    _front_fields(j, c, fi)
    c["reason"] = _candidate_reason(i, c, res, j.best_i, j.top_i, j.default, j.declared,
                                    j.names, j.is_log, j.confidence, j.settings, sub_dominated,
                                    j.all_settings, bool(j.also), j.within,
                                    unit=_unit(j.main.response))
    return c


def _excluded_candidate(j: _Judgement, fi: int, s, mean: float) -> dict:
    """A setting outside the limits: which limits it misses."""
    over = [lr for lr in j.limit_results if not lr["meets"][fi]]
    c = {"setting": j.as_map(s), "mean": mean,
         "runs": int(j.full.cell_counts[fi].sum()), "tied": False, "recommended": False,
         "loss_vs_best_of_others": None, "ratio_vs_best_of_others": None,
         "worst_case_loss": None, "worst_ratio": None, "worst_loss": None,
         "worst_environment": None, "mean_ratio": None, "mean_loss": None,
         "preference_rank": None, "within_limits": False}
    _front_fields(j, c, fi)
    c["reason"] = "outside the limits: " + "; ".join(
        _limit_miss_words(lr, fi, j.confidence) for lr in over)
    return c


def _front_fields(j: _Judgement, c: dict, fi: int) -> None:
    """With ``also``: whether setting ``fi`` is on the trade-off front, and what beats it."""
    if j.also:
        c["on_front"] = fi in j.pareto_idx
        c["dominated_by"] = (None if j.dominated_by[fi] is None
                             else j.as_map(j.all_settings[j.dominated_by[fi]]))


def _robust_summaries(j: _Judgement):
    """``(robust, on_average, disagreement)``: the minimax-regret setting, the best on
    average, and the condition that separates them (None when they agree)."""
    rob, ratio, settings = j.rob, j.ratio, j.settings
    robust = {"setting": j.as_map(settings[rob.robust]),
              "worst_ratio": ratio(rob.worst_loss[rob.robust]),
              "worst_loss": float(rob.worst_loss[rob.robust]),
              "worst_environment": j.env_map(int(rob.worst_env[rob.robust]))}
    on_average = {"setting": j.as_map(settings[rob.on_average]),
                  "mean_ratio": ratio(rob.mean_loss[rob.on_average]),
                  "mean_loss": float(rob.mean_loss[rob.on_average])}
    disagreement = None
    if rob.separating_env is not None:
        e = rob.separating_env
        a, r = rob.on_average, rob.robust
        disagreement = {
            "environment": j.env_map(e),
            "on_average_ratio": ratio(rob.loss[a, e]), "robust_ratio": ratio(rob.loss[r, e]),
            "on_average_loss": float(rob.loss[a, e]), "robust_loss": float(rob.loss[r, e]),
        }
    return robust, on_average, disagreement


def _scale_of(df, resp, requested, data, experiment) -> tuple[str, str]:
    """("log" | "none", why): the scale the analysis records or its rule (one scale per response)."""
    from pathlib import Path

    import pandas as pd

    from benchharness.analysis.transform import scale_for, scale_words

    if requested != "auto":
        return requested, f"{scale_words(requested)}, as requested"
    if resp not in df.columns:
        return "auto", ""  # fit_response names the missing column
    ok = df["status"].astype(str) == "ok" if "status" in df.columns else slice(None)
    values = pd.to_numeric(df.loc[ok, resp], errors="coerce").to_numpy(dtype=float)
    from benchharness.results.journal import Results

    if isinstance(data, Results):   # a folder already read
        data = data.path
    folder = data if isinstance(data, (str, Path)) and Path(data).is_dir() else None
    name, lam, why = scale_for(resp, values, folder, experiment)
    if name == "boxcox":
        return "none", (f"the original scale: analysis.json records a Box-Cox scale (λ = {lam:g}) "
                        "for it, and losses are stated in the response's own units there")
    return name, why


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


def _loss_words(x: float, is_log: bool, unit: str = "") -> str:
    """A loss against the best: a percentage on the log scale, else a difference with the
    response's unit (`benchharness.numbers`)."""
    from benchharness.numbers import fmt_quantity

    return _pct(float(np.exp(x))) if is_log else fmt_quantity(x, unit)


def _unit(response: str) -> str:
    from benchharness.report.units import unit_of

    return unit_of(response)


def _candidate_reason(i, c, res, best_i, top_i, default, declared, names, is_log, confidence,
                      settings, dominated_by, all_settings, with_also, within, unit: str = "") -> str:
    """Why a setting stands where it does: recommended or not, its comparison with the
    best (Hsu's intervals), and its place on the trade-off front."""
    parts = []
    if i == best_i:
        parts += _recommended_words(i, top_i, default, declared, names, settings)
    if len(settings) == 1 < len(all_settings):
        parts.append("the only setting that meets every limit, so nothing is compared with it")
    else:
        parts.append(_comparison_words(i, c, res, is_log, confidence, unit,
                                       limited=len(settings) < len(all_settings)))
    if with_also:
        parts.append(_front_words(dominated_by[i], names, all_settings, within))
    return "; ".join(parts)


def _recommended_words(i, top_i, default, declared, names, settings) -> list[str]:
    """Why the recommended setting was picked, and whether it keeps the declared default."""
    parts = []
    if i == top_i:
        parts.append("recommended: the best estimate")
    else:
        top = _describe(dict(zip(names, settings[top_i])))
        parts.append(f"recommended: tied with the best estimate ({top}) and "
                     + ("closer to the declared default" if declared
                        else "first in the listed order of levels"))
    keeps = declared and all(v == default[f] for f, v in zip(names, settings[i])
                             if f in declared)
    if keeps and set(declared) == set(names):
        parts.append("it is the current default")
    elif keeps:
        parts.append("it keeps the declared default ("
                     + ", ".join(f"{f}={default[f]}" for f in names if f in declared) + ")")
    return parts


def _comparison_words(i, c, res, is_log, confidence, unit, limited: bool = False) -> str:
    """The setting against the best of the others, from its constrained interval; with
    ``limited``, the others are only the settings that meet every limit."""
    conf = f"{confidence * 100:g}%"
    others = "every other setting that meets the limits" if limited else "every other setting"
    hi = c["loss_vs_best_of_others"]["high"]
    lo = c["loss_vs_best_of_others"]["low"]
    if not res.tied[i]:
        return (f"shown worse than the best ({conf} confidence): by at most "
                f"{_loss_words(hi, is_log, unit)}")
    if lo >= 0 and hi <= 0:
        return "as good as the best (the data show no difference at all)"
    if lo < 0 and hi <= 0:
        return (f"better than {others} ({conf} confidence), by at most "
                f"{_loss_words(-lo, is_log, unit)}")
    if hi <= 0:
        return f"better than {others}"
    return (f"not shown worse than the best: at most {_loss_words(hi, is_log, unit)} "
            f"worse ({conf} confidence)")


def _front_words(d, names, all_settings, within) -> str:
    """On the trade-off front, or which setting ``d`` keeps it off."""
    if d is None:
        return "on the trade-off front"
    margin = f" by more than {within * 100:g}%" if within else ""
    return ("off the trade-off front ("
            + _describe(dict(zip(names, all_settings[d])))
            + f" is better on at least one response{margin} and not worse on any"
            + (f" beyond {within * 100:g}%" if within else "") + ")")


def _role_reasons(roles, names, across_given) -> list[str]:
    """What was chosen among and what was held as a condition, and on whose word."""
    chosen = ", ".join(names)
    if roles.declared:
        return _declared_roles_reason(roles, chosen)
    across_factors = [a for a in across_given
                      if a not in names and a not in ("host", "worker", "block", "replicate")]
    held = (f"; {', '.join(across_factors)} held as "
            f"{'a condition' if len(across_factors) == 1 else 'conditions'} through --across"
            if across_factors else "")
    parts = []
    if roles.workload:
        parts.append(f"workload: [{', '.join(roles.workload)}]")
    if across_factors:
        parts.append(f"environment: [{', '.join(across_factors)}]")
    declaration = ("roles: {" + ", ".join(parts) + "}" if parts
                   else "roles: {workload: [...], environment: [...]}")
    if roles.workload:
        why = "; ".join(f"{f} ({roles.reasons[f]})" for f in roles.workload)
        return [
            f"No roles are declared, so factors that look like inputs are treated as "
            f"workloads and never recommended: {why}. Treated as settings: {chosen} (nothing "
            f"marks them as inputs){held}. To be sure, declare them in the experiment file: "
            f"{declaration} (for a CSV: --workload {','.join(roles.workload)})."]
    n_set = len(list(names))
    from benchharness.experiment.roles import surface_guess

    if surface_guess(roles):
        return [f"No roles are declared: {chosen} treated as settings, since a response "
                f"surface proposes values for all of its settings{held}."]
    return [f"No roles are declared: {chosen} treated as "
            f"{'a setting' if n_set == 1 else 'settings'}, since nothing marks "
            f"{'it as an input' if n_set == 1 else 'them as inputs'}{held}. If some factors are inputs or machines, declare them in "
            f"the experiment file: {declaration}."]


def _declared_roles_reason(roles, chosen: str) -> list[str]:
    """The declared roles in one sentence: the settings chosen among, and the workloads
    and environments held as conditions (none when nothing is held)."""
    held = [f for r in ("workload", "environment") for f in getattr(roles, r)]
    conds = [f"{r}{'s' if len(getattr(roles, r)) > 1 else ''} "
             f"{', '.join(getattr(roles, r))}" for r in ("workload", "environment")
             if getattr(roles, r)]
    if not conds:
        return []
    where = "the experiment file" if roles.source == "experiment file" else "the command line"
    are = "are conditions" if len(held) > 1 else "is a condition"
    return [f"Roles from {where}: choosing among the settings {chosen}; the "
            + " and ".join(conds) + f" {are} the choice must hold up across."]


def _limit_miss_words(lr, fi, confidence) -> str:
    log = lr["scale"] == "log"
    if lr["confident"]:
        amount = (_pct(lr["worst_ratio"][fi]) if log
                  else _loss_words(lr["worst_excess"][fi], False, _unit(lr["response"])))
        how = f"may be up to {amount} worse than the best ({confidence * 100:g}% confidence)"
    else:
        amount = _pct(lr["estimate_ratio"][fi]) if log else "more than the limit"
        how = f"is estimated {amount} worse than the best"
    return f"{lr['response']} {how}; the limit is {lr['within'] * 100:g}%"


def _limit_dict(lr, all_settings, as_map) -> dict:
    """A limit result for the JSON: per setting, what bounds it and whether it meets it."""
    log = lr["scale"] == "log"
    rows = []
    for i, s in enumerate(all_settings):
        rows.append({"setting": as_map(s), "meets": lr["meets"][i],
                     "worst_ratio": lr["worst_ratio"][i] if log else None,
                     "worst_excess": None if log else lr["worst_excess"][i],
                     "estimate_ratio": lr["estimate_ratio"][i] if log else None})
    return {"text": lr["text"], "response": lr["response"], "within": lr["within"],
            "better": lr["better"], "scale": lr["scale"], "confident": lr["confident"],
            "best": as_map(all_settings[lr["best"]]),
            "met_by": [r["setting"] for r in rows if r["meets"]], "settings": rows}


def _limit_reasons(limit_results, all_settings, eligible, as_map, confidence) -> list[str]:
    out = []
    for lr in limit_results:
        n_meet = sum(bool(x) for x in lr["meets"])
        how = ("shown within it" if lr["confident"] else
               "within it by the estimates only (the data cannot show any setting within it "
               f"at {confidence * 100:g}% confidence)")
        out.append(f"Limit {lr['text']!r}: {n_meet} of {len(all_settings)} settings are {how}"
                   f"; the best on {lr['response']} is {_describe(as_map(all_settings[lr['best']]))}.")
    if limit_results and len(eligible) < len(all_settings):
        from benchharness.numbers import plural

        out.append(f"Choosing among the {plural(len(eligible), 'setting')} that "
                   f"{'meets' if len(eligible) == 1 else 'meet'} every limit.")
    return out


def _top_reasons(main, res, best_i, top_i, tied_idx, settings, as_map, rob, disagreement,
                 pareto_idx, also, is_log, confidence, default, declared, all_settings,
                 within, unit: str = "", noun: str = "condition") -> list[str]:
    """The reasons for the pick; ``noun`` names one combination of the ``across`` columns
    (`render.condition_word`: workload, environment or condition)."""
    from benchharness.choose.render import article

    conf = f"{confidence * 100:g}%"
    one = f"{article(noun)} {noun}"
    out = []
    best = _describe(as_map(settings[best_i]))
    n_t = len(tied_idx)
    limited = len(settings) < len(all_settings)
    if len(settings) == 1 and limited:
        out.append(f"{best} is the only setting that meets every limit: it is not compared "
                   "with the others on this response.")
    elif n_t == 1:
        others = "every other setting that meets the limits" if limited else "every other setting"
        out.append(f"{best} is better than {others} at {conf} confidence.")
    else:
        why = ("it is the best estimate" if best_i == top_i
               else "the data cannot tell it from the best estimate "
                    f"({_describe(as_map(settings[top_i]))}) and "
                    + ("it stays closest to the declared default" if declared
                       else "it comes first in the listed order of levels (no default is "
                            "declared)"))
        out.append(f"{n_t} settings cannot be told apart from the best at {conf} confidence; "
                   f"recommending {best} because {why}.")
    if main.across:
        across_words = " and ".join(main.across)
        r = _describe(as_map(settings[rob.robust]))
        a = _describe(as_map(settings[rob.on_average]))
        wr = _loss_words(rob.worst_loss[rob.robust], is_log, unit)
        if disagreement is None and rob.worst_loss[rob.robust] <= 1e-12:
            out.append(f"Across {across_words}, {r} has the best estimate in every "
                       f"{noun}.")
        elif disagreement is None:
            out.append(f"Across {across_words}, {r} is both the safest choice "
                       f"(never more than {wr} worse than the best of {one}) and the "
                       "best on average.")
        else:
            env = _describe(disagreement["environment"])
            there = (f"{r} is the best there" if disagreement["robust_loss"] <= 1e-12 else
                     f"{r}: {_loss_words(disagreement['robust_loss'], is_log, unit)} worse there")
            out.append(
                f"Across {across_words}, {r} is the safest choice (never more than "
                f"{wr} worse than the best of {one}), while {a} is best on average "
                f"but {_loss_words(disagreement['on_average_loss'], is_log, unit)} worse than the "
                f"best where {env} ({there}).")
    if main.across and best_i not in (rob.robust, rob.on_average):
        e = int(rob.worst_env[best_i])
        env = _describe(dict(zip(main.across, main.environments[e])))
        safe = _describe(as_map(settings[rob.robust]))
        safe_words = (f"{safe} is the best in every {noun}"
                      if rob.worst_loss[rob.robust] <= 1e-12 else
                      f"{safe} never loses more than "
                      f"{_loss_words(rob.worst_loss[rob.robust], is_log, unit)}")
        out.append(f"Mind that {best} is {_loss_words(rob.worst_loss[best_i], is_log, unit)} worse "
                   f"than the best where {env}; {safe_words}.")
    if also and pareto_idx is not None:
        margin = f" by more than {within * 100:g}%" if within else ""
        rule = (f"another setting is better on at least one response{margin} and not worse on "
                f"any{' beyond ' + format(within * 100, 'g') + '%' if within else ''}, at "
                f"{conf} confidence")
        n = len(all_settings)
        if len(pareto_idx) == n:
            out.append(f"Trading {main.response} against {', '.join(also)}: all {n} settings "
                       f"are on the front; none is off it (a setting is off when {rule}).")
        else:
            out.append(f"Trading {main.response} against {', '.join(also)}: {len(pareto_idx)} "
                       f"of {n} settings are on the front; for each of the others, {rule}.")
    return out


def choice_section(folder_or_choice, **kwargs) -> dict:
    """The choice as a report section (plain dict; see docs/choose.md).

    Given a `Choice`, renders it; given a results folder (or any source), runs
    `choose` with the experiment's ``choose:`` section and ``kwargs``.
    """
    from benchharness.choose.render import section_dict

    choice = folder_or_choice if isinstance(folder_or_choice, Choice) else choose(
        folder_or_choice, **{"response": None, **kwargs})   # None: the section's response
    return section_dict(choice)
