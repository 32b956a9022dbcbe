"""Executing a plan on this machine: a results folder, the plan's runs in order, resume.

The runner makes the results folder (frozen experiment, plan, session, host
facts), then hands the plan's runs, in order, to the run engine
(`benchharness.execute.engine`), which prepares, runs, records and journals
each one — build (once per distinct rendered form), reset (before every timed
run), the run itself, teardown (after every run) — and writes each finished run
to the journal before the next one starts. It works with any `Executor`
(local processes, a simulated system for tests); with a scheduler address the
runs go to the cluster coordinator (`benchharness.execute.cluster`) instead.
The runner adds what only a run of the whole plan needs: the host check once
its sample is due, stopping rules between replicates, stopping early when the
first runs of every cell failed, and progress shown while the next run
executes.

Ctrl-C stops after recording what finished: the run in flight is killed and not
recorded, the journal is synced, ``runs.csv`` exported, and the user is told how
to resume. `resume_experiment` continues a folder from its frozen
``experiment.yaml``, ``session.json`` and ``plan.csv``: it kills a process group
the dead harness left running, skips runs already in the journal (by run id),
re-does the one that was in flight, and never records a run twice.
"""

from __future__ import annotations

import json
import os
import statistics
import sys
import time
from pathlib import Path
from typing import Mapping, Sequence

from benchharness.errors import DiskFullError, ExecutionError, ResultsFolderError, is_disk_full
from benchharness.execute import collector
from benchharness.execute.base import as_executor
from benchharness.execute.engine import (MIRROR_LIMIT, Progress, RunEngine, RunOutcome, finalize,
                                         start_quality, version)
from benchharness.measure import floor as memory_floor
from benchharness.results import journal as J

__all__ = ["RunOutcome", "Progress", "PlainProgress", "RichProgress", "run_experiment",
           "resume_experiment", "default_executor", "check_controls", "disk_full_error",
           "cell_summary", "format_seconds"]

DEFAULT_BASE = Path("results")


# ---------------------------------------------------------------------------
# Progress reporting (terminal bar, plain lines for logs, or nothing: `engine.Progress`).

class PlainProgress(Progress):
    """Periodic plain lines (CI logs): at most one every ``every_s`` seconds."""

    def __init__(self, stream=None, every_s: float = 10.0):
        self.stream = stream or sys.stdout
        self.every_s = every_s

    def start(self, total, done, folder):
        self.total, self.done, self.t0, self.last = total, done, time.monotonic(), 0.0
        self.first_done = done
        print(_running(total - done, folder), file=self.stream, flush=True)

    def advance(self, record, label):
        self.done += 1
        now = time.monotonic()
        if now - self.last >= self.every_s or self.done == self.total:
            self.last = now
            el = now - self.t0
            k = self.done - self.first_done
            eta = el / k * (self.total - self.done) if k else 0.0
            print(f"[{self.done}/{self.total}] {_fmt_dur(el)} elapsed, about {_fmt_dur(eta)} "
                  f"left; last: {label} {record.get('status')}", file=self.stream, flush=True)

    def note(self, text):
        print(text, file=self.stream, flush=True)


def _running(left: int, folder) -> str:
    """The line a run (or a resume) starts with: "running 1 run into ...", or that nothing
    is left when every planned run of a resumed folder is recorded."""
    from benchharness.numbers import plural

    if left == 0:
        return f"nothing left to run: every planned run of {folder} is recorded"
    return f"running {plural(left, 'run')} into {folder}"


class RichProgress(Progress):
    """A live bar with count, elapsed, time left and the current cell."""

    def __init__(self, console=None):
        self.console = console

    def start(self, total, done, folder):
        from rich.console import Console
        from rich.progress import (BarColumn, MofNCompleteColumn, Progress as RP, TextColumn,
                                   TimeElapsedColumn, TimeRemainingColumn)

        self.console = self.console or Console(stderr=False)
        self.console.print(_running(total - done, f"[bold]{folder}[/bold]"))
        self.bar = RP(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                      TimeElapsedColumn(), TextColumn("left"), TimeRemainingColumn(),
                      TextColumn("{task.fields[cell]}"), console=self.console,
                      refresh_per_second=4, transient=False)
        self.bar.start()
        self.task = self.bar.add_task("runs", total=total, completed=done, cell="")

    def advance(self, record, label):
        self.bar.update(self.task, advance=1, cell=label)

    def note(self, text):
        self.bar.console.print(text)

    def stop(self):
        self.bar.stop()


