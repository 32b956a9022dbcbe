"""The ``samples:`` section: per-iteration timings a command reports itself.

A command that repeats its work in-process can print one timing per
iteration; benchharness keeps them in ``samples.jsonl`` (one JSON object per
run, keyed by run id), finds each run's steady state (`warmup.classify`) and
uses the steady-state mean as the run's ``steady_s`` response.

    samples:
      from: stdout        # stdout | stderr
      format: lines       # lines: each line that is a bare number
                          # jsonl: each JSON-object line; the number under `key`
                          # json:  the last JSON line; a list under `key` (default "samples")
      key: samples        # key path (a.b.0) for jsonl / json
      unit: ms            # s | ms | us | ns (default s)
      target: 1%          # precision aimed at by the executions x iterations advice
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass

from benchharness.errors import ExperimentError

UNITS = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6, "ns": 1e-9}
FORMATS = ("lines", "jsonl", "json")

# runs.csv columns this capability adds (after the usage columns)
SAMPLE_COLUMNS = ("iterations", "steady_from", "steady_s", "warmup_shape")


@dataclass(frozen=True)
class SamplesConfig:
    stream: str = "stdout"
    format: str = "lines"
    key: str = "samples"
    unit: str = "s"
    target_rel_halfwidth: float = 0.01

    @property
    def scale(self) -> float:
        return UNITS[self.unit]


def parse_samples_config(node, path: str | None = None) -> SamplesConfig:
    """Validate the ``samples:`` YAML node (errors name FILE:LINE:COL)."""
    from benchharness import yamlnodes as yn

    fields = yn.expect_mapping(node, "samples", {"from", "format", "key", "unit", "target"})
    kw: dict = {}
    if "from" in fields:
        v = yn.scalar_text(fields["from"])
        if v not in ("stdout", "stderr"):
            raise yn.node_error(fields["from"], f"samples.from is {v!r}; use stdout or stderr")
        kw["stream"] = v
    if "format" in fields:
        v = yn.scalar_text(fields["format"])
        if v not in FORMATS:
            raise yn.node_error(fields["format"],
                                f"samples.format is {v!r}; use one of {', '.join(FORMATS)}")
        kw["format"] = v
    if "key" in fields:
        kw["key"] = yn.scalar_text(fields["key"])
    if "unit" in fields:
        v = yn.scalar_text(fields["unit"])
        if v not in UNITS:
            raise yn.node_error(fields["unit"], f"samples.unit is {v!r}; use s, ms, us or ns")
        kw["unit"] = v
    if "target" in fields:
        t = yn.as_percent(fields["target"])
        if not 0 < t < 1:
            raise yn.node_error(fields["target"], "samples.target must be between 0% and 100%, "
                                                  "e.g. 1%")
        kw["target_rel_halfwidth"] = t
    return SamplesConfig(**kw)


def key_path(obj, path: str):
    """Follow ``a.b.0.c`` into nested dicts/lists; KeyError with a readable reason."""
    cur = obj
    for part in path.split("."):
        if isinstance(cur, dict):
            if part not in cur:
                raise KeyError(f"key {part!r} not found (path {path!r})")
            cur = cur[part]
        elif isinstance(cur, list):
            try:
                cur = cur[int(part)]
            except (ValueError, IndexError):
                raise KeyError(f"no list item {part!r} (path {path!r})") from None
        else:
            raise KeyError(f"{part!r} looked up in a {type(cur).__name__} (path {path!r})")
    return cur


def last_json_line(text: str):
    """The last line of ``text`` that parses as a JSON object or list, or None."""
    for line in reversed(text.splitlines()):
        line = line.strip()
        if line[:1] in ("{", "["):
            try:
                return json.loads(line)
            except ValueError:
                continue
    return None


def _number(v) -> float | None:
    if isinstance(v, bool):
        return None
    if isinstance(v, (int, float)):
        f = float(v)
    elif isinstance(v, str):
        try:
            f = float(v.strip())
        except ValueError:
            return None
    else:
        return None
    return f if math.isfinite(f) else None


def extract_samples(cfg: SamplesConfig, stdout: bytes | str, stderr: bytes | str,
                    truncated: bool = False) -> tuple[list[float], str]:
    """Per-iteration times in seconds, and a reason when something was off."""
    raw = stdout if cfg.stream == "stdout" else stderr
    text = raw.decode("utf-8", "replace") if isinstance(raw, bytes) else (raw or "")
    out: list[float] = []
    bad = 0
    if cfg.format == "lines":
        for line in text.splitlines():
            line = line.strip()
            if not line:
                continue
            f = _number(line)
            if f is None:
                # non-numeric lines are other output; only count numeric-looking junk
                if line[:1].isdigit() or line[:1] in "+-.":
                    bad += 1
                continue
            out.append(f)
    elif cfg.format == "jsonl":
        for line in text.splitlines():
            line = line.strip()
            if not line.startswith("{"):
                continue
            try:
                obj = json.loads(line)
                v = key_path(obj, cfg.key)
            except (ValueError, KeyError):
                continue
            f = _number(v)
            if f is None:
                bad += 1
            else:
                out.append(f)
    else:
        obj = last_json_line(text)
        if obj is None:
            return [], f"no JSON line on {cfg.stream} to read samples from"
        try:
            v = key_path(obj, cfg.key)
        except KeyError as exc:
            return [], f"samples: {exc.args[0]} in the last JSON line of {cfg.stream}"
        if not isinstance(v, list):
            return [], f"samples: {cfg.key!r} in the last JSON line is not a list"
        for item in v:
            f = _number(item)
            if f is None:
                bad += 1
            else:
                out.append(f)
    reasons = []
    if not out:
        reasons.append(f"no per-iteration samples found on {cfg.stream} (format {cfg.format})")
    if bad:
        reasons.append(f"{bad} sample value(s) were not finite numbers and were skipped")
    if truncated and cfg.format != "json":
        reasons.append(f"{cfg.stream} was longer than the kept tail; early samples are lost")
    return [f * cfg.scale for f in out], "; ".join(reasons)


def analyse_run(samples_s: list[float], settings=None) -> tuple[dict, dict]:
    """(runs.csv columns, samples.jsonl analysis fields) for one run's samples."""
    from benchharness.steady.warmup import classify

    res = classify(samples_s, settings)
    columns = {
        "iterations": len(samples_s),
        "steady_from": res.steady_from,
        "steady_s": res.steady_s,
        "warmup_shape": res.shape,
    }
    return columns, {**res.to_json_dict(), "reason": res.reason}


