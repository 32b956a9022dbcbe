"""Reading what a choice needs from the experiment file and the data source.

This module owns the edges of `choose`: loading a runs table (results folder,
CSV path or DataFrame), and reading two experiment-file sections:

``choose:`` (all keys optional)::

    choose:
      prefer: {threads: "4"}     # the current default of some control factors
      across: [machine]          # environment columns the default must live with
      also: [max_rss_kib]        # further responses for the trade-off front
      response: wall_s
      confidence: 0.95
      within: 3%                 # practical margin of the trade-off front
      limits: ["max_rss_kib within 5%"]   # only settings within 5% of the leanest

``metrics:`` -- only the direction of each response is read here, from a
``better: lower | higher`` key of a metric's mapping (``metrics: {ops_per_s:
{better: higher}}``, or a list of mappings with a ``name`` key). Anything
without ``better`` is lower-is-better.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

from benchharness.errors import DataError, ExperimentError

__all__ = ["load_source", "choose_settings", "metric_directions", "recorded_scale"]

_CHOOSE_KEYS = ("prefer", "across", "also", "response", "confidence", "within", "limits")


def load_source(data, factors=None):
    """(DataFrame, Experiment | None) from a DataFrame, CSV path or results folder (a path,
    or one already read: `benchharness.results.journal.Results`, not read again).

    A DataFrame without ``factors`` is returned as is (the caller asks for
    the factors); everything else goes through `benchharness.results.source.load_table`.
    """
    import pandas as pd

    from benchharness.results.journal import Results
    from benchharness.results.source import load_table

    if isinstance(data, pd.DataFrame) and factors is None:
        return data, None
    if not isinstance(data, (pd.DataFrame, str, Path, Results)):
        raise DataError(f"cannot read data of type {type(data).__name__}; give a DataFrame, "
                        "a CSV path or a results folder")
    return load_table(data, list(factors) if factors is not None else None)


def _sections(experiment) -> Mapping:
    return getattr(experiment, "sections", None) or {}


def choose_settings(experiment) -> dict:
    """The validated ``choose:`` section of an experiment (empty when absent).

    Raises `ExperimentError` at ``FILE:LINE:COL`` for a malformed section.
    """
    from benchharness.experiment.yamlnodes import expect_mapping, is_null

    out: dict = {}
    if experiment is None:
        return out
    node = _sections(experiment).get("choose")
    if is_null(node):
        return out
    path = str(getattr(experiment, "path", "") or "") or None
    try:
        keys = expect_mapping(node, "choose", _CHOOSE_KEYS)
        for key, v in keys.items():
            out[key] = _READERS[key](experiment, key, v)
    except ExperimentError as exc:
        if exc.path in (None, "<string>") and path:
            raise ExperimentError(exc.bare, path=path, line=exc.line, col=exc.col) from None
        raise
    return out


def _read_prefer(experiment, _key, v) -> dict:
    """``prefer:``: factor -> one of its levels (the current default)."""
    from benchharness.experiment.yamlnodes import expect_mapping, node_error, scalar_text

    items = expect_mapping(v, "choose.prefer", _known_factors(experiment, v))
    prefer = {}
    for f, lv in items.items():
        level = scalar_text(lv, f"choose.prefer.{f}")
        listed = _levels(experiment, f)
        if listed and level not in listed:
            raise node_error(lv, f"choose.prefer.{f}: {level!r} is not a level of "
                                 f"{f}; levels: {', '.join(listed)}")
        prefer[f] = level
    return prefer


def _read_columns(experiment, key, v) -> list[str]:
    """``across:`` / ``also:``: column names, as a list or one comma-separated text."""
    from benchharness.experiment.yamlnodes import scalar_text, sequence_items, to_plain

    if isinstance(to_plain(v), str):
        names = [x.strip() for x in to_plain(v).split(",") if x.strip()]
        entries = [(x, v) for x in names]
    else:
        entries = [(scalar_text(x, f"an entry of choose.{key}"), x)
                   for x in sequence_items(v, f"choose.{key}")]
        names = [x for x, _n in entries]
    for x, n in entries:
        _check_column(experiment, key, x, n)
    return names


def _read_response(experiment, _key, v) -> str:
    """``response:``: the column to choose on."""
    from benchharness.experiment.yamlnodes import scalar_text

    response = scalar_text(v, "choose.response")
    _check_column(experiment, "response", response, v)
    return response


def _read_within(_experiment, _key, v) -> float:
    """``within:``: the trade-off front's practical margin, under 100%."""
    from benchharness.experiment.yamlnodes import as_percent, node_error

    within = as_percent(v, "choose.within")
    if within >= 1:
        raise node_error(v, "choose.within must be under 100%, e.g. 3%")
    return within


