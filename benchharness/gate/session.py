"""One gate session: from an experiment (file or quick form) to verdicts and a results folder.

This module owns the edges of the gate: reading the ``gate:`` section of an
experiment file (validated with `benchharness.experiment.yamlnodes`, errors located
``FILE:LINE:COL``), building the experiment for the quick form, rendering each
run's command with the experiment's templates (the runner's cell cache, so
environment, working directory and noise controls behave as in ``run``),
running the build/reset/teardown steps, and writing a normal results folder
(``experiment.yaml``, ``host.json``, ``session.json``, the journal
``runs.jsonl``, ``plan.csv`` as run, ``runs.csv``) plus ``gate.json`` with the
verdicts, so ``benchharness report`` works on a gate run.

Stored-baseline mode reads the baseline's runs from an earlier results folder
instead of running them; it says plainly that such a comparison confounds the
change with whatever else differs between the two sessions.
"""

from __future__ import annotations

import json
import os
import shlex
import sys
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Mapping

from benchharness.errors import DataError, ExperimentError, UsageError
from benchharness.gate.decide import GateSettings
from benchharness.gate.orchestrate import BASELINE, CANDIDATE, GateOutcome, run_gate

GATE_KEYS = ("factor", "baseline", "candidate", "tolerance", "confidence", "max_runs",
             "min_runs", "response", "direction", "inconclusive")

CROSS_SESSION_WARNING = (
    "warning: the baseline comes from an earlier session; any difference between the two "
    "sessions (machine load, temperature, updates, another host) is mixed into the ratio. "
    "Run both builds in one gate session (interleaved) to remove it.")


@dataclass(frozen=True)
class GateConfig:
    """Where the builds live in the experiment, and the decision settings."""

    factor: str
    baseline: str
    candidate: str
    settings: GateSettings
    response: str = "wall_s"
    inconclusive: str | None = None   # None | "pass" | "fail"


def parse_gate_section(exp, overrides: Mapping | None = None) -> GateConfig:
    """Validate ``gate:`` of an experiment file; ``overrides`` are command-line values."""
    from benchharness.experiment import yamlnodes as Y

    node = exp.sections.get("gate")
    if node is None:
        raise ExperimentError("the experiment file has no 'gate:' section; add e.g. "
                              "gate: {factor: build, baseline: old}", path=str(exp.path))
    items = Y.expect_mapping(node, "'gate'", GATE_KEYS, required=("factor", "baseline"))
    factor = Y.scalar_text(items["factor"], "'gate: factor'")
    if factor not in exp.factor_names:
        raise Y.node_error(items["factor"], f"'gate: factor' {factor!r} is not a factor of the "
                           f"experiment; factors: {', '.join(exp.factor_names)}")
    levels = exp.levels_of(factor)
    baseline = Y.scalar_text(items["baseline"], "'gate: baseline'")
    if baseline not in levels:
        raise Y.node_error(items["baseline"], f"'gate: baseline' {baseline!r} is not a level of "
                           f"{factor}; levels: {', '.join(levels)}")
    if "candidate" in items:
        candidate = Y.scalar_text(items["candidate"], "'gate: candidate'")
        if candidate not in levels or candidate == baseline:
            raise Y.node_error(items["candidate"], f"'gate: candidate' {candidate!r} must be "
                               f"another level of {factor}; levels: {', '.join(levels)}")
    else:
        others = [lv for lv in levels if lv != baseline]
        if len(others) != 1:
            raise Y.node_error(items["factor"], f"factor {factor} has {len(levels)} levels; say "
                               "which one is the candidate with 'gate: candidate: LEVEL'")
        candidate = others[0]
    kw: dict = {}
    if "tolerance" in items:
        kw["tolerance"] = Y.as_percent(items["tolerance"], "'gate: tolerance'")
        if not 0 < kw["tolerance"] < 1:
            raise Y.node_error(items["tolerance"], "'gate: tolerance' must be above 0% and "
                               "below 100%, e.g. 5%")
    if "confidence" in items:
        c = Y.as_percent(items["confidence"], "'gate: confidence'")
        if not 0.5 < c < 1:
            raise Y.node_error(items["confidence"], "'gate: confidence' must be between 0.5 "
                               "and 1, e.g. 0.95")
        kw["confidence"] = c
    if "max_runs" in items:
        kw["max_runs"] = Y.as_int(items["max_runs"], "'gate: max_runs'", minimum=2)
    if "min_runs" in items:
        kw["min_runs"] = Y.as_int(items["min_runs"], "'gate: min_runs'", minimum=2)
    response = "wall_s"
    if "response" in items:
        response = Y.scalar_text(items["response"], "'gate: response'")
    if "direction" in items:
        d = Y.scalar_text(items["direction"], "'gate: direction'")
        if d not in ("lower", "higher"):
            raise Y.node_error(items["direction"], "'gate: direction' must be lower (times: "
                               "lower is better) or higher (throughput: higher is better)")
        kw["higher_is_better"] = d == "higher"
    inconclusive = None
    if "inconclusive" in items:
        inconclusive = Y.scalar_text(items["inconclusive"], "'gate: inconclusive'")
        if inconclusive not in ("pass", "fail", "distinct"):
            raise Y.node_error(items["inconclusive"], "'gate: inconclusive' must be pass, fail "
                               "or distinct")
        inconclusive = None if inconclusive == "distinct" else inconclusive
    o = {k: v for k, v in (overrides or {}).items() if v is not None}
    if "response" in o:
        response = o.pop("response")
    _check_response(exp, response, None if "response" in (overrides or {}) and
                    (overrides or {}).get("response") is not None else items.get("response"))
    _check_ratio_scale(exp, response, items.get("response") if "response" not in (
        overrides or {}) or (overrides or {}).get("response") is None else None)
    if "direction" not in items and "higher_is_better" not in o:
        # a custom metric knows its direction (metrics: NAME: {better: higher})
        if _metric_better(exp, response) == "higher":
            kw["higher_is_better"] = True
    if "inconclusive" in o:
        inconclusive = o.pop("inconclusive")
    kw.update(o)
    if kw.get("min_runs", 6) > kw.get("max_runs", 100):
        if "min_runs" in o or "max_runs" in o:  # a command-line value: no file line to name
            raise UsageError(f"--min-runs ({kw.get('min_runs', 6)}) must not exceed "
                             f"--max-runs ({kw.get('max_runs', 100)})")
        where = items.get("min_runs") or items.get("max_runs") or node
        raise Y.node_error(where, "'gate: min_runs' must not exceed 'gate: max_runs'")
    try:
        settings = GateSettings(**kw)
    except ValueError as exc:
        raise Y.node_error(node, f"'gate': {exc}") from None
    return GateConfig(factor=factor, baseline=baseline, candidate=candidate,
                      settings=settings, response=response, inconclusive=inconclusive)


