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

``metrics:`` -- only the direction of each response is read here, from a
``better: lower | higher`` key of a metric's mapping (``metrics: {ops_per_s:
{better: higher}}``, or a list of mappings with a ``name`` key). Anything
without ``better`` is lower-is-better.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

from benchharness.errors import DataError, ExperimentError

__all__ = ["load_source", "choose_settings", "metric_directions"]

_CHOOSE_KEYS = ("prefer", "across", "also", "response", "confidence")


def load_source(data, factors=None):
    """(DataFrame, Experiment | None) from a DataFrame, CSV path or results folder."""
    import pandas as pd

    if isinstance(data, pd.DataFrame):
        return data, None
    if isinstance(data, (str, Path)):
        try:
            from benchharness.source import load_table
        except ImportError:  # pragma: no cover - until the foundation lands
            load_table = None
        if load_table is not None:
            return load_table(data, factors)
        path = Path(data)
        csv = path / "runs.csv" if path.is_dir() else path
        if not csv.is_file():
            raise DataError(f"{data}: not a results folder or CSV file")
        cols = list(factors or [])
        return pd.read_csv(csv, dtype={c: str for c in cols}, keep_default_na=False,
                           na_values=[""]), None
    raise DataError(f"cannot read data of type {type(data).__name__}")


def _plain(node):
    """A python value of a YAML node (scalars as source text) or a plain value as is."""
    if node is None:
        return None
    try:
        import yaml
    except ImportError:  # pragma: no cover
        return node
    if not isinstance(node, yaml.Node):
        return node
    try:
        from benchharness.yamlnodes import to_plain
        return to_plain(node)
    except ImportError:  # pragma: no cover - until the foundation lands
        pass
    if isinstance(node, yaml.ScalarNode):
        return node.value
    if isinstance(node, yaml.SequenceNode):
        return [_plain(n) for n in node.value]
    if isinstance(node, yaml.MappingNode):
        return {_plain(k): _plain(v) for k, v in node.value}
    return None  # pragma: no cover


def _error(node, path, msg):
    try:
        from benchharness.yamlnodes import node_error
        return node_error(node, msg)
    except (ImportError, TypeError, AttributeError):
        mark = getattr(node, "start_mark", None)
        if mark is not None:
            return ExperimentError(msg, path=str(path), line=mark.line + 1, col=mark.column + 1)
        return ExperimentError(msg, path=str(path) if path else None)


def _sections(experiment) -> Mapping:
    return getattr(experiment, "sections", None) or {}


def choose_settings(experiment) -> dict:
    """The validated ``choose:`` section of an experiment (empty when absent)."""
    out: dict = {}
    if experiment is None:
        return out
    node = _sections(experiment).get("choose")
    if node is None:
        return out
    path = getattr(experiment, "path", None)
    value = _plain(node)
    if value in (None, ""):
        return out
    if not isinstance(value, dict):
        raise _error(node, path, "choose: must be a mapping with keys "
                     + ", ".join(_CHOOSE_KEYS))
    children = {}
    try:
        import yaml
        if isinstance(node, yaml.MappingNode):
            children = {k.value: v for k, v in node.value}
    except ImportError:  # pragma: no cover
        pass
    for key, v in value.items():
        child = children.get(key, node)
        if key not in _CHOOSE_KEYS:
            raise _error(child, path, f"choose: unknown key {key!r}; allowed: "
                         + ", ".join(_CHOOSE_KEYS))
        if key == "prefer":
            if not isinstance(v, dict):
                raise _error(child, path, "choose.prefer must map factor names to levels, "
                             "e.g. prefer: {threads: 4}")
            out["prefer"] = {str(f): str(lv) for f, lv in v.items()}
        elif key in ("across", "also"):
            if isinstance(v, str):
                v = [x.strip() for x in v.split(",") if x.strip()]
            if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
                raise _error(child, path, f"choose.{key} must be a list of column names")
            out[key] = list(v)
        elif key == "response":
            if not isinstance(v, str) or not v:
                raise _error(child, path, "choose.response must be a column name")
            out["response"] = v
        elif key == "confidence":
            try:
                c = float(str(v).rstrip("%")) / (100 if str(v).endswith("%") else 1)
            except ValueError:
                c = -1.0
            if not 0 < c < 1:
                raise _error(child, path, "choose.confidence must be between 0 and 1, e.g. 0.95")
            out["confidence"] = c
    return out


def metric_directions(experiment) -> dict[str, str]:
    """Map of response name -> 'lower' | 'higher' from the ``metrics:`` section."""
    if experiment is None:
        return {}
    node = _sections(experiment).get("metrics")
    value = _plain(node)
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