def _fmt_dur(s: float) -> str:
    s = int(round(s))
    if s < 60:
        return f"{s}s"
    if s < 3600:
        return f"{s // 60}m{s % 60:02d}s"
    return f"{s // 3600}h{(s % 3600) // 60:02d}m"


# ---------------------------------------------------------------------------

def default_executor(wait: bool = True):
    from benchharness.execute.local import LocalExecutor

    return LocalExecutor(wait=wait)


def run_experiment(exp, out=None, executor=None, base: str | os.PathLike = DEFAULT_BASE,
                   seed: int | None = None, progress: Progress | None = None,
                   plan=None, scheduler: str | None = None,
                   same_host_ok: bool = False, budget_s: float | None = None,
                   estimate_s: float | None = None, early_stop: bool = False) -> RunOutcome:
    """Plan and execute ``exp`` into a new results folder.

    ``executor``: any `Executor` (default: local processes through the
    launcher). ``scheduler``: address of a Dask scheduler to spread the runs
    over its workers instead (blocks are assigned to hosts whole).
    ``early_stop``: stop once the first runs of every cell failed the same way
    (`benchharness.execute.early_stop`); `benchharness run` turns it on.
    """
    if isinstance(exp, (str, os.PathLike)):
        from benchharness.experiment.file import load_experiment

        exp = load_experiment(exp)
    exp_for_plan, notes, plan_kwargs = _plan_order(exp, plan, scheduler, budget_s)
    from benchharness.experiment.sections import validate_sections

    validate_sections(exp)  # malformed capability sections fail before a folder exists
    # The launcher's interpreter, and the git processes that record the source
    # tree's state, start while the plan, folder and host facts are made.
    early = default_executor(wait=False) if executor is None and not scheduler else None
    if not scheduler:
        from benchharness.measure.provenance import prefetch_git

        prefetch_git(Path(exp.path).resolve().parent if exp.path != "<string>" else os.getcwd())
    try:
        with collector.paused():   # until the runs start: set-up makes no garbage
            return _run_new(exp, exp_for_plan, notes, out, early or executor, early is not None,
                            base, seed, progress, plan, plan_kwargs, scheduler, same_host_ok,
                            budget_s, estimate_s, early_stop)
    finally:
        if early is not None:
            early.close()  # already closed when the run went through


def _plan_order(exp, plan, scheduler, budget_s):
    """The experiment to plan from (its order changed where blocks must be whole),
    the notes saying so, and the plan's keyword arguments."""
    import dataclasses

    notes = []
    exp_for_plan = exp
    if scheduler and plan is None and exp.order == "randomized":
        # Hosts receive complete blocks, so each replicate becomes a block.
        exp_for_plan = dataclasses.replace(exp, order="blocked")
        notes.append("on a cluster each replicate is run as a complete block on one host "
                     "(order: blocked), so that hosts are blocks of the design")
    # Adaptive replicates and time budgets decide between complete replicates
    # (benchharness.design.sequential): each replicate runs as one block.
    from benchharness.design.adaptive import adaptive_rule

    rule = adaptive_rule(exp)
    plan_kwargs = {}
    if rule is not None or budget_s is not None:
        if scheduler:
            from benchharness.errors import UsageError

            raise UsageError("adaptive replicates and --budget decide on one machine between "
                             "replicates; drop --scheduler for this experiment")
        if exp.order != "blocked" and plan is None:
            exp_for_plan = dataclasses.replace(exp, order="blocked")
            notes.append("each replicate runs as a complete block (order: blocked), so the run "
                         "can stop between replicates")
        if rule is not None:
            plan_kwargs["replicates"] = rule.max_replicates
    return exp_for_plan, notes, plan_kwargs


