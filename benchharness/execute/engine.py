"""The run engine: take a planned run, prepare it, run it, record it, journal it.

Three loops decide *which* run comes next — the local runner (the plan's
order, `benchharness.execute.runner`), the gate (interleaved blocks until every
workload is decided, `benchharness.gate.session`) and the cluster coordinator
(whole blocks per host, `benchharness.execute.cluster`) — and they all hand
each run to one `RunEngine`, which owns what happens to it:

1. **prepare**: the cell's rendered command (`benchharness.execute.cells`),
   the untimed steps before it (build once per rendered form, reset before
   every timed run), noise controls that vary per run (environment padding,
   a dropped page cache), and the quality checks' preparation
   (`benchharness.measure.quality`);
2. **run**: through any `Executor`; while a run executes, the next run's
   request is built where the executor allows it, so that only the journal
   line lies between one run's end and the next one's start;
3. **record**: the status and message every command reports (warm-ups,
   failed steps, teardown), one plain record per run;
4. **journal**: one line in ``runs.jsonl`` per finished run, written before
   the next run starts.

On a cluster the run itself and its steps execute on a worker
(`benchharness.execute.remote`); the coordinator uses the same engine to
prepare and to record. `finalize` closes a results folder the same way for
every loop. The engine also runs *queued runs* (`QueuedRuns`): when runs need
nothing from the harness between them, the local launcher runs them back to
back and journals the ones that end ok itself.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Mapping, Sequence

from benchharness.execute.base import USAGE_FIELDS, Executor, Measurement, RunSpec
from benchharness.execute.cells import CellCache, build_key, run_spec
from benchharness.results import journal as J


@dataclass
class RunOutcome:
    """What running an experiment returns: where the results are and what happened."""

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


class Progress:
    """Progress reporting that shows nothing (the base of the terminal and log forms)."""

    def start(self, total: int, done: int, folder: Path) -> None: ...
    def advance(self, record: Mapping, label: str) -> None: ...
    def note(self, text: str) -> None: ...
    def stop(self) -> None: ...


def version() -> str:
    """The benchharness version recorded in ``session.json``."""
    from benchharness.version import __version__

    return __version__


# ---------------------------------------------------------------------------
# What a run's record says.

def short_reason(m: Measurement) -> str:
    """Why a command did not end ok, in a few words."""
    if m.message:
        return m.message
    if m.status == "timeout":
        return "timed out"
    return f"exit code {m.exit_code}"


def output_tail(b: bytes, n: int = 300) -> str:
    """The last ``n`` characters of a command's output, on one line in parentheses."""
    if not b:
        return ""
    text = b.decode("utf-8", "replace").strip()
    if not text:
        return ""
    text = text[-n:].replace("\n", " | ")
    return f" ({text})"


def make_record(pr: Mapping, m: Measurement | None, status: str, message: str) -> dict:
    """The journal record of planned run ``pr`` (``m`` None: it never started)."""
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


def run_outcome(pr: Mapping, m: Measurement) -> tuple[str, str]:
    """The status and message recorded for planned run ``pr`` that measured ``m``."""
    status = m.status
    message = m.message if m.status != "ok" else (m.message or "")
    if pr["warmup"]:
        if m.status != "ok":
            message = f"warm-up run {m.status}: {short_reason(m)}"
        status = "warmup"
    return status, message


@dataclass
class Ran:
    """One run as the engine saw it, ready to be recorded.

    ``measurement`` is None when a step before the run failed (it never
    started); ``pad_bytes`` the length of the padding variable it was given.
    """

    measurement: Measurement | None
    status: str
    message: str
    pad_bytes: int | None = None

    def for_decision(self) -> Measurement:
        """A measurement to judge: a run that never started counts as failed."""
        if self.measurement is not None:
            return self.measurement
        return Measurement(status="failed", exit_code=None, wall_s=None, message=self.message)


def not_run(pr: Mapping, message: str) -> Ran:
    """A run whose build or reset failed: recorded, never started."""
    if pr["warmup"]:
        return Ran(None, "warmup", f"warm-up run not done: {message}")
    return Ran(None, "failed", message)


# ---------------------------------------------------------------------------