def _read_limits(experiment, _key, v) -> list:
    """``limits:``: one limit or a list of them ("max_rss_kib within 5%")."""
    import yaml

    from benchharness.choose.limits import parse_limit
    from benchharness.errors import UsageError
    from benchharness.experiment.yamlnodes import node_error, scalar_text, sequence_items

    items = [v] if isinstance(v, yaml.ScalarNode) else sequence_items(v, "choose.limits")
    limits = []
    for item in items:
        text = scalar_text(item, "an entry of choose.limits")
        try:
            lim = parse_limit(text)
        except UsageError as exc:
            raise node_error(item, f"choose.limits: {exc}") from None
        _check_column(experiment, "limits", lim.response, item)
        limits.append(lim)
    return limits


def _read_confidence(_experiment, _key, v) -> float:
    """``confidence:``: above 0% and below 100%."""
    from benchharness.experiment.yamlnodes import as_percent, node_error, scalar_text

    c = as_percent(v, "choose.confidence")
    if not 0 < c < 1:
        raise node_error(v, f"choose.confidence must be above 0% and below 100% "
                            f"(e.g. 95%), not {scalar_text(v)}")
    return c


#: How each key of the ``choose:`` section is read and checked.
_READERS = {"prefer": _read_prefer, "across": _read_columns, "also": _read_columns,
            "response": _read_response, "confidence": _read_confidence,
            "within": _read_within, "limits": _read_limits}


#: Columns besides the factors that can be environments (`across`).
_ENVIRONMENT_COLUMNS = ("host", "worker", "block", "replicate")


def _check_column(experiment, key, name, node) -> None:
    """An `across` entry must be a factor or an environment column; `also` and
    `response` a measured response (usage figure, metric, steady_s, perf counter)."""
    from benchharness.experiment.yamlnodes import node_error

    factors = tuple(getattr(experiment, "factor_names", ()) or ())
    if not factors:
        return
    if key == "across":
        if name not in factors and name not in _ENVIRONMENT_COLUMNS:
            raise node_error(node, f"choose.across: {name!r} is not a column of the runs; use a "
                                   f"factor ({', '.join(factors)}) or one of "
                                   f"{', '.join(_ENVIRONMENT_COLUMNS)}")
        return
    else:
        from benchharness.measure.quality import response_columns

        if name.startswith("perf_") and "perf" in (getattr(experiment, "sections", {}) or {}):
            return
        known = response_columns(experiment)
        what = "a measured response"
    if name not in known:
        raise node_error(node, f"choose.{key}: {name!r} is not {what}; use one of "
                               f"{', '.join(known)}")


def _levels(experiment, name) -> tuple[str, ...]:
    try:
        return tuple(experiment.levels_of(name))
    except (AttributeError, KeyError, ValueError):
        return ()


def _known_factors(experiment, node):
    """Allowed keys of choose.prefer: the experiment's factor names."""
    names = tuple(getattr(experiment, "factor_names", ()) or ())
    if names:
        return names
    from benchharness.experiment.yamlnodes import mapping_items

    return [k for k, _kn, _v in mapping_items(node, "choose.prefer")]


def metric_directions(experiment) -> dict[str, str]:
    """Map of response name -> 'lower' | 'higher' from the ``metrics:`` section."""
    from benchharness.experiment.yamlnodes import to_plain

    if experiment is None:
        return {}
    value = to_plain(_sections(experiment).get("metrics"))
    entries: list[tuple[str, object]] = []
    if isinstance(value, dict):
        entries = list(value.items())
    elif isinstance(value, list):
        entries = [(m.get("name"), m) for m in value if isinstance(m, dict)]
    out: dict[str, str] = {}
    for name, spec in entries:
        if isinstance(spec, dict) and name is not None:
            b = spec.get("better")
            if isinstance(b, str) and b.strip().lower() in ("lower", "higher"):
                out[str(name)] = b.strip().lower()
    return out


def recorded_scale(data, response: str) -> str | None:
    """The scale a results folder's ``analysis.json`` recorded for ``response``.

    ``log`` or ``none`` when the folder's analysis of this response used that
    transform, so `choose` judges the response on the same scale as the
    analysis; None when there is no such record (or it is Box-Cox, which a
    choice does not use: it then keeps its own rule).
    """
    import json

    if not isinstance(data, (str, Path)):
        return None
    path = Path(data) / "analysis.json"
    try:
        stored = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(stored, dict) or stored.get("response") != response:
        return None
    name = (stored.get("transform") or {}).get("name") if isinstance(
        stored.get("transform"), dict) else None
    return name if name in ("log", "none") else None