class _HostCheck:
    """The host check of a new folder: its busy-process sample spans the set-up
    (and the first runs, when those take less than its interval) instead of a
    sleep of its own; ``host.json`` is written with its warnings once it is due."""

    def __init__(self, exp):
        from benchharness.measure.host import BusySampler, collect_facts, host_check_mode, preflight

        mode = host_check_mode(exp)
        self.exp = exp
        self.sampler = BusySampler().start_in_background() if mode != "off" else None
        self.facts = collect_facts()
        self.warnings = None
        if mode == "strict":  # before the folder exists, since it may refuse to start
            self.warnings = preflight(exp, self.facts, busy_sampler=self.sampler)
        self.due = (self.sampler.due if self.sampler is not None and self.warnings is None
                    else 0.0)
        self.folder = None

    def __call__(self, exclude=()):
        """Write host.json with the warnings (``exclude``: our own helper processes)."""
        from benchharness.measure.host import preflight

        if self.warnings is None and self.sampler is not None:
            self.sampler.exclude_pids(exclude)
        self.facts["warnings"] = (self.warnings if self.warnings is not None
                                  else preflight(self.exp, self.facts,
                                                 busy_sampler=self.sampler))
        J.write_atomic(self.folder / "host.json",
                       json.dumps(self.facts, indent=1, default=str))


def _run_new(exp, exp_for_plan, notes, out, executor, own_executor, base, seed, progress, plan,
             plan_kwargs, scheduler, same_host_ok, budget_s, estimate_s,
             early_stop=False) -> RunOutcome:
    """`run_experiment` once the experiment is validated (see there)."""
    from benchharness.design import build_plan

    host = _HostCheck(exp)
    plan = plan or build_plan(exp_for_plan, seed=seed, **plan_kwargs)
    check_controls(exp, plan.runs)
    folder, lock = _start_folder(base, exp.name, out)
    try:
        session = _session_record(exp, plan, seed, scheduler, budget_s)
        folder = _write_new_folder(folder, base, out, exp, plan, session, host, scheduler)
        planned = [{"run": d["run"], "position": d["position"], "block": d["block"],
                    "replicate": d["replicate"], "warmup": d["warmup"], "levels": d["levels"]}
                   for d in (r.__dict__ for r in plan.runs)]   # no attribute look-ups
        if scheduler:
            from benchharness.execute.cluster import execute_on_cluster

            collector.settle()
            outcome = execute_on_cluster(folder, exp, planned, set(), session, progress,
                                         host.facts, scheduler, same_host_ok=same_host_ok)
        else:
            from benchharness.design.sequential import gate_for

            gate = gate_for(exp, plan, folder, budget_s, estimate_s)
            outcome = _execute(folder, exp, planned, set(), session, executor, progress,
                               host.facts, stop_check=gate, host_check=host,
                               own_executor=own_executor, early_stop=early_stop)
        outcome.notes[:0] = notes
        return outcome
    finally:
        lock.release()


def _start_folder(base, name, out):
    """A hidden folder, named only once it can be resumed (`journal.start_folder`), locked."""
    try:
        folder = J.start_folder(Path(base), name, out)
    except OSError as e:
        if is_disk_full(e):
            raise _no_room_to_start(base, out) from None
        raise
    try:
        return folder, J.FolderLock(folder)
    except BaseException as e:
        J.discard_start(folder)
        if is_disk_full(e):
            raise _no_room_to_start(base, out) from None
        raise


def _session_record(exp, plan, seed, scheduler, budget_s) -> dict:
    """What ``session.json`` says at the start of a run."""
    exp_dir = (str(Path(exp.path).resolve().parent) if exp.path != "<string>"
               else os.getcwd())
    session = {
        "benchharness_version": version(),
        "seed": plan.seed,
        "seed_drawn": exp.seed is None and seed is None,
        "order": plan.order,
        "experiment_path": str(exp.path),
        "experiment_dir": exp_dir,
        "cwd": os.getcwd(),
        "argv": sys.argv,
        "started_at": J.utc_iso(),
        "state": "running",
        "runs_planned": len(plan.runs),
        "roles": _roles(exp),
        "experiment_sha256": J.experiment_digest(exp.source_text),
    }
    if scheduler:
        session["scheduler"] = scheduler
    if budget_s is not None:
        session["budget_s"] = budget_s
    return session