def samples_record(run: int, samples_s: list[float], analysis: dict, unit: str) -> dict:
    """One line of ``samples.jsonl``."""
    return {"run": run, "unit_reported": unit, "samples_s": samples_s, "analysis": analysis}


def read_samples(path) -> dict[int, list[float]]:
    """``samples.jsonl`` back as {run id: samples in seconds}; later lines win."""
    out: dict[int, list[float]] = {}
    with open(path, encoding="utf-8") as fh:
        for line in fh:
            line = line.strip()
            if not line:
                continue
            try:
                rec = json.loads(line)
            except ValueError:
                continue   # a torn last line after a crash
            out[int(rec["run"])] = [float(x) for x in rec.get("samples_s", [])]
    return out


def cell_advice(runs, samples_by_run: dict[int, list[float]], factor_names, target: float = 0.01,
                confidence: float = 0.95) -> list[dict]:
    """Per cell: variance components and the executions x iterations advice.

    ``runs`` is the runs table (DataFrame with ``run``, ``status``, factor
    columns, ``wall_s``, ``steady_from``). Iterations before each run's
    steady state are left out (Kalibera & Jones analyse steady iterations).
    The cost of an execution is the median over the cell's runs of wall time
    minus the steady iterations' time (start-up plus warm-up); the cost of an
    iteration is the mean steady iteration time.
    """
    import numpy as np

    from benchharness.steady.components import balanced, recommend, variance_components

    out = []
    ok = runs[runs["status"] == "ok"] if "status" in runs else runs
    groups = ok.groupby(list(factor_names), sort=False) if factor_names else [((), ok)]
    for key, grp in groups:
        key = key if isinstance(key, tuple) else (key,)
        levels = dict(zip(factor_names, map(str, key)))
        steady, exec_costs = [], []
        for _, row in grp.iterrows():
            s = samples_by_run.get(int(row["run"]))
            start = row.get("steady_from")
            if not s or start is None or (isinstance(start, float) and math.isnan(start)):
                continue
            part = s[int(start):]
            if len(part) < 2:
                continue
            steady.append(part)
            wall = row.get("wall_s")
            if wall is not None and not (isinstance(wall, float) and math.isnan(wall)):
                exec_costs.append(max(float(wall) - float(sum(part)), 0.0))
        entry: dict = {"levels": levels, "executions_with_steady_state": len(steady)}
        mat = balanced(steady)
        if mat is None:
            entry["note"] = "fewer than two runs with a steady state; no advice"
            out.append(entry)
            continue
        comp = variance_components(mat)
        c_iter = float(mat.mean())
        c_exec = float(np.median(exec_costs)) if exec_costs else c_iter * 10
        rec = recommend(comp, c_exec, c_iter, target, confidence)
        entry.update({
            "components": comp.to_json_dict(),
            "cost_execution_s": c_exec, "cost_iteration_s": c_iter,
            "advice": rec.to_json_dict(),
        })
        out.append(entry)
    return out