@dataclass
class Prepared:
    """A planned run ready to start: its cell, its spec and the quality token."""

    cell: dict
    spec: RunSpec
    token: object = None
    pad_bytes: int | None = None
    request: dict | None = None   # the executor's request, built while the run before ran


class RunEngine:
    """Prepares, runs, records and journals planned runs (see the module docstring).

    ``pr`` (a planned run) is a plain dict: ``run``, ``position``, ``block``,
    ``replicate``, ``warmup``, ``levels``. ``quality``: a started
    `RunQuality`, or None (simulated runs: no conditions sampled).
    ``executor``: where runs execute, or None when they execute elsewhere (a
    cluster's workers: then the engine prepares and records only).
    ``resumed``: runs already in the journal (seeds fresh padding lengths).
    ``note``: where the engine says things once (ASLR, cold cache).
    """

    def __init__(self, exp, folder: Path, session: dict, executor: Executor | None, journal,
                 quality=None, cells: CellCache | None = None, resumed: int = 0,
                 note: Callable[[str], None] | None = None):
        self.exp, self.folder, self.session = exp, Path(folder), session
        self.executor = executor
        self.journal = journal
        self.quality = quality
        self.cells = cells or CellCache(exp, session)
        self.controls = self.cells.controls
        self.note = note or (lambda text: None)
        self.timeout_s = exp.timeout_s
        self.counts: dict[str, int] = {}
        self.fields: dict = {}           # added to every record (ASLR state)
        self.builds: dict[tuple, str] = {}   # build key -> "" (ok) or why it failed
        local = executor is not None
        self.inflight_path = (str(self.folder / "inflight")
                              if local and executor.records_inflight else None)
        self.inflight_group = None       # (pgid, start ticks) of the run in flight
        self.overlap = local and bool(executor.supports_while_running)
        self._ahead: dict = {}           # run id -> (RunSpec, request) made ahead
        self._cold_ok = None
        self.pad_rng = self._padding_rng(resumed)
        self._aslr_state()

    def _padding_rng(self, resumed: int):
        if not self.controls.pad_env:
            return None
        import numpy as np

        # Seeded from the plan's seed and the runs already done, so a resumed
        # folder continues with fresh (not repeated) padding lengths.
        return np.random.default_rng([int(self.session.get("seed") or 0), resumed, 7])

    def _aslr_state(self) -> None:
        if not self.controls.aslr_off or self.executor is None:  # None: the workers say
            return
        ok = self.executor.aslr_control
        self.fields["aslr"] = "off" if ok else "on"
        if not ok:
            self.note("note: ASLR stays on: " + self.executor.aslr_reason)

    def count(self, status: str) -> None:
        self.counts[status] = self.counts.get(status, 0) + 1

    # -- prepare ---------------------------------------------------------------

    def spec_for(self, pr: Mapping, c: Mapping, env=None) -> RunSpec:
        """The spec of planned run ``pr``'s own command."""
        return run_spec((c["argv"], c["shell"]), c, self.timeout_s, run_id=pr["run"],
                        levels=pr["levels"], env=env, inflight_path=self.inflight_path)

    def prepare(self, pr: Mapping, sample_later: bool = False, pad: bool = True) -> Prepared:
        """Padding and the quality checks' preparation (no step runs here).

        ``pad=False``: the environment is padded where the run executes (a
        cluster worker, given `pad_length`), not here.
        """
        c = self.cells.get(pr["levels"])
        env, pad = self._padding(c) if pad else (None, None)
        spec0 = None
        req = None
        if env is None:
            spec0, req = self._ahead.pop(pr["run"], (None, None))
        if spec0 is None:
            spec0 = self.spec_for(pr, c, env)
        spec, token = spec0, None
        if self.quality is not None:
            spec, token = self.quality.prepare(spec0, pr["levels"], c,
                                               sample_later=sample_later)
        return Prepared(c, spec, token, pad, req if spec is spec0 else None)

    def _padding(self, c: Mapping):
        if self.pad_rng is None:
            return None, None
        from benchharness.execute.envs import pad_environment

        return pad_environment(c["env"], self.pad_rng)

    def pad_length(self) -> int | None:
        """A padding length for a run prepared elsewhere (a cluster worker pads it)."""
        return int(self.pad_rng.integers(0, 4097)) if self.pad_rng is not None else None

    def steps_before(self, pr: Mapping, c: Mapping) -> str | None:
        """Build (once per rendered form) and reset (timed runs); why they failed, or None."""
        if c["build"] is not None:
            why = self._build(c, pr["levels"])
            if why:
                return why
        if c["reset"] is not None and not pr["warmup"]:
            rm = self.executor.execute(run_spec(c["reset"], c, self.timeout_s,
                                                levels=pr["levels"]))
            if rm.status != "ok":
                return f"reset failed: {short_reason(rm)}"
        return None

    def _build(self, c: Mapping, levels: Mapping) -> str:
        key = build_key(c)
        if key not in self.builds:
            bm = self.executor.execute(run_spec(c["build"], c, None, levels=levels))
            self.builds[key] = "" if bm.status == "ok" else (
                f"build failed: {short_reason(bm)}"
                + ("" if bm.message else output_tail(bm.stderr_tail or bm.stdout_tail)))
        return self.builds[key]

    def _drop_cache(self, pr: Mapping) -> None:
        """Cold-cache mode: drop the page cache before each timed run, where allowed."""
        if not self.controls.cold_cache or pr["warmup"] or self._cold_ok is False:
            return
        from benchharness.execute.noise import drop_page_cache

        ok, why = drop_page_cache()
        if not ok and self._cold_ok is None:
            self.note(f"note: cold-cache mode is off for this run: {why}")
            self.session["cold_cache"] = f"not possible: {why}"
        self._cold_ok = ok
        if ok:
            self.session["cold_cache"] = "page cache dropped before each timed run"

    def _teardown(self, c: Mapping, pr: Mapping, message: str) -> str:
        if c["teardown"] is None:
            return message
        tm = self.executor.execute(run_spec(c["teardown"], c, self.timeout_s,
                                            levels=pr["levels"]))
        if tm.status == "ok":
            return message
        return (message + "; " if message else "") + f"teardown failed: {short_reason(tm)}"

    # -- run -------------------------------------------------------------------

    def measure(self, pr: Mapping, next_pr: Mapping | None = None,
                during: Callable[[], None] | None = None) -> Ran:
        """Prepare planned run ``pr``, run it with its steps, and say what it did.

        ``next_pr``: the run that comes next, when the caller knows it (its
        request is built while this one executes); ``during``: the caller's
        own work while this run executes (executors that allow it).
        """
        c = self.cells.get(pr["levels"])
        why = self.steps_before(pr, c)
        if why is not None:
            return not_run(pr, why)
        p = self.prepare(pr, sample_later=self.overlap)
        self._drop_cache(pr)
        m = self._launch(pr, p, next_pr, during)
        self.inflight_group = None
        ran = self.conclude(pr, m, p.token)
        ran.message = self._teardown(c, pr, ran.message)
        ran.pad_bytes = p.pad_bytes
        return ran

    def _launch(self, pr: Mapping, p: Prepared, next_pr, during) -> Measurement:
        ex = self.executor
        if not ex.records_inflight:
            return ex.execute(p.spec, on_start=self._on_start(pr["run"]))
        if not self.overlap:
            return ex.execute(p.spec)
        cb = self._while_running(p.token, next_pr, during)
        if p.request is not None:
            return ex.execute(p.spec, while_running=cb, prepared=p.request)
        return ex.execute(p.spec, while_running=cb)

    def _on_start(self, run_id: int):
        def cb(pid, pgid):
            from benchharness.execute.procs import start_ticks

            t = start_ticks(pgid) if pgid and pgid > 1 else None
            self.inflight_group = (pgid, t) if t is not None else None
            self.journal.mark_inflight(run_id, pid, pgid, (t, t) if t is not None else None)
        return cb

    def _while_running(self, token, next_pr, during):
        def cb():
            try:
                if self.quality is not None:
                    self.quality.sample(token)
                if during is not None:
                    during()
                if next_pr is not None and self.pad_rng is None:
                    self._ahead.clear()
                    spec = self.spec_for(next_pr, self.cells.get(next_pr["levels"]))
                    self._ahead[next_pr["run"]] = (spec, self.executor.prepare_request(spec))
            except Exception:  # noqa: BLE001 - done again, and reported, on the main path
                self._ahead.clear()
        return cb

    def conclude(self, pr: Mapping, m: Measurement, token=None,
                 conditions: Mapping | None = None) -> Ran:
        """Apply the quality checks to ``m`` and decide the status and message.

        ``conditions``: the run conditions sampled where the run executed (a
        cluster worker), in place of the ones the token holds.
        """
        if self.quality is not None and token is not None:
            if conditions is not None:
                token = dict(token, conditions=conditions)
            m = self.quality.finish(token, pr, m)  # expect, metrics, samples, perf counts
        status, message = run_outcome(pr, m)
        return Ran(m, status, message)

    def stop_inflight(self) -> None:
        """After Ctrl-C: stop the run in flight (only while it is still the run's group)."""
        if self.inflight_group:
            from benchharness.execute.procs import kill_group_checked

            pg, t = self.inflight_group
            kill_group_checked(pg, t, t)

    # -- record and journal ----------------------------------------------------

    def record(self, pr: Mapping, ran: Ran, extra: Mapping | None = None) -> dict:
        """Journal one finished run (``extra``: fields of where it ran); returns its record."""
        rec = make_record(pr, ran.measurement, ran.status, ran.message)
        if extra:
            rec.update(extra)
        if ran.pad_bytes is not None:
            rec["pad_env_bytes"] = ran.pad_bytes
        if self.fields:
            rec.update(self.fields)
        self.journal.append(rec)
        self.count(ran.status)
        return rec

    def run(self, pr: Mapping, next_pr: Mapping | None = None,
            during: Callable[[], None] | None = None) -> dict:
        """`measure` then `record`: one planned run from start to journal line."""
        return self.record(pr, self.measure(pr, next_pr, during))

    # -- queued runs -----------------------------------------------------------

    def can_queue(self, one_by_one_needed: bool) -> bool:
        """Whether the runs can go to the launcher's queue: nothing is needed from
        the harness between them (no steps, quality sections, padding, cold cache,
        and the caller needs no look at each run: ``one_by_one_needed``)."""
        exp = self.exp
        return (self.executor is not None and self.executor.records_inflight
                and self.executor.supports_queued_runs
                and self.quality is not None and self.quality.fast and not one_by_one_needed
                and self.pad_rng is None and not self.controls.cold_cache
                and exp.build is None and exp.reset is None and exp.teardown is None)

    def run_queued(self, todo: Sequence[Mapping], progress, on_tick, mirror=None,
                   watch=None) -> str | None:
        """Run ``todo`` as queued runs (`QueuedRuns`); returns why it stopped early, if so."""
        return QueuedRuns(self, todo, progress, on_tick, mirror, watch).run()


