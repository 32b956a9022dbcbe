"""Measurement quality around each run: the glue between the runner and the checks.

The runner stays a plain loop; this module owns what happens around a run for
the ``expect``, ``metrics``, ``samples`` and ``perf`` sections and the per-run
machine conditions:

* `quality_config(exp)` validates those sections (FILE:LINE:COL errors) —
  call it before creating a results folder;
* `RunQuality(exp, folder, cfg)` then, per results folder:
  ``start(cells)`` writes ``metrics.json`` and ``provenance.json``;
  ``prepare(spec, levels, cell)`` adjusts a run's `RunSpec` (``perf stat``
  wrapping, a larger output tail for samples) and samples load and CPU
  frequency; ``finish(token, planned, m)`` applies ``expect``, extracts
  metrics, perf counts and samples (appending ``samples.jsonl``) and returns
  the `Measurement` with ``status``, ``message`` and ``extra`` updated;
  ``close(records)`` writes ``steady.json`` (Kalibera & Jones advice per cell).

The methods live in `expect`, `metrics`, `perfstat`, `provenance`, `host` and
`steady`; see docs/measurement.md.
"""

from __future__ import annotations

import json
import os
import tempfile
import time
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Iterable, Mapping

from benchharness.execute.base import Measurement, RunSpec
from benchharness.numbers import plural

SAMPLES_CAPTURE_BYTES = 8 * 2**20


@dataclass(frozen=True)
class QualityConfig:
    metrics: object = None          # metrics.MetricsConfig | None
    expect: object = None           # expect.ExpectSpec | None
    samples: object = None          # steady.samples.SamplesConfig | None
    perf: object = None             # perfstat.PerfConfig | None

    @property
    def active(self) -> bool:
        return any(x is not None for x in (self.metrics, self.expect, self.samples, self.perf))


def response_columns(exp) -> list[str]:
    """Numeric runs.csv columns a rule or a choice may use as a response: the usage
    figures, the ``metrics:`` names and ``steady_s`` with ``samples:`` (``perf_*``
    counters too when ``perf:`` is on; not listed, their names depend on the events)."""
    from benchharness.execute.base import USAGE_FIELDS
    from benchharness.experiment.yamlnodes import is_null, mapping_items

    sec = getattr(exp, "sections", {}) or {}
    out = list(USAGE_FIELDS)
    if "metrics" in sec and not is_null(sec["metrics"]):
        out += [name for name, _k, _v in mapping_items(sec["metrics"], "'metrics'")]
    if "samples" in sec:
        out.append("steady_s")
    return out


def quality_config(exp) -> QualityConfig:
    """Validate and parse the quality sections of an experiment."""
    sec = getattr(exp, "sections", {}) or {}
    metrics = expect = samples = perf = None
    if "metrics" in sec:
        from benchharness.measure.metrics import parse_metrics
        from benchharness.experiment.yamlnodes import is_null

        if not is_null(sec["metrics"]):
            metrics = parse_metrics(sec["metrics"], exp.factor_names)
            _check_file_templates(exp, metrics, sec["metrics"])
    if "expect" in sec:
        from benchharness.measure.expect import parse_expect

        expect = parse_expect(sec["expect"])
    if "samples" in sec:
        from benchharness.measure.steady.samples import parse_samples_config

        samples = parse_samples_config(sec["samples"])
    if "perf" in sec:
        from benchharness.measure.perfstat import parse_perf

        perf = parse_perf(sec["perf"])
    if perf is not None:
        from benchharness.experiment.yamlnodes import node_error

        clash = set(exp.factor_names) & set(perf.columns())
        if clash:
            raise node_error(sec["perf"], f"factor {sorted(clash)[0]!r} clashes with a perf "
                                          "counter column; rename the factor")
    if metrics is not None and perf is not None:
        from benchharness.experiment.yamlnodes import node_error

        clash = set(metrics.names) & set(perf.columns())
        if clash:
            raise node_error(sec["metrics"], f"metric {sorted(clash)[0]!r} clashes with a perf "
                                             "counter column; rename the metric")
    return QualityConfig(metrics, expect, samples, perf)


