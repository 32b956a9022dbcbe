"""One gate session: from an experiment (file or quick form) to verdicts and a results folder.

This module owns the edges of the gate: building the experiment for the quick
form (the ``gate:`` section itself is parsed by `benchharness.gate.config`),
handing each run the gate loop (`benchharness.gate.orchestrate`) asks for to
the run engine (`benchharness.execute.engine`: the same commands, steps, noise
controls, quality checks and journal records as ``run``), and writing a normal results folder
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
from dataclasses import replace
from pathlib import Path

from benchharness.errors import DataError, UsageError
from benchharness.execute.base import Executor, as_executor
from benchharness.execute.engine import RunEngine, finalize, version
from benchharness.gate.config import GATE_KEYS, GateConfig, parse_gate_section
from benchharness.gate.orchestrate import BASELINE, CANDIDATE, GateOutcome, run_gate

__all__ = ["GATE_KEYS", "GateConfig", "parse_gate_section", "quick_experiment_text",
           "workloads_of", "run_session", "CROSS_SESSION_WARNING"]

CROSS_SESSION_WARNING = (
    "warning: the baseline comes from an earlier session; any difference between the two "
    "sessions (machine load, temperature, updates, another host) is mixed into the ratio. "
    "Run both builds in one gate session (interleaved) to remove it.")


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
    combos = itertools.product(*[exp.levels_of(f) for f in others])
    if getattr(exp, "space", None) is not None:    # exclude: / only_when: (design.exclude)
        from benchharness.design.exclude import space_cells

        combos = dict.fromkeys(tuple(c[f] for f in others) for c in space_cells(exp)[0])
    for combo in combos:
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


class _GateRuns(Executor):
    """The gate loop's executor: every run it asks for goes through the run engine.

    `run_gate` decides which run comes next (interleaved blocks) and calls
    `execute` with the spec ``make_spec`` gave it, which names the run and its
    levels; the engine prepares it (steps, noise controls, quality checks),
    runs it and keeps what it saw until ``on_record`` journals it at the place
    the gate gave it.
    """

    def __init__(self, engine: RunEngine):
        self.engine = engine
        self.warm_ids: set = set()
        self.ran: dict = {}   # run id -> Ran, until recorded

    def execute(self, spec, on_start=None):
        pr = {"run": spec.run_id, "warmup": spec.run_id in self.warm_ids,
              "levels": dict(spec.levels)}
        ran = self.engine.measure(pr)
        self.ran[spec.run_id] = ran
        return ran.for_decision()


def _all_cells(exp):
    import itertools

    names = exp.factor_names
    if getattr(exp, "space", None) is not None:    # the cells that exist (design.exclude)
        from benchharness.design.exclude import space_cells

        yield from space_cells(exp)[0]
        return
    for combo in itertools.product(*[exp.levels_of(f) for f in names]):
        yield dict(zip(names, combo))


def _session_record(exp, seed: int, stored_baseline) -> dict:
    """What ``session.json`` says at the start of a gate session."""
    from benchharness.results import journal as J

    exp_dir = str(Path(exp.path).resolve().parent) if exp.path != "<string>" else os.getcwd()
    session = {"benchharness_version": version(), "seed": seed, "order": "gate",
               "experiment_path": str(exp.path), "experiment_dir": exp_dir,
               "cwd": os.getcwd(), "argv": sys.argv, "started_at": J.utc_iso(),
               "state": "running", "gate": True}
    if stored_baseline is not None:
        session["stored_baseline"] = str(stored_baseline)
    return session


def run_session(exp, cfg: GateConfig, out=None, executor=None, seed: int | None = None,
                stored_baseline=None, base="results", progress=None,
                simulated: bool = False) -> tuple[GateOutcome, Path]:
    """Run a gate session into a new results folder; returns (outcome, folder)."""
    from benchharness.results import journal as J

    workloads = workloads_of(exp, cfg.factor)
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
        from benchharness.execute.local import LocalExecutor

        executor = LocalExecutor()
    try:
        gs = _GateSession(exp, cfg, folder, as_executor(executor), seed, stored_baseline,
                          simulated, progress, notes)
        outcome = gs.run(workloads, stored)
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


class _GateSession:
    """The results folder of one gate session, and the engine that fills its journal."""

    def __init__(self, exp, cfg: GateConfig, folder: Path, executor, seed: int,
                 stored_baseline, simulated: bool, progress, notes: list):
        from benchharness.execute.cells import CellCache
        from benchharness.measure.host import collect_facts
        from benchharness.results import journal as J

        self.exp, self.cfg, self.folder, self.seed = exp, cfg, folder, seed
        self.progress = progress
        J.write_atomic(folder / "experiment.yaml", exp.source_text)
        self.facts = collect_facts()
        J.write_atomic(folder / "host.json", json.dumps(self.facts, indent=1, default=str))
        self.session = _session_record(exp, seed, stored_baseline)
        J.write_atomic(folder / "session.json", json.dumps(self.session, indent=1))
        J.fsync_dir(folder)
        self.cells = CellCache(exp, self.session)
        self.jr = J.Journal(folder)
        self.quality = None
        if not simulated:
            from benchharness.measure.quality import RunQuality

            self.quality = RunQuality(exp, folder)
            self.quality.start([(lv, self.cells.get(lv)) for lv in _all_cells(exp)])
            notes.extend(self.quality.notes)
        self.engine = RunEngine(exp, folder, self.session, executor, self.jr,
                                quality=self.quality, cells=self.cells, note=notes.append)
        self.runs = _GateRuns(self.engine)
        self.role_level = {BASELINE: cfg.baseline, CANDIDATE: cfg.candidate}
        self.plan_rows: list = []

    def make_spec(self, workloads, key, role, run_id, warmup=False):
        """The spec ``run_gate`` hands back to `_GateRuns.execute`: the run and its levels."""
        if warmup:
            self.runs.warm_ids.add(run_id)
        levels = dict(workloads[key])
        levels[self.cfg.factor] = self.role_level[role]
        levels = {f: levels[f] for f in self.exp.factor_names}
        return self.engine.spec_for({"run": run_id, "levels": levels},
                                    self.cells.get(levels))

    def on_record(self, r) -> None:
        """Journal one finished run at the place the gate gave it."""
        levels = {f: r["levels"][f] for f in self.exp.factor_names}
        pr = {"run": r["run"], "position": r["position"],
              # 1-based like `run` (block 1 is the first timed block); warm-ups 0
              "block": 0 if r["warmup"] else r["block"] + 1,
              "replicate": 0 if r["warmup"] else r["replicate"] + 1,
              "levels": levels, "warmup": r["warmup"]}
        rec = self.engine.record(pr, self.runs.ran.pop(r["run"]),
                                 extra={"gate_role": r["role"]})
        self.jr.clear_inflight()
        self.plan_rows.append({**{k: pr[k] for k in ("run", "position", "block", "replicate",
                                                     "warmup")}, **levels})
        if self.progress is not None:
            self.progress(rec)

    def run(self, workloads, stored) -> GateOutcome:
        from benchharness.results import journal as J

        cfg = self.cfg
        interrupted = False
        try:
            return run_gate(workloads, lambda *a: self.make_spec(workloads, *a), self.runs,
                            cfg.settings, response=cfg.response, warmup=self.exp.warmup,
                            seed=self.seed, on_record=self.on_record, stored_baseline=stored)
        except KeyboardInterrupt:
            interrupted = True
            self.engine.stop_inflight()
            raise
        finally:
            self.jr.close()
            if self.quality is not None:
                self.quality.close()
            J.write_plan_csv(self.folder, self.exp.factor_names, self.plan_rows)
            finalize(self.folder, self.exp, self.session, self.facts, self.engine.counts,
                     len(self.plan_rows), interrupted)
            if interrupted:  # a gate is never resumed: no in-flight marker to leave behind
                (self.folder / "inflight").unlink(missing_ok=True)