def _write_new_folder(folder, base, out, exp, plan, session, host, scheduler) -> Path:
    """Write the frozen inputs, then give the folder its name; nothing is left
    behind when that fails (nothing was measured in it)."""
    published = False
    try:
        J.write_atomic(folder / "experiment.yaml", exp.source_text)
        J.write_plan_csv(folder, exp.factor_names, plan.runs)  # per-cell columns formatted once
        if plan.info:
            J.write_atomic(folder / "design.json", json.dumps(plan.info, indent=1, default=str))
        J.write_atomic(folder / "session.json", json.dumps(session, indent=1))
        host.folder = folder
        if scheduler:
            host()
        (folder / "runs.jsonl").touch()
        J.fsync_dir(folder)
        folder = J.publish_folder(folder, Path(base), exp.name, out)
        host.folder = folder
        published = True
        return folder
    except BaseException as e:
        if not published:
            J.discard_start(folder)
        if is_disk_full(e):
            raise _no_room_to_start(base, out) from None
        raise


def resume_experiment(folder, executor=None, progress: Progress | None = None,
                      scheduler: str | None = None, same_host_ok: bool = False,
                      early_stop: bool = False) -> RunOutcome:
    """Continue an interrupted results folder; never records a run twice."""
    folder = Path(folder)
    lock = _lock_for_resume(folder)
    try:
        with collector.paused():   # until the runs start: set-up makes no garbage
            return _resume(folder, executor, progress, scheduler, same_host_ok, early_stop)
    finally:
        lock.release()


def _resume(folder, executor, progress, scheduler, same_host_ok, early_stop) -> RunOutcome:
    """`resume_experiment` once the folder is locked (see there)."""
    notes = []
    killed = J.kill_leftover(folder)
    if killed:
        notes.append(killed)
    exp, session, planned, records = _resume_state(folder, notes)
    try:
        facts = json.loads((folder / "host.json").read_text())
    except (OSError, json.JSONDecodeError):
        facts = {}
    done = {int(r["run"]) for r in records}
    if scheduler:
        from benchharness.execute.cluster import execute_on_cluster

        collector.settle()
        outcome = execute_on_cluster(folder, exp, planned, done, session, progress,
                                     facts.get("coordinator", facts), scheduler,
                                     same_host_ok=same_host_ok, prior=records,
                                     known_hosts=facts.get("hosts"))
    else:
        planned, gate = _resume_stopping_rule(folder, exp, session, planned)
        outcome = _execute(folder, exp, planned, done, session, executor, progress, facts,
                           prior=records, stop_check=gate, early_stop=early_stop)
    outcome.notes[:0] = notes
    return outcome


def _lock_for_resume(folder: Path):
    if folder.is_dir() and not J.is_results_folder(folder) and not any(folder.iterdir()):
        raise ResultsFolderError(f"{folder}: is empty: the run that made it was stopped before "
                                 "it wrote anything, so nothing was measured; start it again "
                                 f"with `benchharness run FILE --out {folder}`")
    if not J.is_results_folder(folder):
        raise ResultsFolderError(f"{folder}: not a results folder (no experiment.yaml and "
                                 "runs.jsonl); give the folder an earlier `benchharness run` "
                                 "made")
    try:
        J.check_writable(folder)
        return J.FolderLock(folder)
    except OSError as e:
        if is_disk_full(e):
            raise disk_full_error(folder, e) from None
        raise


def _resume_state(folder: Path, notes: list):
    """The frozen experiment, the session (marked running again), the plan and the journal."""
    from benchharness.experiment.file import load_experiment

    exp = load_experiment(folder / "experiment.yaml")
    session = J.read_session(folder)
    J.check_frozen(folder, exp, session)
    planned = J.read_plan_csv(folder, exp.factor_names)
    J.check_levels(folder, exp, planned)
    records = J.read_journal(folder / "runs.jsonl", repair=True, notes=notes)
    J.check_levels(folder, exp, records)
    session["state"] = "running"
    session.setdefault("resumed_at", []).append(J.utc_iso())
    try:
        J.write_atomic(folder / "session.json", json.dumps(session, indent=1))
    except OSError as e:
        if is_disk_full(e):
            raise disk_full_error(folder, e, len(planned)) from None
        raise
    return exp, session, planned, records