def _check_response(exp, response: str, node) -> None:
    """The response must be a runs.csv figure or one of the experiment's metrics."""
    from benchharness.measure.quality import response_columns

    known = response_columns(exp)
    if response in known or (response.startswith("perf_") and "perf" in exp.sections):
        return
    from benchharness.experiment.yamlnodes import node_error, suggest

    hint = suggest(response, known)
    msg = (f"the gate's response {response!r} is not measured by this experiment; "
           + (hint.replace("known keys", "known responses") if hint else
              "use one of: " + ", ".join(known))
           + " (a custom metric needs a 'metrics:' entry in an experiment file)")
    if node is not None:
        raise node_error(node, msg)
    raise UsageError(f"--response: {msg}")


def _check_ratio_scale(exp, response: str, node) -> None:
    """The gate judges slowdown ratios on the log scale: refuse a metric whose unit is a difference.

    One scale per response (``benchharness.analysis.transform``): a metric declared
    in a unit that is a difference or an interval scale (°C, a change in ms) has no
    meaningful ratio, so a ratio gate could not decide anything true about it.
    """
    from benchharness.measure.quality import quality_config

    metrics = quality_config(exp).metrics
    unit = next((m.unit for m in (metrics.metrics if metrics is not None else ())
                 if m.name == response), None)
    if unit is None:
        return
    from benchharness.analysis.transform import ratio_scaled

    is_ratio, why = ratio_scaled(unit)
    if is_ratio:
        return
    msg = (f"the gate judges slowdown ratios on the log scale, but the response {response!r}: "
           f"{why}, where ratios mean nothing; gate on a ratio-scaled response (a time, a size, "
           "a rate) or compare this one with `benchharness analyze`")
    if node is not None:
        from benchharness.experiment.yamlnodes import node_error

        raise node_error(node, msg)
    raise UsageError(f"--response: {msg}")


def _metric_better(exp, response: str) -> str | None:
    from benchharness.measure.quality import quality_config

    metrics = quality_config(exp).metrics
    for m in (metrics.metrics if metrics is not None else ()):
        if m.name == response:
            return m.better
    return None