#: Runs up to which the records of queued runs are kept for runs.csv (`JournalMirror`).
MIRROR_LIMIT = 200_000


class QueuedRuns:
    """Queued runs: the launcher runs them back to back and journals each run
    that ends ok itself; the engine records the others (the launcher waits for
    that), counts, and shows progress.

    Only for experiments whose runs need nothing from the harness between
    them (`RunEngine.can_queue`); the journal is the same as the one-by-one
    path writes. The launcher reports journalled runs in batches (64 runs or
    20 ms, and whenever it runs out of work), so the harness wakes a few dozen
    times a second at most, not once per run.

    ``watch``: an `early_stop.FirstRunsWatch`; when it says stop, the failed
    run is recorded, the launcher (holding the queue for it) drops the rest,
    and the reason is returned.
    """

    def __init__(self, engine: RunEngine, todo: Sequence[Mapping], progress, on_tick,
                 mirror=None, watch=None):
        self.engine, self.todo, self.progress = engine, todo, progress
        self.on_tick, self.mirror, self.watch = on_tick, mirror, watch
        self.by_key: dict = {}
        self.specs: dict = {}   # id(cell) -> (cell, its RunSpec)
        self.i = 0

    def run(self) -> str | None:
        from benchharness.measure.host import freq_files

        eng = self.engine
        with eng.executor.open_stream(eng.journal.path, freq_files(), eng.fields or None) \
                as stream:
            batch = 8  # a small first batch: the first run starts without waiting for the rest
            while self.i < len(self.todo) or stream.outstanding:
                self._submit(stream, batch)
                batch = 512
                if self.i < len(self.todo) and stream.room():
                    continue  # more to queue first (the first small batch is already running)
                stop = self._take(stream, stream.events(timeout_s=0.25))
                if stop:
                    self._drain(stream.close())   # journalled before the drop took effect
                    return stop
                self.on_tick()
        return None

    def _submit(self, stream, batch: int) -> None:
        eng = self.engine
        limit = self.i + batch
        specs = self.specs
        while self.i < len(self.todo) and self.i < limit and stream.room():
            pr = self.todo[self.i]
            c = eng.cells.get(pr["levels"])
            # one spec per cell, reused for its every run (the stream copies its request)
            cs = specs.get(id(c))
            if cs is None or cs[0] is not c:
                cs = specs[id(c)] = (c, run_spec((c["argv"], c["shell"]), c, eng.timeout_s,
                                                 levels=pr["levels"],
                                                 inflight_path=eng.inflight_path))
            run = pr["run"]
            stream.submit(cs[1], run, J.record_head(pr, "warmup" if pr["warmup"] else "ok"),
                          run_id=run)
            self.by_key[run] = (pr, c)
            self.i += 1
        stream.flush()

    def _take(self, stream, events) -> str | None:
        stop = None
        for ev in events:
            pr, c = self.by_key.pop(ev.key)
            if ev.written:
                # the record the launcher wrote (the same fields, values and order)
                rec = self._written(pr, ev)
            else:
                rec = self.engine.record(pr, self.engine.conclude(pr, ev.measurement))
                if self.mirror is not None:
                    self.mirror.add(rec)
                why = self.watch.observe(rec) if self.watch is not None else None
                if why:
                    stop = why   # the queue stays held: nothing more starts
                else:
                    stream.release()
            self.progress.advance(rec, c["label"])
        return stop

    def _written(self, pr: Mapping, ev) -> dict:
        eng = self.engine
        status = "warmup" if pr["warmup"] else "ok"
        rec = make_record(pr, ev.measurement, status, "")
        if eng.fields:
            rec.update(eng.fields)
        if self.mirror is not None:
            self.mirror.add(rec)
        counts = eng.counts   # inline: once per queued run
        counts[status] = counts.get(status, 0) + 1
        return rec

    def _drain(self, events) -> None:
        for ev in events:
            pr, _c = self.by_key.pop(ev.key)
            self._written(pr, ev)