def _check_file_templates(exp, metrics, node) -> None:
    """Every ``{factor}`` / ``{factor.name}`` in a metric's ``file:`` must exist."""
    from benchharness.experiment import templating
    from benchharness.experiment.yamlnodes import mapping_items, node_error

    nodes = {}
    for name, _k, v in mapping_items(node, "'metrics'"):
        for key, _kk, vv in mapping_items(v, f"metric {name!r}"):
            if key == "file":
                nodes[name] = vv
    factors = {f.name: f for f in exp.factors}
    for name, tmpl in metrics.file_templates().items():
        where = nodes.get(name, node)
        try:
            phs = templating.placeholders(tmpl)
        except ValueError as exc:
            raise node_error(where, f"metric {name!r}: {exc}") from None
        for ph in phs:
            f = factors.get(ph.factor)
            if f is None:
                raise node_error(where, f"metric {name!r}: placeholder {ph.text} names no "
                                        f"factor; factors are {', '.join(factors)}")
            if ph.name is not None:
                lacking = [lv.label for lv in f.levels if ph.name not in lv.values]
                if lacking:
                    raise node_error(where, f"metric {name!r}: placeholder {ph.text}: level "
                                            f"{lacking[0]!r} of {f.name!r} has no value "
                                            f"{ph.name!r}")


def _epoch(iso: str) -> float | None:
    import datetime as dt

    try:
        return dt.datetime.fromisoformat(iso).timestamp()
    except (TypeError, ValueError):
        return None


def _sample(cpus):
    from benchharness.measure.host import sample_run_conditions

    return sample_run_conditions(cpus)


