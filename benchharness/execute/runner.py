"""Executing a plan: the loop that runs, measures and journals every run.

The runner owns the order of side effects around each run — build (once per
distinct rendered form), reset (before every timed run), the run itself,
teardown (after every run) — and writes each finished run to the journal
before the next one starts. It works with any `Executor` (local processes, a
simulated system for tests, a cluster), so the same loop serves every backend.

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
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

from benchharness.results import journal as J
from benchharness.errors import DiskFullError, ExecutionError, ResultsFolderError, is_disk_full
from benchharness.execute.base import USAGE_FIELDS, Measurement, RunSpec

DEFAULT_BASE = Path("results")


@dataclass
class RunOutcome:
    """What `run_experiment` returns: where the results are and what happened."""

    folder: Path
    seed: int
    planned: int                 # runs in the plan, warm-ups included
    counts: dict = field(default_factory=dict)  # status → number of runs recorded
    interrupted: bool = False
    notes: list = field(default_factory=list)
    stopped_early: str | None = None   # why the run stopped before the plan's end (early_stop)
    _runs: object = None

    @property
    def runs(self):
        """The runs table, equal to ``runs.csv`` (factor columns as strings)."""
        if self._runs is None:
            self._runs = J.load_results(self.folder).runs
        return self._runs


# ---------------------------------------------------------------------------
# Progress reporting (terminal bar, plain lines for logs, or nothing).

class Progress:
    def start(self, total: int, done: int, folder: Path) -> None: ...
    def advance(self, record: Mapping, label: str) -> None: ...
    def note(self, text: str) -> None: ...
    def stop(self) -> None: ...


class PlainProgress(Progress):
    """Periodic plain lines (CI logs): at most one every ``every_s`` seconds."""

    def __init__(self, stream=None, every_s: float = 10.0):
        self.stream = stream or sys.stdout
        self.every_s = every_s

    def start(self, total, done, folder):
        self.total, self.done, self.t0, self.last = total, done, time.monotonic(), 0.0
        self.first_done = done
        print(f"running {total - done} runs into {folder}", file=self.stream, flush=True)

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


class RichProgress(Progress):
    """A live bar with count, elapsed, time left and the current cell."""

    def __init__(self, console=None):
        self.console = console

    def start(self, total, done, folder):
        from rich.console import Console
        from rich.progress import (BarColumn, MofNCompleteColumn, Progress as RP, TextColumn,
                                   TimeElapsedColumn, TimeRemainingColumn)

        self.console = self.console or Console(stderr=False)
        self.console.print(f"running {total - done} runs into [bold]{folder}[/bold]")
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
    import dataclasses

    if isinstance(exp, (str, os.PathLike)):
        from benchharness.experiment.file import load_experiment

        exp = load_experiment(exp)
    notes = []
    if scheduler and plan is None and exp.order == "randomized":
        # Hosts receive complete blocks, so each replicate becomes a block.
        exp_for_plan = dataclasses.replace(exp, order="blocked")
        notes.append("on a cluster each replicate is run as a complete block on one host "
                     "(order: blocked), so that hosts are blocks of the design")
    else:
        exp_for_plan = exp
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
    from benchharness.experiment.sections import validate_sections

    validate_sections(exp)  # malformed capability sections fail before a folder exists
    # The launcher's interpreter, and the git processes that record the source
    # tree's state, start while the plan, folder and host facts are made.
    early = default_executor(wait=False) if executor is None and not scheduler else None
    if not scheduler:
        from benchharness.measure.provenance import prefetch_git

        prefetch_git(Path(exp.path).resolve().parent if exp.path != "<string>" else os.getcwd())
    try:
        return _run_new(exp, exp_for_plan, notes, out, early or executor, early is not None,
                        base, seed, progress, plan, plan_kwargs, scheduler, same_host_ok,
                        budget_s, estimate_s, early_stop)
    finally:
        if early is not None:
            early.close()  # already closed when the run went through


def _run_new(exp, exp_for_plan, notes, out, executor, own_executor, base, seed, progress, plan,
             plan_kwargs, scheduler, same_host_ok, budget_s, estimate_s,
             early_stop=False) -> RunOutcome:
    """`run_experiment` once the experiment is validated (see there)."""
    from benchharness.design import build_plan
    from benchharness.measure.host import BusySampler, collect_facts, host_check_mode, preflight

    # The busy-process sample spans the setup below instead of a sleep of its
    # own: started first, read once the folder is written (strict mode: before
    # the folder exists, since it may refuse to start).
    mode = host_check_mode(exp)
    sampler = BusySampler().start_in_background() if mode != "off" else None
    start_facts = collect_facts()
    host_warnings = None
    if mode == "strict":
        host_warnings = preflight(exp, start_facts, busy_sampler=sampler)  # may stop here
    plan = plan or build_plan(exp_for_plan, seed=seed, **plan_kwargs)
    check_controls(exp, plan.runs)
    # Set up in a hidden folder, named only once it can be resumed (journal.start_folder).
    try:
        folder = J.start_folder(Path(base), exp.name, out)
    except OSError as e:
        if is_disk_full(e):
            raise _no_room_to_start(base, out) from None
        raise
    try:
        lock = J.FolderLock(folder)
    except BaseException as e:
        J.discard_start(folder)
        if is_disk_full(e):
            raise _no_room_to_start(base, out) from None
        raise
    try:
        published = False
        try:
            J.write_atomic(folder / "experiment.yaml", exp.source_text)
            J.write_plan_csv(folder, exp.factor_names, plan.rows())
            if plan.info:
                J.write_atomic(folder / "design.json", json.dumps(plan.info, indent=1,
                                                                  default=str))

            exp_dir = (str(Path(exp.path).resolve().parent) if exp.path != "<string>"
                       else os.getcwd())
            session = {
                "benchharness_version": _version(),
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
            J.write_atomic(folder / "session.json", json.dumps(session, indent=1))
            facts = start_facts

            def write_host_json(exclude=()):
                # Called once the busy-process sample is due (it then spans the folder
                # set-up, provenance, the launcher's start and, when those take less
                # than the sample's interval, the first runs; ``exclude``: our launcher).
                if host_warnings is None and sampler is not None:
                    sampler.exclude_pids(exclude)
                facts["warnings"] = (host_warnings if host_warnings is not None
                                     else preflight(exp, facts, busy_sampler=sampler))
                J.write_atomic(folder / "host.json", json.dumps(facts, indent=1, default=str))

            write_host_json.due = (sampler.due if sampler is not None and host_warnings is None
                                   else 0.0)
            if scheduler:
                write_host_json()
            (folder / "runs.jsonl").touch()
            J.fsync_dir(folder)
            folder = J.publish_folder(folder, Path(base), exp.name, out)
            published = True
        except BaseException as e:
            if not published:
                J.discard_start(folder)  # nothing was measured in it
            if is_disk_full(e):
                raise _no_room_to_start(base, out) from None
            raise
        planned = [{"run": r.run, "position": r.position, "block": r.block,
                    "replicate": r.replicate, "warmup": r.warmup, "levels": dict(r.levels)}
                   for r in plan.runs]
        if scheduler:
            from benchharness.execute.cluster import execute_on_cluster

            outcome = execute_on_cluster(folder, exp, planned, set(), session, progress, facts,
                                         scheduler, same_host_ok=same_host_ok)
        else:
            from benchharness.design.sequential import gate_for

            gate = gate_for(exp, plan, folder, budget_s, estimate_s)
            outcome = _execute(folder, exp, planned, set(), session, executor, progress, facts,
                               stop_check=gate, host_check=write_host_json,
                               own_executor=own_executor, early_stop=early_stop)
        outcome.notes[:0] = notes
        return outcome
    finally:
        lock.release()


def resume_experiment(folder, executor=None, progress: Progress | None = None,
                      scheduler: str | None = None, same_host_ok: bool = False,
                      early_stop: bool = False) -> RunOutcome:
    """Continue an interrupted results folder; never records a run twice."""
    from benchharness.experiment.file import load_experiment

    folder = Path(folder)
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
        lock = J.FolderLock(folder)
    except OSError as e:
        if is_disk_full(e):
            raise disk_full_error(folder, e) from None
        raise
    try:
        notes = []
        killed = J.kill_leftover(folder)
        if killed:
            notes.append(killed)
        exp = load_experiment(folder / "experiment.yaml")
        session = J.read_session(folder)
        J.check_frozen(folder, exp, session)
        planned = J.read_plan_csv(folder, exp.factor_names)
        J.check_levels(folder, exp, planned)
        records = J.read_journal(folder / "runs.jsonl", repair=True, notes=notes)
        J.check_levels(folder, exp, records)
        done = {int(r["run"]) for r in records}
        session["state"] = "running"
        session.setdefault("resumed_at", []).append(J.utc_iso())
        try:
            J.write_atomic(folder / "session.json", json.dumps(session, indent=1))
        except OSError as e:
            if is_disk_full(e):
                raise disk_full_error(folder, e, len(planned)) from None
            raise
        try:
            facts = json.loads((folder / "host.json").read_text())
        except (OSError, json.JSONDecodeError):
            facts = {}
        if scheduler:
            from benchharness.execute.cluster import execute_on_cluster

            outcome = execute_on_cluster(folder, exp, planned, done, session, progress,
                                         facts.get("coordinator", facts), scheduler,
                                         same_host_ok=same_host_ok, prior=records,
                                         known_hosts=facts.get("hosts"))
        else:
            gate = None
            if session.get("stopped"):
                # A stopping rule or budget ended this folder: never run past it.
                last = int(session["stopped"]["replicates"])
                planned = [pr for pr in planned
                           if pr["warmup"] or int(pr["replicate"]) <= last]
            else:
                from benchharness.design.sequential import ReplicateGate
                from benchharness.design.adaptive import adaptive_rule

                rule = adaptive_rule(exp)
                if rule is not None or session.get("budget_s") is not None:
                    cells = list({tuple(sorted(pr["levels"].items())): pr["levels"]
                                  for pr in planned}.values())
                    gate = ReplicateGate(folder, {f.name: list(f.labels) for f in exp.factors},
                                         cells, rule, session.get("budget_s"))
            outcome = _execute(folder, exp, planned, done, session, executor, progress, facts,
                               prior=records, stop_check=gate, early_stop=early_stop)
        outcome.notes[:0] = notes
        return outcome
    finally:
        lock.release()


def _version() -> str:
    from benchharness import __version__

    return __version__


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


class _CellCache:
    """Rendered command, environment and steps per cell (computed once per cell)."""

    def __init__(self, exp, session: Mapping, extra_env: Mapping[str, str] | None = None):
        from benchharness.execute.controls import parse_controls

        self.exp = exp
        self.factor_names = tuple(exp.factor_names)
        self.cache: dict[tuple, dict] = {}
        self.controls = parse_controls(exp)
        if self.controls.clean_env:
            from benchharness.execute.envs import clean_environment

            self.base_env = clean_environment(os.environ)
        else:
            self.base_env = dict(os.environ)
        self.exp_dir = session.get("experiment_dir") or os.getcwd()
        self.cwd = session.get("cwd") or os.getcwd()

    def get(self, levels: Mapping[str, str]) -> dict:
        key = tuple([levels[f] for f in self.factor_names])
        c = self.cache.get(key)
        if c is None:
            exp = self.exp
            env_over = exp.render_env(levels)
            env = dict(self.base_env)
            env.update(env_over)
            wd = exp.render_workdir(levels)
            cwd = self.cwd if wd is None else str(Path(self.exp_dir, wd))
            argv, shell = exp.render_command(exp.command, levels)
            from benchharness.execute.controls import resolve_cell

            ctl = resolve_cell(exp, self.controls, levels)
            c = {"cpus": ctl["cpus"], "nice": ctl["nice"], "no_aslr": self.controls.aslr_off,
                 "argv": argv, "shell": shell, "env": env, "env_over": env_over, "cwd": cwd,
                 "label": " ".join(f"{k}={v}" for k, v in levels.items())}
            for step in ("build", "reset", "teardown"):
                t = getattr(exp, step)
                c[step] = exp.render_command(t, levels) if t is not None else None
            self.cache[key] = c
        return c


def _spec(argv_shell, c: dict, timeout_s, run_id=None, levels=None, env=None,
          inflight_path=None) -> RunSpec:
    argv, shell = argv_shell
    return RunSpec(argv=argv, shell_command=shell, env=env or c["env"], cwd=c["cwd"],
                   timeout_s=timeout_s, run_id=run_id, levels=levels or {},
                   cpus=c["cpus"], nice=c["nice"], no_aslr=c["no_aslr"],
                   inflight_path=inflight_path)


def _short(m: Measurement) -> str:
    if m.message:
        return m.message
    if m.status == "timeout":
        return "timed out"
    return f"exit code {m.exit_code}"


def _record(pr: Mapping, m: Measurement | None, status: str, message: str) -> dict:
    rec = {"run": pr["run"], "position": pr["position"], "block": pr["block"],
           "replicate": pr["replicate"], "levels": pr["levels"], "status": status,
           "exit_code": m.exit_code if m else None}
    for f in USAGE_FIELDS:
        rec[f] = getattr(m, f) if m else None
    rec["started_at"] = m.started_at if m and m.started_at else J.utc_iso()
    rec["message"] = message
    if m is not None and m.extra:
        for k, v in m.extra.items():
            if k == "metrics":
                rec["metrics"] = v
            else:
                rec[k] = v
    return rec


def _outcome(pr: Mapping, m: Measurement) -> tuple[str, str]:
    """The status and message recorded for planned run ``pr`` that measured ``m``."""
    status = m.status
    message = m.message if m.status != "ok" else (m.message or "")
    if pr["warmup"]:
        if m.status != "ok":
            message = f"warm-up run {m.status}: {_short(m)}"
        status = "warmup"
    return status, message


#: Runs up to which the records of queued runs are kept for runs.csv (`JournalMirror`).
MIRROR_LIMIT = 200_000


def _stream_runs(executor, jr, todo: Sequence[Mapping], cells, timeout_s, inflight_path,
                 fields, counts: dict, progress, on_tick, mirror: J.JournalMirror | None = None,
                 watch=None) -> str | None:
    """Run ``todo`` as queued runs: the launcher runs them back to back and
    journals each run that ends ok itself; the harness records the others
    (the launcher waits for that), counts, and shows progress.

    Only for experiments whose runs need nothing from the harness between
    them (no build, reset or teardown, no quality sections, no padding, no
    cold cache, no stopping rule); the journal is the same as the one-by-one
    path writes. The launcher reports journalled runs in batches (64 runs or
    20 ms, and whenever it runs out of work), so the harness wakes a few dozen
    times a second at most, not once per run.

    ``watch``: an `early_stop.FirstRunsWatch`; when it says stop, the failed
    run is recorded, the launcher (holding the queue for it) drops the rest,
    and the reason is returned.
    """
    from benchharness.measure.host import freq_files

    by_key: dict = {}
    i = 0
    with executor.open_stream(jr.path, freq_files(), fields) as stream:
        batch = 8  # a small first batch: the first run starts without waiting for the rest
        while i < len(todo) or stream.outstanding:
            limit = i + batch
            batch = 512
            while i < len(todo) and i < limit and stream.room():
                pr = todo[i]
                c = cells.get(pr["levels"])
                spec = _spec((c["argv"], c["shell"]), c, timeout_s, run_id=pr["run"],
                             levels=pr["levels"], inflight_path=inflight_path)
                stream.submit(spec, pr["run"],
                              J.record_head(pr, "warmup" if pr["warmup"] else "ok"))
                by_key[pr["run"]] = (pr, c)
                i += 1
            stream.flush()
            if i < len(todo) and stream.room():
                continue  # more to queue first (the first small batch is already running)
            events = stream.events(timeout_s=0.25)
            stop = None
            for ev in events:
                pr, c = by_key.pop(ev.key)
                if ev.written:
                    # the record the launcher wrote (the same fields, values and order)
                    status = "warmup" if pr["warmup"] else "ok"
                    rec = _record(pr, ev.measurement, status, "")
                    if fields:
                        rec.update(fields)
                else:
                    status, message = _outcome(pr, ev.measurement)
                    rec = _record(pr, ev.measurement, status, message)
                    if fields:
                        rec.update(fields)
                    jr.append(rec)
                    why = watch.observe(rec) if watch is not None else None
                    if why:
                        stop = why   # the queue stays held: nothing more starts
                    else:
                        stream.release()
                if mirror is not None:
                    mirror.add(rec)
                counts[status] = counts.get(status, 0) + 1
                progress.advance(rec, c["label"])
            if stop:
                for ev in stream.close():   # journalled before the drop took effect
                    pr, c = by_key.pop(ev.key)
                    status = "warmup" if pr["warmup"] else "ok"
                    rec = _record(pr, ev.measurement, status, "")
                    if fields:
                        rec.update(fields)
                    if mirror is not None:
                        mirror.add(rec)
                    counts[status] = counts.get(status, 0) + 1
                return stop
            on_tick()
    return None


def _execute(folder: Path, exp, planned: Sequence[Mapping], done: set, session: dict,
             executor, progress: Progress | None, facts: dict, prior=(),
             stop_check=None, host_check=None, own_executor: bool = False,
             early_stop: bool = False) -> RunOutcome:
    if executor is None:
        own_executor = True
        executor = default_executor()
    progress = progress or Progress()
    cells = _CellCache(exp, session)
    jr = J.Journal(folder)
    builds: dict[tuple, tuple[bool, str]] = {}
    counts: dict[str, int] = {}
    for r in prior:
        counts[r["status"]] = counts.get(r["status"], 0) + 1
    todo = [pr for pr in planned if int(pr["run"]) not in done]
    interrupted = False
    watch = None
    if early_stop:
        from benchharness.execute.early_stop import FirstRunsWatch

        watch = FirstRunsWatch(pr["levels"] for pr in todo)
    stopped_early = None
    disk_full = None
    progress.start(len(planned), len(planned) - len(todo), folder)
    from benchharness.measure.quality import RunQuality

    quality = RunQuality(exp, folder)
    distinct = {tuple(sorted(pr["levels"].items())): pr["levels"] for pr in planned}
    quality.start([(lv, cells.get(lv)) for lv in distinct.values()])
    own_pids = [p for p in (getattr(executor, "launcher_pid", None),) if p]

    def host_warnings_now():
        # host_check: the run's host check, due once its busy-process sample has
        # lasted long enough; runs may already have started (warn mode only).
        if host_check is not None:
            host_check(own_pids)
        if not done:  # a fresh folder: show the host warnings found at its start
            for w in facts.get("warnings") or []:
                if isinstance(w, dict) and w.get("severity") == "warning":
                    progress.note(f"host warning: {w['message']}; fix: {w['fix']}")

    host_due = getattr(host_check, "due", 0.0) if host_check is not None else 0.0
    pending_host = True
    if time.monotonic() >= host_due:
        host_warnings_now()
        pending_host = False
    for note in quality.notes:
        progress.note(note)
    quality.notes.clear()
    timeout_s = exp.timeout_s
    inflight_pgid = [None]
    controls = cells.controls
    pad_rng = None
    if controls.pad_env:
        import numpy as np

        from benchharness.execute.envs import pad_environment

        # Seeded from the plan's seed and the runs already done, so a resumed
        # folder continues with fresh (not repeated) padding lengths.
        pad_rng = np.random.default_rng([int(session.get("seed") or 0), len(done), 7])
    aslr_value = None
    if controls.aslr_off:
        ok = getattr(executor, "aslr_control", True)
        aslr_value = "off" if ok else "on"
        if not ok:
            progress.note("note: ASLR stays on: " + getattr(executor, "aslr_reason",
                                                           "the kernel does not allow it"))
    cold_ok = None

    inflight_path = str(folder / "inflight")
    records_start = getattr(executor, "records_inflight", False)

    def on_start_for(run_id):
        def cb(pid, pgid):
            from benchharness.execute.procs import start_ticks

            t = start_ticks(pgid) if pgid and pgid > 1 else None
            inflight_pgid[0] = (pgid, t) if t is not None else None
            jr.mark_inflight(run_id, pid, pgid, (t, t) if t is not None else None)
        return cb

    # While a run executes, the harness prepares the next run's spec and samples
    # this run's conditions (executors that support it), so that only the
    # journal line lies between one run's end and the next one's request.
    overlap = bool(getattr(executor, "supports_while_running", False))
    ahead: dict = {}   # run id -> (RunSpec, request) made while the run before it executed
    prepare_request = getattr(executor, "prepare_request", None) if overlap else None

    def spec_for(pr, c, run_env):
        return _spec((c["argv"], c["shell"]), c, timeout_s, run_id=pr["run"],
                     levels=pr["levels"], env=run_env,
                     inflight_path=inflight_path if records_start else None)

    shown: list = []   # finished runs whose progress update waits for the next run's start

    def show_progress():
        while shown:
            rec, label = shown.pop(0)
            progress.advance(rec, label)

    def while_running_for(index, qtoken):
        def cb():
            try:
                quality.sample(qtoken)
                show_progress()
                if pad_rng is None and index + 1 < len(todo):
                    nxt = todo[index + 1]
                    ahead.clear()
                    nspec = spec_for(nxt, cells.get(nxt["levels"]), None)
                    ahead[nxt["run"]] = (nspec, prepare_request(nspec)
                                         if prepare_request is not None else None)
            except Exception:  # noqa: BLE001 - done again, and reported, on the main path
                ahead.clear()
        return cb

    stop_notes = []
    mirror = None
    streamed = (records_start and hasattr(executor, "open_stream") and quality.fast
                and stop_check is None and pad_rng is None and not controls.cold_cache
                and exp.build is None and exp.reset is None and exp.teardown is None)

    def on_tick():
        nonlocal pending_host
        if pending_host and time.monotonic() >= host_due:
            pending_host = False
            host_warnings_now()

    try:
        if streamed:
            one_by_one = ()  # all of them queued
            mirror = J.JournalMirror(jr.path, MIRROR_LIMIT, exp.factor_names, prior)
            stopped_early = _stream_runs(
                executor, jr, todo, cells, timeout_s, inflight_path,
                {"aslr": aslr_value} if aslr_value is not None else None,
                counts, progress, on_tick, mirror, watch)
        else:
            one_by_one = todo
        for index, pr in enumerate(one_by_one):
            if pending_host and time.monotonic() >= host_due:
                pending_host = False
                host_warnings_now()
            if stop_check is not None:
                why = stop_check.before_run(pr)
                if why:
                    stop_notes.append(why)
                    break
            levels = pr["levels"]
            c = cells.get(levels)
            if shown and (c["build"] is not None or c["reset"] is not None):
                show_progress()
            status = None
            message = ""
            m = None
            if c["build"] is not None:
                bkey = (c["build"], c["cwd"], tuple(sorted(c["env_over"].items())))
                if bkey not in builds:
                    bm = executor.execute(_spec(c["build"], c, None, levels=levels))
                    ok = bm.status == "ok"
                    builds[bkey] = (ok, "" if ok else
                                    f"build failed: {_short(bm)}"
                                    + ("" if bm.message else
                                       _tail(bm.stderr_tail or bm.stdout_tail)))
                ok, bmsg = builds[bkey]
                if not ok:
                    status, message = "failed", bmsg
            if status is None and c["reset"] is not None and not pr["warmup"]:
                rm = executor.execute(_spec(c["reset"], c, timeout_s, levels=levels))
                if rm.status != "ok":
                    status, message = "failed", f"reset failed: {_short(rm)}"
            pad_bytes = None
            run_env = None
            if status is None and pad_rng is not None:
                run_env, pad_bytes = pad_environment(c["env"], pad_rng)
            if status is None and controls.cold_cache and not pr["warmup"] and cold_ok is not False:
                from benchharness.execute.noise import drop_page_cache

                ok, why = drop_page_cache()
                if not ok and cold_ok is None:
                    progress.note(f"note: cold-cache mode is off for this run: {why}")
                    session["cold_cache"] = f"not possible: {why}"
                cold_ok = ok
                if ok:
                    session["cold_cache"] = "page cache dropped before each timed run"
            if status is None:
                spec0, req = ahead.pop(pr["run"], (None, None)) if run_env is None else \
                    (None, None)
                if spec0 is None:
                    spec0 = spec_for(pr, c, run_env)
                spec, qtoken = quality.prepare(spec0, levels, c, sample_later=overlap)
                if records_start:
                    # The executor records the child itself: no harness wake-up mid-run.
                    if overlap:
                        cb = while_running_for(index, qtoken)
                        if req is not None and spec is spec0:
                            m = executor.execute(spec, while_running=cb, prepared=req)
                        else:
                            m = executor.execute(spec, while_running=cb)
                    else:
                        m = executor.execute(spec)
                else:
                    m = executor.execute(spec, on_start=on_start_for(pr["run"]))
                inflight_pgid[0] = None
                m = quality.finish(qtoken, pr, m)  # expect, metrics, samples, perf counts
                status, message = _outcome(pr, m)
                if c["teardown"] is not None:
                    tm = executor.execute(_spec(c["teardown"], c, timeout_s, levels=levels))
                    if tm.status != "ok":
                        message = (message + "; " if message else "") + \
                            f"teardown failed: {_short(tm)}"
            if pr["warmup"] and status != "warmup":
                message = f"warm-up run not done: {message}"
                status = "warmup"
            rec = _record(pr, m, status, message)
            if pad_bytes is not None:
                rec["pad_env_bytes"] = pad_bytes
            if aslr_value is not None:
                rec["aslr"] = aslr_value
            jr.append(rec)
            counts[status] = counts.get(status, 0) + 1
            if watch is not None:
                stopped_early = watch.observe(rec)
            if overlap:
                # shown while the next run executes: the bar is not on the path
                # from one run's end to the next one's start
                shown.append((rec, c["label"]))
            else:
                progress.advance(rec, c["label"])
            if stopped_early:
                break
        else:
            if stop_check is not None:
                final = stop_check.finish()
                if final:
                    stop_notes.append(final)
        jr.clear_inflight()
    except KeyboardInterrupt:
        interrupted = True
        if inflight_pgid[0]:
            from benchharness.execute.procs import kill_group_checked

            pg, t = inflight_pgid[0]
            kill_group_checked(pg, t, t)  # only while it is still the run's group
        jr.clear_inflight()
    except ExecutionError as e:
        # The launcher died (killed, crashed): its run was stopped by the
        # executor where it could be identified; what finished is recorded.
        note = getattr(executor, "stopped_runs", None)
        raise ExecutionError(f"{e}{'; ' + note if note else ''}; the runs that finished are "
                             f"recorded: continue with `benchharness run --resume {folder}`"
                             ) from None
    except OSError as e:
        if not is_disk_full(e):
            raise
        disk_full = e  # said once the journal is closed (below); the journal holds whole lines
    finally:
        if mirror is not None and sys.exc_info()[0] is not None:
            mirror.drop()  # an error is on its way out: no half runs.csv stays behind
        try:
            show_progress()
        except Exception:  # noqa: BLE001 - a display problem must not lose the journal
            pass
        if pending_host:  # fewer runs than the sample's interval: finish it now
            pending_host = False
            try:
                host_warnings_now()
            except Exception:  # noqa: BLE001 - host.json stays without warnings
                pass
        progress.stop()
        jr.close()
        try:
            quality.close()
        except OSError as e:
            if not is_disk_full(e) or sys.exc_info()[0] is not None:
                raise
            disk_full = disk_full or e
        if own_executor:
            try:
                executor.close()
            except Exception:  # noqa: BLE001 - the launcher may already be gone after ^C
                pass
    if disk_full is not None:
        if mirror is not None:
            mirror.drop()
        raise disk_full_error(folder, disk_full, len(planned))
    if stop_check is not None and stop_check.stopped:
        session["stopped"] = stop_check.stopped
    if stopped_early:
        session.setdefault("stopped_early", []).append(
            {"reason": stopped_early, "at": J.utc_iso()})
    known = None
    csv_ready = False
    if mirror is not None:
        if not interrupted and len(prior) + len(todo) <= MIRROR_LIMIT:
            new = mirror.verified()
            if new is not None and len(new) == len(todo):
                known = [*prior, *new]
                csv_ready = mirror.commit_csv(known)
        mirror.drop()
    try:
        outcome = finalize(folder, exp, session, facts, counts, len(planned), interrupted,
                           quality=quality, records=known, runs_csv_written=csv_ready,
                           state="stopped early" if stopped_early else None)
    except OSError as e:
        if not is_disk_full(e):
            raise
        raise disk_full_error(folder, e, len(planned)) from None
    outcome.notes.extend(stop_notes)
    outcome.stopped_early = stopped_early
    return outcome


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


def finalize(folder: Path, exp, session: dict, facts: dict, counts: dict, planned: int,
             interrupted: bool, host_json: dict | None = None, quality=None,
             records: list | None = None, runs_csv_written: bool = False,
             state: str | None = None) -> RunOutcome:
    """Export runs.csv, record the end state in host.json and session.json.

    The counts by status are taken from the journal, which is the record of
    what ran (queued runs are journalled by the launcher, and after Ctrl-C the
    harness may not have heard of the last few yet). ``records``: the journal's
    records when the caller already holds them, checked against its bytes;
    ``runs_csv_written``: runs.csv is already in place for them.
    """
    if records is None:
        records = J.read_journal(folder / "runs.jsonl")
    counts = {}
    for r in records:
        counts[r["status"]] = counts.get(r["status"], 0) + 1
    if not runs_csv_written:
        J.export_runs_csv(folder, exp.factor_names, records)
    if quality is not None:
        quality.close(records)  # steady.json: warm-up classes, executions x iterations advice
    from benchharness.measure.host import facts_at_end

    facts.update(facts_at_end(facts))
    J.write_atomic(folder / "host.json", json.dumps(host_json or facts, indent=1, default=str))
    session["state"] = state or ("interrupted" if interrupted else "complete")
    session["finished_at"] = J.utc_iso()
    if not interrupted:
        try:
            (folder / "inflight").unlink()
        except FileNotFoundError:
            pass
    J.write_atomic(folder / "session.json", json.dumps(session, indent=1))
    return RunOutcome(folder=folder, seed=session["seed"], planned=planned, counts=counts,
                      interrupted=interrupted,
                      notes=list(quality.notes) if quality is not None else [])


def _tail(b: bytes, n: int = 300) -> str:
    if not b:
        return ""
    text = b.decode("utf-8", "replace").strip()
    if not text:
        return ""
    text = text[-n:].replace("\n", " | ")
    return f" ({text})"


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