def _resume_stopping_rule(folder: Path, exp, session: dict, planned: list):
    """The runs a resume may still make, and the stopping rule that goes on deciding."""
    if session.get("stopped"):
        # A stopping rule or budget ended this folder: never run past it.
        last = int(session["stopped"]["replicates"])
        return [pr for pr in planned if pr["warmup"] or int(pr["replicate"]) <= last], None
    from benchharness.design.adaptive import adaptive_rule
    from benchharness.design.sequential import ReplicateGate

    rule = adaptive_rule(exp)
    if rule is None and session.get("budget_s") is None:
        return planned, None
    cells = list({tuple(sorted(pr["levels"].items())): pr["levels"]
                  for pr in planned}.values())
    return planned, ReplicateGate(folder, {f.name: list(f.labels) for f in exp.factors},
                                  cells, rule, session.get("budget_s"))


def check_controls(exp, runs) -> None:
    """Render and check the noise controls of every cell before anything runs."""
    from benchharness.execute.controls import parse_controls, resolve_cell

    controls = parse_controls(exp)
    if controls.pin or controls.nice:
        seen = set()
        for r in runs:
            levels = r.levels if hasattr(r, "levels") else r["levels"]
            key = tuple(sorted(levels.items()))
            if key not in seen:
                seen.add(key)
                resolve_cell(exp, controls, levels)


# ---------------------------------------------------------------------------
# The plan's runs on this machine, in order, through the run engine.

def _execute(folder: Path, exp, planned: Sequence[Mapping], done: set, session: dict,
             executor, progress: Progress | None, facts: dict, prior=(),
             stop_check=None, host_check=None, own_executor: bool = False,
             early_stop: bool = False) -> RunOutcome:
    """Run the planned runs not in ``done`` (see `_LocalRun`)."""
    if executor is None:
        own_executor = True
        executor = default_executor()
    run = _LocalRun(folder, exp, planned, done, session, as_executor(executor),
                    progress or Progress(), facts, prior, stop_check, host_check, own_executor,
                    early_stop)
    return run.execute()