class RunQuality:
    """Per-results-folder state of the quality checks (see module docstring)."""

    def __init__(self, exp, folder: str | os.PathLike, cfg: QualityConfig | None = None):
        self.exp = exp
        self.folder = Path(folder)
        self.cfg = cfg if cfg is not None else quality_config(exp)
        self.notes: list[str] = []
        self.perf_ok = False
        self.perf_note = ""
        self._samples_fh = None
        self._last_sync = 0.0
        self._fast = not self.cfg.active
        if self.cfg.perf is not None:
            from benchharness.measure.perfstat import perf_support

            self.perf_ok, self.perf_note = perf_support()
            if not self.perf_ok:
                self.notes.append(f"perf: {self.perf_note}; runs are not wrapped")

    @property
    def fast(self) -> bool:
        """No quality section is active: a run needs nothing from this module but
        its conditions (load and CPU clock), which the launcher can sample itself."""
        return self._fast

    # -- start ---------------------------------------------------------------

    def manifest(self) -> dict:
        out: dict = {}
        if self.cfg.metrics is not None:
            out.update(self.cfg.metrics.manifest())
        if self.cfg.perf is not None:
            from benchharness.measure.perfstat import column_name

            for e in self.cfg.perf.events:
                out[column_name(e)] = {"unit": "count", "better": "lower", "source": "perf",
                                       "event": e, "available": self.perf_ok,
                                       **({} if self.perf_ok else {"note": self.perf_note})}
        if self.cfg.samples is not None:
            out["steady_s"] = {"unit": "s", "better": "lower", "source": "samples",
                               "from": self.cfg.samples.stream,
                               "format": self.cfg.samples.format,
                               "unit_reported": self.cfg.samples.unit}
        return out

    def start(self, cells: Iterable, render=None) -> None:
        """Write ``metrics.json`` and ``provenance.json``.

        ``cells``: ``(levels, cell dict)`` pairs; or, with ``render``, the levels
        of each cell alone, ``render(levels)`` giving its cell dict only when the
        provenance needs it (a large plan then renders one cell here, not all).
        """
        from benchharness.results import journal as J
        from benchharness.measure.provenance import plan_provenance

        man = self.manifest()
        if man:
            J.write_atomic(self.folder / "metrics.json", json.dumps(man, indent=1))
        exp_dir = (str(Path(self.exp.path).resolve().parent)
                   if getattr(self.exp, "path", "<string>") != "<string>" else os.getcwd())
        if render is None:
            pairs = list(cells)
            levels_list = [lv for lv, _ in pairs]
            by_key = {tuple(sorted(lv.items())): c for lv, c in pairs}
            render = lambda lv: by_key[tuple(sorted(lv.items()))]  # noqa: E731
        else:
            levels_list = list(cells)

        def command_of(levels):
            c = render(levels)
            return c["argv"], c["shell"], c["env"], c["cwd"]

        prov = plan_provenance(exp_dir, self.exp, levels_list, command_of)
        target = self.folder / "provenance.json"
        if target.exists():
            # a resumed folder: keep the first record, add this one, flag changed binaries
            try:
                first = json.loads(target.read_text())
            except (OSError, ValueError):
                first = None
            if first is not None:
                n = len(list(self.folder.glob("provenance.resumed-*.json"))) + 1
                target = self.folder / f"provenance.resumed-{n}.json"
                changed = _changed_executables(first, prov)
                if changed:
                    self.notes.append("warning: since this folder was started, these files "
                                      "changed: " + ", ".join(changed)
                                      + "; the results mix two versions")
                if (first.get("git") or {}).get("revision") != (prov.get("git") or {}).get(
                        "revision"):
                    self.notes.append("warning: the git revision changed since this folder "
                                      "was started")
        J.write_atomic(target, json.dumps(prov, indent=1))
        git = prov.get("git")
        if git and git.get("dirty"):
            self.notes.append(f"note: the working tree {git['root']} has uncommitted changes "
                              f"({git['changed_count']} paths); provenance.json lists them")

    # -- per run ---------------------------------------------------------------

    def prepare(self, spec: RunSpec, levels: Mapping[str, str], cell: Mapping,
                sample_later: bool = False) -> tuple:
        """The spec to execute and a token for `finish`.

        ``sample_later``: with no quality section active, the run conditions
        are not sampled here; the caller calls `sample` while the run executes
        (else `finish` samples them).
        """
        if self._fast:  # the common case, kept cheap: only the run conditions
            return spec, {"conditions": None if sample_later else _sample(spec.cpus),
                          "fast": True, "cpus": spec.cpus}
        from benchharness.measure.host import sample_run_conditions
        token: dict = {"levels": dict(levels), "cwd": spec.cwd}
        if self.cfg.samples is not None and spec.capture_bytes < SAMPLES_CAPTURE_BYTES:
            spec = replace(spec, capture_bytes=SAMPLES_CAPTURE_BYTES)
        token["capture_bytes"] = spec.capture_bytes
        if self.cfg.perf is not None and self.perf_ok:
            from benchharness.measure.perfstat import wrap

            fd, out_file = tempfile.mkstemp(prefix="benchharness-perf-", suffix=".csv")
            os.close(fd)
            token["perf_file"] = out_file
            spec = replace(spec, argv=wrap(spec.argv, spec.shell_command, self.cfg.perf,
                                           out_file), shell_command=None)
        if self.cfg.metrics is not None and self.cfg.metrics.file_templates():
            from benchharness.experiment import templating
            from benchharness.measure.metrics import snapshot_files

            lookup = self.exp.lookup(levels)
            files = {n: templating.render(t, lookup)
                     for n, t in self.cfg.metrics.file_templates().items()}
            token["files"] = files
            token["files_before"] = snapshot_files(self.cfg.metrics, files, spec.cwd)
        token["conditions"] = sample_run_conditions(spec.cpus)
        token["t0"] = time.time()
        return spec, token

    @staticmethod
    def sample(token: dict) -> None:
        """Sample the run conditions of a `prepare` token made with ``sample_later``."""
        if token.get("conditions") is None:
            token["conditions"] = _sample(token.get("cpus"))

    def finish(self, token: Mapping, planned: Mapping, m: Measurement) -> Measurement:
        """Apply expect, metrics, perf counts and samples to one run's measurement."""
        if token.get("fast") and type(m.extra) is dict:
            # No quality sections: add the run conditions to this run's own extra dict
            # (a fresh dict per measurement) instead of copying the measurement.
            cond = token["conditions"]
            if cond is None:
                cond = _sample(token.get("cpus"))
            extra = m.extra
            for k, v in cond.items():
                if k not in extra:
                    extra[k] = v
            return m
        extra = dict(m.extra or {})
        for k, v in token.get("conditions", {}).items():
            extra.setdefault(k, v)
        reasons: list[str] = []
        if self.cfg.expect is not None:
            from benchharness.measure.expect import apply_expect

            m = apply_expect(self.cfg.expect, m)
        values: dict = dict(extra.get("metrics") or {})
        if self.cfg.perf is not None:
            values.update(self._perf_counts(token, m, reasons))
        if self.cfg.metrics is not None:
            values.update(self._metric_values(token, m, reasons))
        if values:
            extra["metrics"] = values
        if self.cfg.samples is not None:
            extra.update(self._samples(token, planned, m, reasons))
        if reasons:
            msg = "; ".join(x for x in [m.message, *reasons] if x)
            m = replace(m, message=msg)
        return replace(m, extra=extra)

    def _perf_counts(self, token: Mapping, m: Measurement, reasons: list[str]) -> dict:
        """The run's hardware counts (None each when perf could not count); why a
        successful run has none is added to ``reasons``."""
        from benchharness.measure.perfstat import read_counts

        if "perf_file" not in token:
            return {c: None for c in self.cfg.perf.columns()}
        counts, why = read_counts(token["perf_file"], self.cfg.perf)
        if why and m.status == "ok":
            reasons.append(why)
        return counts

    def _metric_values(self, token: Mapping, m: Measurement, reasons: list[str]) -> dict:
        """The run's values of the ``metrics:`` section; why a successful run lacks one is
        added to ``reasons``."""
        from benchharness.measure.metrics import extract_metrics, reasons_message

        started = _epoch(m.started_at) or token.get("t0")
        vals, why = extract_metrics(self.cfg.metrics, m.stdout_tail, m.stderr_tail,
                                    token.get("files"), started, token.get("cwd"),
                                    token.get("files_before"))
        if why and m.status == "ok":
            reasons.append(reasons_message(why))
        return vals

    def _samples(self, token, planned, m: Measurement, reasons: list[str]) -> dict:
        from benchharness.measure.steady.samples import analyse_run, extract_samples
        from benchharness.measure.steady.warmup import NEVER_STEADY, TOO_SHORT

        cfg = self.cfg.samples
        raw = m.stdout_tail if cfg.stream == "stdout" else m.stderr_tail
        truncated = len(raw or b"") >= token.get("capture_bytes", SAMPLES_CAPTURE_BYTES)
        samples, why = extract_samples(cfg, m.stdout_tail, m.stderr_tail, truncated)
        cols = {"steady_s": None, "steady_state": None}
        if m.status != "ok" and not samples:
            return cols
        if why:
            reasons.append(why)
        if not samples:
            return cols
        c, analysis = analyse_run(samples)
        cols = {"steady_s": c["steady_s"], "steady_state": c["warmup_shape"]}
        if c["warmup_shape"] == NEVER_STEADY:
            reasons.append(f"never steady: {analysis['reason']}")
        elif c["warmup_shape"] == TOO_SHORT:
            reasons.append(f"steady state unknown: {analysis['reason']}")
        self._write_samples({"run": planned["run"], "position": planned.get("position"),
                             "warmup": bool(planned.get("warmup")), "status": m.status,
                             "unit_reported": cfg.unit, "samples_s": samples,
                             "analysis": analysis})
        return cols

    def _write_samples(self, rec: dict) -> None:
        if self._samples_fh is None:
            self._samples_fh = open(self.folder / "samples.jsonl", "a", encoding="utf-8")
        self._samples_fh.write(json.dumps(rec, separators=(",", ":")) + "\n")
        self._samples_fh.flush()
        now = time.monotonic()
        if now - self._last_sync >= 1.0:
            os.fsync(self._samples_fh.fileno())
            self._last_sync = now

    # -- end ---------------------------------------------------------------------

    def close(self, records=None) -> None:
        """Sync ``samples.jsonl`` and write ``steady.json`` (per-cell advice)."""
        if self._samples_fh is not None:
            try:
                os.fsync(self._samples_fh.fileno())
            finally:
                self._samples_fh.close()
                self._samples_fh = None
        if self.cfg.samples is None or records is None:
            return
        from benchharness.results import journal as J
        from benchharness.measure.steady.samples import cell_advice, read_samples_records
        from benchharness.measure.steady.warmup import NEVER_STEADY, class_name

        samples = {k: v for k, v in read_samples_records(self.folder / "samples.jsonl").items()
                   if not v.get("warmup")}
        advice = cell_advice(records, samples, self.exp.factor_names,
                             self.cfg.samples.target_rel_halfwidth)
        flagged = sorted(int(k) for k, v in samples.items()
                         if class_name((v.get("analysis") or {}).get("shape")) == NEVER_STEADY)
        J.write_atomic(self.folder / "steady.json", json.dumps({
            "method": "PELT changepoints (Killick et al. 2012) on log iteration times, "
                      "warm-up classes after Barrett et al. 2017, variance components and "
                      "advice after Kalibera & Jones 2013",
            "target_rel_halfwidth": self.cfg.samples.target_rel_halfwidth,
            "runs_without_steady_state": flagged,
            "cells": advice}, indent=1, default=str))
        if flagged:
            self.notes.append(f"{plural(len(flagged), 'run')} never reached a steady state "
                              f"(runs {', '.join(map(str, flagged[:10]))}); see steady.json")


def _changed_executables(first: dict, now: dict) -> list[str]:
    from benchharness.measure.provenance import file_hashes  # either layout of the file

    a, b = file_hashes(first), file_hashes(now)
    return sorted(p for p in a.keys() & b.keys() if a[p] != b[p])