def quick_experiment_text(baseline_cmd: str, candidate_cmd: str, warmup: int = 1,
                          timeout: str | None = None, name: str = "gate") -> str:
    """Experiment file for the quick form: factor ``build`` with the two commands."""
    for what, cmd in (("--baseline", baseline_cmd), ("--candidate", candidate_cmd)):
        if not cmd or not cmd.strip():
            raise UsageError(f"{what}: give the command to run, e.g. {what} './app --input x'")
        try:
            shlex.split(cmd)
        except ValueError as exc:
            raise UsageError(f"{what} {cmd!r}: cannot be split into words ({exc})") from None
    lines = [
        f"experiment: {name}",
        "about: Regression gate (quick form) - is the candidate slower than the baseline?",
        "command: [/bin/sh, -c, \"{build.cmd}\"]",
        "factors:",
        "  build:",
        f"    baseline: {{cmd: {json.dumps(baseline_cmd)}}}",
        f"    candidate: {{cmd: {json.dumps(candidate_cmd)}}}",
        f"warmup: {int(warmup)}",
        "gate: {factor: build, baseline: baseline, candidate: candidate}",
    ]
    if timeout:
        lines.append(f"timeout: {timeout}")
    return "\n".join(lines) + "\n"


def workloads_of(exp, factor: str) -> dict[str, dict[str, str]]:
    """Workload key -> levels of the other factors (their full crossing)."""
    import itertools

    others = [f for f in exp.factor_names if f != factor]
    if not others:
        return {"all": {}}
    out = {}
    for combo in itertools.product(*[exp.levels_of(f) for f in others]):
        lv = dict(zip(others, combo))
        out[" ".join(f"{k}={v}" for k, v in lv.items())] = lv
    return out


def _stored_baseline(folder, exp, cfg: GateConfig, workloads) -> dict:
    from benchharness.results.journal import load_results

    res = load_results(folder)
    runs = res.runs
    if cfg.factor in runs.columns:
        runs = runs[runs[cfg.factor].astype(str) == cfg.baseline]
    if cfg.response not in runs.columns:
        raise DataError(f"{folder}: the stored runs have no column {cfg.response!r}")
    runs = runs[runs["status"].astype(str) != "warmup"].sort_values("position")
    out = {}
    for key, lv in workloads.items():
        sel = runs
        for f, v in lv.items():
            if f not in sel.columns:
                raise DataError(f"{folder}: the stored runs have no factor {f!r}; they cannot "
                                "serve as the baseline of this gate")
            sel = sel[sel[f].astype(str) == v]
        vals = []
        for v, st in zip(sel[cfg.response], sel["status"].astype(str)):
            try:
                fv = float(v)
            except (TypeError, ValueError):
                fv = None
            vals.append((fv, st))
        out[key] = vals
    return out


class _StepRunner:
    """Executor adapter: build once per rendered form, reset/teardown around timed runs."""

    def __init__(self, exp, executor, cells, timeout_s, journal, quality=None):
        from benchharness.execute.runner import _spec

        self.quality = quality
        self.exp, self.executor, self.cells, self.timeout_s = exp, executor, cells, timeout_s
        self._spec = _spec
        self.builds: dict = {}
        self.journal = journal
        self.warm_ids: set = set()

    def execute(self, spec, on_start=None):
        from benchharness.execute.base import Measurement
        from benchharness.execute.runner import _short

        levels = dict(spec.levels)
        c = self.cells.get(levels)
        if c["build"] is not None:
            key = (c["build"], c["cwd"], tuple(sorted(c["env_over"].items())))
            if key not in self.builds:
                bm = self.executor.execute(self._spec(c["build"], c, None, levels=levels))
                self.builds[key] = "" if bm.status == "ok" else f"build failed: {_short(bm)}"
            if self.builds[key]:
                return Measurement(status="failed", exit_code=None, wall_s=None,
                                   message=self.builds[key])
        warm = spec.run_id in self.warm_ids
        if c["reset"] is not None and not warm:
            rm = self.executor.execute(self._spec(c["reset"], c, self.timeout_s, levels=levels))
            if rm.status != "ok":
                return Measurement(status="failed", exit_code=None, wall_s=None,
                                   message=f"reset failed: {_short(rm)}")

        def cb(pid, pgid):
            if self.journal is not None and spec.run_id is not None:
                self.journal.mark_inflight(spec.run_id, pid, pgid)
        token = None
        if self.quality is not None:  # metrics:, expect:, samples:, perf: as in `run`
            spec, token = self.quality.prepare(spec, levels, c)
        m = self.executor.execute(spec, on_start=cb)
        if token is not None:
            m = self.quality.finish(token, {"run": spec.run_id, "warmup": warm,
                                            "levels": levels}, m)
        if c["teardown"] is not None:
            self.executor.execute(self._spec(c["teardown"], c, self.timeout_s, levels=levels))
        return m

    def close(self):
        pass


def _all_cells(exp):
    import itertools

    names = exp.factor_names
    for combo in itertools.product(*[exp.levels_of(f) for f in names]):
        yield dict(zip(names, combo))