class _LocalRun:
    """One pass over the plan's remaining runs: set up, loop, clean up, finish.

    ``stop_check``: a stopping rule asked before each run (`design.sequential`);
    ``host_check``: the new folder's host check, called once its sample is due;
    ``early_stop``: stop once the first runs of every cell failed the same way.
    """

    def __init__(self, folder, exp, planned, done, session, executor, progress, facts, prior,
                 stop_check, host_check, own_executor, early_stop):
        self.folder, self.exp, self.planned, self.done = folder, exp, planned, done
        self.session, self.executor, self.progress, self.facts = session, executor, progress, facts
        self.prior, self.stop_check, self.host_check = prior, stop_check, host_check
        self.own_executor = own_executor
        self.todo = [pr for pr in planned if int(pr["run"]) not in done]
        self.watch = None
        if early_stop:
            from benchharness.execute.early_stop import FirstRunsWatch

            self.watch = FirstRunsWatch(pr["levels"] for pr in self.todo)
        self.stopped_early = None
        self.interrupted = False
        self.disk_full = None
        self.stop_notes: list = []
        self.mirror = None
        self.shown: list = []   # finished runs whose progress waits for the next run's start
        self.host_due = getattr(host_check, "due", 0.0) if host_check is not None else 0.0
        self.pending_host = True

    # -- set up ----------------------------------------------------------------

    def _start(self) -> None:
        from benchharness.execute.cells import CellCache

        self.jr = J.Journal(self.folder)
        self.progress.start(len(self.planned), len(self.planned) - len(self.todo), self.folder)
        cells = CellCache(self.exp, self.session)
        self.quality = start_quality(self.exp, self.folder, cells, self.planned)
        if time.monotonic() >= self.host_due:
            self._host_warnings_now()
        for note in self.quality.notes:
            self.progress.note(note)
        self.quality.notes.clear()
        self.engine = RunEngine(self.exp, self.folder, self.session, self.executor, self.jr,
                                quality=self.quality, cells=cells, resumed=len(self.done),
                                note=self.progress.note)
        for r in self.prior:
            self.engine.count(r["status"])

    def _host_warnings_now(self) -> None:
        # host_check: the run's host check, due once its busy-process sample has
        # lasted long enough; runs may already have started (warn mode only).
        self.pending_host = False
        if self.host_check is not None:
            pid = self.executor.launcher_pid
            self.host_check([pid] if pid else [])
        if not self.done:  # a fresh folder: show the host warnings found at its start
            for w in self.facts.get("warnings") or []:
                if isinstance(w, dict) and w.get("severity") == "warning":
                    self.progress.note(f"warning: {w['message']}; fix: {w['fix']}")

    def _tick(self) -> None:
        if self.pending_host and time.monotonic() >= self.host_due:
            self._host_warnings_now()

    # -- the loop ----------------------------------------------------------------

    def execute(self) -> RunOutcome:
        self._start()
        try:
            self._loop()
            self.jr.clear_inflight()
        except KeyboardInterrupt:
            self.interrupted = True
            self.engine.stop_inflight()
            self.jr.clear_inflight()
        except ExecutionError as e:
            # The launcher died (killed, crashed): its run was stopped by the
            # executor where it could be identified; what finished is recorded.
            note = self.executor.stopped_runs
            raise ExecutionError(f"{e}{'; ' + note if note else ''}; the runs that finished "
                                 "are recorded: continue with `benchharness run --resume "
                                 f"{self.folder}`") from None
        except OSError as e:
            if not is_disk_full(e):
                raise
            self.disk_full = e  # said once the journal is closed; it holds whole lines
        finally:
            self._clean_up(failing=sys.exc_info()[0] is not None)
        return self._finish()

    def _loop(self) -> None:
        eng = self.engine
        collector.settle()   # the runs start: the collector back on, set-up's objects frozen
        memory_floor.record(self.session, self.executor.memory_floor)  # session.json
        if eng.can_queue(self.stop_check is not None):
            self.mirror = J.JournalMirror(self.jr.path, MIRROR_LIMIT, self.exp.factor_names,
                                          self.prior, memory_floor.floor_kib(self.session))
            self.stopped_early = eng.run_queued(self.todo, self.progress, self._tick,
                                                self.mirror, self.watch)
            self._stopping_rule_done()
            return
        for index, pr in enumerate(self.todo):
            self._tick()
            if self._stopping_rule_says(pr):
                return
            if self._one(pr, index):
                return
        self._stopping_rule_done()

    def _stopping_rule_says(self, pr) -> bool:
        if self.stop_check is None:
            return False
        why = self.stop_check.before_run(pr)
        if why:
            self.stop_notes.append(why)
        return bool(why)

    def _stopping_rule_done(self) -> None:
        if self.stop_check is not None and not self.stopped_early:
            final = self.stop_check.finish()
            if final:
                self.stop_notes.append(final)

    def _one(self, pr, index: int) -> bool:
        """Run one planned run through the engine; True when the run must stop early."""
        eng = self.engine
        c = eng.cells.get(pr["levels"])
        if self.shown and (c["build"] is not None or c["reset"] is not None):
            self._show_progress()
        nxt = self.todo[index + 1] if index + 1 < len(self.todo) else None
        rec = eng.run(pr, next_pr=nxt, during=self._show_progress)
        if self.watch is not None:
            self.stopped_early = self.watch.observe(rec)
        if eng.overlap:
            # shown while the next run executes: the bar is not on the path
            # from one run's end to the next one's start
            self.shown.append((rec, c["label"]))
        else:
            self.progress.advance(rec, c["label"])
        return bool(self.stopped_early)

    def _show_progress(self) -> None:
        while self.shown:
            rec, label = self.shown.pop(0)
            self.progress.advance(rec, label)

    # -- clean up and finish -------------------------------------------------------

    def _clean_up(self, failing: bool) -> None:
        if self.mirror is not None and failing:
            self.mirror.drop()  # an error is on its way out: no half runs.csv stays behind
        try:
            self._show_progress()
        except Exception:  # noqa: BLE001 - a display problem must not lose the journal
            pass
        if self.pending_host:  # fewer runs than the sample's interval: finish it now
            try:
                self._host_warnings_now()
            except Exception:  # noqa: BLE001 - host.json stays without warnings
                pass
        self.progress.stop()
        self.jr.close()
        try:
            self.quality.close()
        except OSError as e:
            if not is_disk_full(e) or failing:
                raise
            self.disk_full = self.disk_full or e
        if self.own_executor:
            try:
                self.executor.close()
            except Exception:  # noqa: BLE001 - the launcher may already be gone after ^C
                pass

    def _finish(self) -> RunOutcome:
        if self.disk_full is not None:
            if self.mirror is not None:
                self.mirror.drop()
            raise disk_full_error(self.folder, self.disk_full, len(self.planned))
        if self.stop_check is not None and self.stop_check.stopped:
            self.session["stopped"] = self.stop_check.stopped
        if self.stopped_early:
            self.session.setdefault("stopped_early", []).append(
                {"reason": self.stopped_early, "at": J.utc_iso()})
        known, csv_ready = self._mirrored_records()
        try:
            outcome = finalize(self.folder, self.exp, self.session, self.facts,
                               self.engine.counts, len(self.planned), self.interrupted,
                               quality=self.quality, records=known, runs_csv_written=csv_ready,
                               state="stopped early" if self.stopped_early else None)
        except OSError as e:
            if not is_disk_full(e):
                raise
            raise disk_full_error(self.folder, e, len(self.planned)) from None
        outcome.notes.extend(self.stop_notes)
        outcome.stopped_early = self.stopped_early
        return outcome

    def _mirrored_records(self):
        """The journal's records kept while queued runs went, and whether runs.csv is written."""
        if self.mirror is None:
            return None, False
        known, csv_ready = None, False
        n = len(self.prior) + len(self.todo)
        if not self.interrupted and n <= MIRROR_LIMIT:
            new = self.mirror.verified()
            if new is not None and len(new) == len(self.todo):
                known = [*self.prior, *new]
                csv_ready = self.mirror.commit_csv(known)
        self.mirror.drop()
        return known, csv_ready


