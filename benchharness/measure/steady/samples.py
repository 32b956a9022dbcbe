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

from benchharness.numbers import plural

import json
import math
from dataclasses import dataclass


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
    from benchharness.experiment import yamlnodes as yn

    fields = yn.expect_mapping(node, "'samples'", {"from", "format", "key", "unit", "target"})
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
        t = yn.as_percent(fields["target"], "samples.target")
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
    if cfg.format == "lines":
        out, bad = _line_samples(text)
    elif cfg.format == "jsonl":
        out, bad = _jsonl_samples(text, cfg.key)
    else:
        out, bad, err = _json_list_samples(text, cfg)
        if err:
            return [], err
    reasons = []
    if not out:
        reasons.append(f"no per-iteration samples found on {cfg.stream} (format {cfg.format})")
    if bad:
        reasons.append(f"{plural(bad, 'sample value')} "
                       f"{'was not a finite number and was' if bad == 1 else 'were not finite numbers and were'} "
                       "skipped")
    if truncated and cfg.format != "json":
        reasons.append(f"{cfg.stream} was longer than the kept tail; early samples are lost")
    return [f * cfg.scale for f in out], "; ".join(reasons)


def _line_samples(text: str) -> tuple[list[float], int]:
    """(numbers, count of bad ones) of format ``lines``: one number per line.

    Lines that are not numbers are the program's other output; only lines that
    look like a number but are not one (``1.2.3``, ``nan``...) count as bad.
    """
    out: list[float] = []
    bad = 0
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
    return out, bad


def _jsonl_samples(text: str, key: str) -> tuple[list[float], int]:
    """(numbers, count of bad ones) of format ``jsonl``: ``key`` of each JSON object line."""
    out: list[float] = []
    bad = 0
    for line in text.splitlines():
        line = line.strip()
        if not line.startswith("{"):
            continue
        try:
            obj = json.loads(line)
            v = key_path(obj, key)
        except (ValueError, KeyError):
            continue
        f = _number(v)
        if f is None:
            bad += 1
        else:
            out.append(f)
    return out, bad


def _json_list_samples(text: str, cfg: SamplesConfig) -> tuple[list[float], int, str]:
    """(numbers, count of bad ones, error) of format ``json``: a list under ``key`` in the
    last JSON line; the error says why no list could be read (else it is empty)."""
    obj = last_json_line(text)
    if obj is None:
        return [], 0, f"no JSON line on {cfg.stream} to read samples from"
    try:
        v = key_path(obj, cfg.key)
    except KeyError as exc:
        return [], 0, f"samples: {exc.args[0]} in the last JSON line of {cfg.stream}"
    if not isinstance(v, list):
        return [], 0, f"samples: {cfg.key!r} in the last JSON line is not a list"
    out: list[float] = []
    bad = 0
    for item in v:
        f = _number(item)
        if f is None:
            bad += 1
        else:
            out.append(f)
    return out, bad, ""


def analyse_run(samples_s: list[float], settings=None) -> tuple[dict, dict]:
    """(runs.csv columns, samples.jsonl analysis fields) for one run's samples."""
    from benchharness.measure.steady.warmup import classify

    res = classify(samples_s, settings)
    columns = {
        "iterations": len(samples_s),
        "steady_from": res.steady_from,
        "steady_s": res.steady_s,
        "warmup_shape": res.shape,
    }
    return columns, {**res.to_json_dict(), "reason": res.reason}


def read_samples_records(path) -> dict[int, dict]:
    """``samples.jsonl`` as {run id: record}; later lines win (a re-done run)."""
    out: dict[int, dict] = {}
    try:
        fh = open(path, encoding="utf-8")
    except OSError:
        return out
    with fh:
        for line in fh:
            line = line.strip()
            if not line:
                continue
            try:
                rec = json.loads(line)
            except ValueError:
                continue   # a torn last line after a crash
            out[int(rec["run"])] = rec
    return out


def cell_advice(records, samples: dict[int, dict], factor_names, target: float = 0.01,
                confidence: float = 0.95) -> list[dict]:
    """Per cell: variance components and the executions x iterations advice.

    ``records`` are journal records (``run``, ``status``, ``levels``,
    ``wall_s``); ``samples`` maps run id to its ``samples.jsonl`` record.
    Only ``ok`` runs with a steady state count, and only their steady
    iterations (Kalibera & Jones analyse the steady state), truncated to a
    common length (`components.balanced`).  The cost of an execution is the
    median over the cell's runs of wall time minus the steady iterations'
    time (start-up plus warm-up); the cost of an iteration is the mean steady
    iteration time.
    """
    import numpy as np

    from benchharness.measure.steady.components import balanced, recommend, variance_components
    from benchharness.measure.steady.warmup import RUNS_DISAGREE, class_name

    cells: dict[tuple, list] = {}
    for r in records:
        if r.get("status") != "ok":
            continue
        key = tuple(str((r.get("levels") or {}).get(f)) for f in factor_names)
        cells.setdefault(key, []).append(r)
    out = []
    for key, runs in cells.items():
        levels = dict(zip(factor_names, key))
        steady, exec_costs, shapes = [], [], {}
        for r in runs:
            rec = samples.get(int(r["run"]))
            if not rec:
                continue
            an = rec.get("analysis") or {}
            shape = class_name(an.get("shape", "?"))
            shapes[shape] = shapes.get(shape, 0) + 1
            start = an.get("steady_from")
            if start is None:
                continue
            part = list(rec.get("samples_s") or [])[int(start):]
            if len(part) < 2:
                continue
            steady.append(part)
            if r.get("wall_s") is not None:
                exec_costs.append(max(float(r["wall_s"]) - float(sum(part)), 0.0))
        # Across executions (as Barrett et al. 2017 do): one class when all runs agree,
        # else "runs disagree".
        cell_shape = next(iter(shapes)) if len(shapes) == 1 else (
            RUNS_DISAGREE if shapes else None)
        entry: dict = {"levels": levels, "runs": len(runs), "shapes": shapes,
                       "cell_shape": cell_shape, "runs_with_steady_state": len(steady)}
        mat = balanced(steady)
        if mat is None:
            entry["note"] = "fewer than two runs reached a steady state; no advice"
            out.append(entry)
            continue
        comp = variance_components(mat)
        c_iter = float(mat.mean())
        c_exec = float(np.median(exec_costs)) if exec_costs else 0.0
        rec_ = recommend(comp, c_exec, c_iter, target, confidence)
        entry.update({
            "components": comp.to_json_dict(),
            "cost_execution_s": c_exec, "cost_iteration_s": c_iter,
            "advice": rec_.to_json_dict(),
        })
        out.append(entry)
    return out