def run_session(exp, cfg: GateConfig, out=None, executor=None, seed: int | None = None,
                stored_baseline=None, base="results", progress=None,
                simulated: bool = False) -> tuple[GateOutcome, Path]:
    """Run a gate session into a new results folder; returns (outcome, folder)."""
    from benchharness.results import journal as J
    from benchharness.measure.host import collect_facts
    from benchharness.execute.runner import _CellCache, _record, _spec, _version, finalize

    workloads = workloads_of(exp, cfg.factor)
    settings = cfg.settings
    stored = None
    notes = []
    if stored_baseline is not None:
        stored = _stored_baseline(stored_baseline, exp, cfg, workloads)
        notes.append(CROSS_SESSION_WARNING)
    if seed is None:
        seed = exp.seed if exp.seed is not None else int.from_bytes(os.urandom(4), "little")
    folder = J.new_folder(Path(base), exp.name, out)
    lock = J.FolderLock(folder)
    own = executor is None
    if own:
        from benchharness.execute.runner import default_executor

        executor = default_executor()
    try:
        J.write_atomic(folder / "experiment.yaml", exp.source_text)
        facts = collect_facts()
        J.write_atomic(folder / "host.json", json.dumps(facts, indent=1, default=str))
        exp_dir = str(Path(exp.path).resolve().parent) if exp.path != "<string>" else os.getcwd()
        session = {"benchharness_version": _version(), "seed": seed, "order": "gate",
                   "experiment_path": str(exp.path), "experiment_dir": exp_dir,
                   "cwd": os.getcwd(), "argv": sys.argv, "started_at": J.utc_iso(),
                   "state": "running", "gate": True}
        if stored_baseline is not None:
            session["stored_baseline"] = str(stored_baseline)
        J.write_atomic(folder / "session.json", json.dumps(session, indent=1))
        J.fsync_dir(folder)
        cells = _CellCache(exp, session)
        jr = J.Journal(folder)
        quality = None
        if not simulated:
            from benchharness.measure.quality import RunQuality

            quality = RunQuality(exp, folder)
            quality.start([(lv, cells.get(lv)) for lv in _all_cells(exp)])
            notes.extend(quality.notes)
        steps = _StepRunner(exp, executor, cells, exp.timeout_s, jr, quality)
        role_level = {BASELINE: cfg.baseline, CANDIDATE: cfg.candidate}
        plan_rows = []
        counts: dict[str, int] = {}

        def make_spec(key, role, run_id, warmup=False):
            if warmup:
                steps.warm_ids.add(run_id)
            levels = dict(workloads[key])
            levels[cfg.factor] = role_level[role]
            levels = {f: levels[f] for f in exp.factor_names}
            c = cells.get(levels)
            return _spec((c["argv"], c["shell"]), c, exp.timeout_s, run_id=run_id, levels=levels)

        def on_record(r):
            m = r["measurement"]
            levels = {f: r["levels"][f] for f in exp.factor_names}
            pr = {"run": r["run"], "position": r["position"],
                  # 1-based like `run` (block 1 is the first timed block); warm-ups 0
                  "block": 0 if r["warmup"] else r["block"] + 1,
                  "replicate": 0 if r["warmup"] else r["replicate"] + 1,
                  "levels": levels, "warmup": r["warmup"]}
            status = "warmup" if r["warmup"] else m.status
            msg = m.message or ""
            if r["warmup"] and m.status != "ok":
                msg = f"warm-up run {m.status}: {msg}"
            rec = _record(pr, m, status, msg)
            rec["gate_role"] = r["role"]
            jr.append(rec)
            jr.clear_inflight()
            plan_rows.append({**{k: pr[k] for k in ("run", "position", "block", "replicate",
                                                     "warmup")}, **levels})
            counts[status] = counts.get(status, 0) + 1
            if progress is not None:
                progress(rec)

        interrupted = False
        try:
            outcome = run_gate(workloads, make_spec, steps, settings, response=cfg.response,
                               warmup=exp.warmup, seed=seed, on_record=on_record,
                               stored_baseline=stored)
        except KeyboardInterrupt:
            interrupted = True
            raise
        finally:
            jr.close()
            if quality is not None:
                quality.close()
            J.write_plan_csv(folder, exp.factor_names, plan_rows)
            finalize(folder, exp, session, facts, counts, len(plan_rows), interrupted)
            if interrupted:  # a gate is never resumed: no in-flight marker to leave behind
                (folder / "inflight").unlink(missing_ok=True)
        outcome = replace(outcome, warnings=tuple(notes) + outcome.warnings)
        from benchharness.gate.output import to_json_dict

        J.write_atomic(folder / "gate.json", json.dumps(to_json_dict(outcome, folder), indent=1))
        return outcome, folder
    finally:
        lock.release()
        if own:
            try:
                executor.close()
            except Exception:  # noqa: BLE001
                pass