def _no_room_to_start(base, out) -> DiskFullError:
    where = Path(out).absolute().parent if out is not None else Path(base)
    return DiskFullError(f"the disk is full: no space left on the device holding {where} to set "
                         "up the results folder; nothing was run. Free some space and run the "
                         "command again")


def disk_full_error(folder: Path, exc: OSError, planned: int | None = None) -> DiskFullError:
    """The one line said when the disk fills during a run: where, what is safe, how to go on.

    The journal holds whole lines only (a line whose write failed is cut off
    again), so every run it holds is kept and `resume_experiment` continues
    from there once space is freed.
    """
    try:
        n = len(J.read_journal(Path(folder) / "runs.jsonl"))
        safe = f"{n} of {planned} runs are recorded there and safe" if planned else \
            f"{n} runs are recorded there and safe"
    except Exception:  # noqa: BLE001 - the message must come out whatever the folder holds
        safe = "the runs are recorded there and safe"
    what = f" (writing {Path(exc.filename).name})" if getattr(exc, "filename", None) else ""
    return DiskFullError(f"the disk is full: no space left on the device holding {folder}{what}; "
                         f"{safe}. Free some space, then continue with "
                         f"`benchharness run --resume {folder}`")


# ---------------------------------------------------------------------------
# The per-cell summary printed at the end of `benchharness run`.

def cell_summary(records: Sequence[Mapping], factors: Sequence[str],
                 response: str = "wall_s") -> list[dict]:
    """Per cell: ``{levels, n, median, iqr, failed, timeout}`` of the response."""
    by: dict[tuple, dict] = {}
    for r in records:
        if r.get("status") == "warmup":
            continue
        key = tuple(r["levels"][f] for f in factors)
        d = by.setdefault(key, {"values": [], "failed": 0, "timeout": 0})
        if r["status"] == "ok" and r.get(response) is not None:
            d["values"].append(float(r[response]))
        elif r["status"] == "failed":
            d["failed"] += 1
        elif r["status"] == "timeout":
            d["timeout"] += 1
    out = []
    for key, d in by.items():
        v = sorted(d["values"])
        row = {"levels": dict(zip(factors, key))}
        row["n"] = len(v)
        row["median"] = statistics.median(v) if v else None
        if len(v) >= 2:
            q = statistics.quantiles(v, n=4, method="inclusive")
            row["iqr"] = q[2] - q[0]
        else:
            row["iqr"] = None
        row["failed"] = d["failed"]
        row["timeout"] = d["timeout"]
        out.append(row)
    return out


def format_seconds(x: float | None) -> str:
    if x is None:
        return "-"
    if x < 1e-3:
        return f"{x * 1e6:.1f} µs"
    if x < 1:
        return f"{x * 1e3:.2f} ms"
    return f"{x:.3f} s"


def _roles(exp) -> dict:
    """The factors' roles, recorded in session.json (declared, or how they were guessed)."""
    from benchharness.experiment.roles import factor_roles

    return factor_roles(exp).to_dict()