# ---------------------------------------------------------------------------

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
        J.export_runs_csv(folder, exp.factor_names, records, J.session_floor_kib(session))
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


def start_quality(exp, folder: Path, cells: CellCache, planned: Sequence[Mapping]):
    """The quality checks of a results folder, started for every cell of ``planned``."""
    from benchharness.measure.quality import RunQuality

    quality = RunQuality(exp, folder)
    quality.start(distinct_levels(pr["levels"] for pr in planned),
                  render=cells.get)  # cells rendered only as needed
    return quality


def distinct_levels(levels) -> list:
    """Each cell's levels dict once, in order of first appearance.

    A plan shares one dict among a cell's runs, so dicts are first told apart by
    identity; equal dicts (a resumed plan reads one per row) are then merged by
    their values when every dict lists its factors in one order (loops inside
    the interpreter: at 100,000 cells 0.03 s, against 0.2 s for sorting each
    dict's items), by their sorted items otherwise.
    """
    dicts = list({id(lv): lv for lv in levels}.values())
    try:
        if len(set(map(tuple, dicts))) <= 1:   # one key order
            return list(dict(zip(map(tuple, map(dict.values, dicts)), dicts)).values())
    except TypeError:   # mappings other than dicts
        pass
    out: dict = {}
    for lv in dicts:
        out.setdefault(tuple(sorted(lv.items())), lv)
    return list(out.values())
