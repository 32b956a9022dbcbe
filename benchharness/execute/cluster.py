"""Running an experiment across a Dask distributed cluster, hosts as blocks.

Spreading runs naively over a pool of machines confounds the machine with the
setting. Here complete blocks of the design (each replicate is a block) are
assigned to hosts, so blocks are nested in hosts and host differences land in
the block term of the analysis, never in a factor's effect.

Cluster model. Each host runs one benchmark run at a time: one worker process
with one thread per host, started with a resource every run needs::

    dask scheduler --port 8786
    dask worker tcp://SCHEDULER:8786 --nworkers 1 --nthreads 1 --resources bench=1

Dask counts resources per worker, not per host, so two workers on one host would
run two benchmarks at once and disturb each other; the coordinator warns when
it sees that unless told it is intended (``same_host_ok``, as in tests, where
each worker then stands for a host of its own).

A worker receives whole blocks (one Dask task per block, holding the resource
for the block) and runs them back to back; it already holds its next block
when one ends, so it never waits for the coordinator between runs or blocks.
Each result streams back the moment its run ends, as a Dask event on a topic
of this session (`Worker.log_event` → `Client.subscribe_topic`: pushed, not
polled); the block's return value carries every result again, so a lost event
costs nothing but time. The coordinator sleeps on one local queue fed by those
events and by the blocks' completions.

The coordinator keeps the journal exactly as for local runs, through the run
engine (`benchharness.execute.engine`: the same records as local runs): each
result is appended as it arrives (``position`` is the order of arrival;
``host_position`` the order on that host) and fsynced within a second. A
worker lost mid-block has the runs of its blocks that never came back re-queued
on another host; its late results, if any, are ignored, so every run is
recorded once. A coordinator that dies leaves its workers to finish the run in
progress and stop (the scheduler cancels the block); ``--resume`` re-queues
only the runs that never came back. The analysis then uses (block, host) pairs
as blocks and says so.
"""

from __future__ import annotations

import collections
import os
import queue
import sys
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

from benchharness.errors import ExecutionError, UsageError
from benchharness.execute import remote
from benchharness.execute.base import Measurement
from benchharness.execute.cells import CellCache
from benchharness.execute.engine import (Progress, RunEngine, finalize, not_run,
                                         start_quality)
from benchharness.results import journal as J

RESOURCE = "bench"
#: Blocks a worker holds at once: the one it runs and the next (no wait between blocks).
AHEAD = 2


def check_address(address: str, timeout_s: float = 5.0) -> None:
    """Before a results folder is created: the address has the form the option promises
    (``tcp://HOST:PORT``, or ``HOST:PORT``) and something listens there. Light: no Dask
    import; a refused or unreachable address is one clear line instead of a traceback or
    an empty results folder left behind."""
    import re
    import socket

    m = re.fullmatch(r"(?:(tcp|tls|inproc|ucx|ws|wss)://)?(\[[^\]]+\]|[^:/\s]+):(\d{1,5})/?", address)
    if m is None:
        raise UsageError(f"--scheduler {address!r}: not a scheduler address; give "
                         "tcp://HOST:PORT (e.g. tcp://10.0.0.5:8786)")
    scheme, host, port = m.group(1) or "tcp", m.group(2).strip("[]"), int(m.group(3))
    if scheme != "tcp":
        return  # other transports: let Dask connect and report
    try:
        with socket.create_connection((host, port), timeout=timeout_s):
            pass
    except OSError as exc:
        raise ExecutionError(f"cannot reach the Dask scheduler at {address} "
                             f"({exc.strerror or exc}); check the address and that "
                             "`dask scheduler` is running") from None


def _connect(address: str, timeout_s: float = 20.0):
    try:
        from distributed import Client
    except ImportError:
        raise UsageError("running on a cluster needs Dask distributed: "
                         "pip install 'benchharness[dask]'") from None
    try:
        return Client(address, timeout=timeout_s)
    except ValueError as exc:  # a malformed address
        raise UsageError(f"--scheduler {address!r}: {exc}; give tcp://HOST:PORT") from None
    except (OSError, TimeoutError) as exc:
        raise ExecutionError(f"cannot reach the Dask scheduler at {address} ({exc}); check the "
                             "address and that `dask scheduler` is running") from None


def _workers(client) -> dict:
    info = client.scheduler_info(n_workers=-1) if _accepts_n_workers(client) else \
        client.scheduler_info()
    return info.get("workers", {})


def _accepts_n_workers(client) -> bool:
    import inspect

    try:
        return "n_workers" in inspect.signature(client.scheduler_info).parameters
    except (TypeError, ValueError):  # pragma: no cover
        return False


def check_workers(workers: Mapping, idents: Mapping, same_host_ok: bool) -> list[str]:
    """Warnings about the worker layout (plain strings)."""
    warnings = []
    by_host = collections.defaultdict(list)
    for addr, w in workers.items():
        res = (w.get("resources") or {}).get(RESOURCE)
        if not res:
            warnings.append(f"worker {w.get('name', addr)} has no '{RESOURCE}' resource; start "
                            f"workers with --resources {RESOURCE}=1 so each runs one benchmark "
                            "at a time")
        if (w.get("nthreads") or 1) > 1:
            warnings.append(f"worker {w.get('name', addr)} has {w.get('nthreads')} threads; "
                            "--nthreads 1 keeps one run at a time per worker")
        host = (idents.get(addr) or {}).get("hostname") or w.get("host")
        by_host[host].append(addr)
    if not same_host_ok:
        for host, addrs in by_host.items():
            if len(addrs) > 1:
                warnings.append(f"{len(addrs)} workers run on host {host}; their runs will "
                                "disturb each other. Start one worker per host (--nworkers 1), "
                                "or pass --same-host-ok if this is intended")
    return warnings


def _payload(c: Mapping, pr: Mapping, timeout_s, spec=None, clean_env=False,
             pad_bytes=None) -> dict:
    """What a worker needs for one run; ``spec`` is the prepared main command."""
    def part(argv_shell):
        if argv_shell is None:
            return None
        argv, shell = argv_shell
        return {"argv": list(argv) if argv else None, "shell": shell, "env": c["env_over"],
                "cwd": c["cwd"], "cpus": list(c["cpus"]) if c.get("cpus") else None,
                "nice": c.get("nice"), "no_aslr": c.get("no_aslr"), "clean_env": clean_env}

    command = part((spec.argv, spec.shell_command) if spec is not None
                   else (c["argv"], c["shell"]))
    if spec is not None:
        command["capture_bytes"] = spec.capture_bytes
    command["pad_bytes"] = pad_bytes
    return {"run": pr["run"], "warmup": pr["warmup"], "levels": pr["levels"],
            "timeout_s": timeout_s, "command": command,
            "build": part(c["build"]), "reset": part(c["reset"]),
            "teardown": part(c["teardown"])}


def _one_line(exc) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= 160 else text[:157] + "..."


class _HostProgress:
    """Wraps a Progress so that the current cell is shown with the host running it."""

    def __init__(self, inner):
        self.inner = inner
        self.per_host = collections.Counter()

    def start(self, total, done, folder):
        self.inner.start(total, done, folder)

    def advance(self, record, label):
        self.per_host[record.get("host")] += 1
        hosts = ", ".join(f"{h}: {n}" for h, n in sorted(self.per_host.items(), key=str))
        self.inner.advance(record, f"{record.get('host')} ran {label} | per host {hosts}")

    def note(self, text):
        self.inner.note(text)

    def stop(self):
        self.inner.stop()


@dataclass(eq=False)
class _Block:
    """One attempt at a block on one worker: what was sent and what has not come back."""

    key: str
    addr: str
    runs: list                 # planned runs, in order
    future: object = None
    back: set = field(default_factory=set)   # run ids whose result arrived

    def missing(self) -> list:
        return [pr for pr in self.runs if pr["run"] not in self.back]


class _Coordinator:
    """Runs the not-yet-done planned runs on the cluster, block by block.

    Each free worker gets a whole block (`remote.execute_block`), which it runs
    back to back; each result streams back as an event as soon as its run ends
    and is journalled on arrival by the run engine. The coordinator sleeps on
    one local queue fed by those events and by the blocks' completion, so it
    wakes for work, never to poll. A block whose worker is lost, or whose
    task fails, goes back to the front of the queue with only the runs that
    never came back.
    """

    def __init__(self, folder: Path, exp, planned, done: set, session: dict, progress,
                 scheduler: str, same_host_ok: bool, prior, known_hosts, poll_s: float):
        self.folder, self.exp, self.planned, self.session = folder, exp, planned, session
        self.scheduler, self.same_host_ok, self.poll_s = scheduler, same_host_ok, poll_s
        self.progress = _HostProgress(progress or Progress())
        self.client = _connect(scheduler)
        self.jr = J.Journal(folder)
        cells = CellCache(exp, session)
        self.quality = start_quality(exp, folder, cells, planned)
        if self.quality.cfg.metrics is not None and self.quality.cfg.metrics.file_templates():
            self.quality.notes.append("note: metrics read from files (file:) are read on the "
                                      "coordinator; on a cluster the file must be on a shared "
                                      "path")
        self.engine = RunEngine(exp, folder, session, None, self.jr, quality=self.quality,
                                cells=cells, resumed=len(done), note=self.progress.note)
        for r in prior:
            self.engine.count(r["status"])
        self.position = max([int(r.get("position", -1)) for r in prior], default=-1) + 1
        self.recorded = set(done)
        self.hosts_facts = dict(known_hosts or {})
        self.host_of: dict = {}
        self.workers: dict = {}
        self.queue: collections.deque = collections.deque()
        self.busy: dict[str, list] = {}          # worker address -> its blocks, in order
        self.blocks: dict[str, _Block] = {}      # attempt key -> block (live attempts)
        self.prepared: dict = {}                 # run id -> (pr, Prepared)
        self.attempts = collections.Counter()
        self.events: queue.Queue = queue.Queue()
        self.topic = f"benchharness-{os.getpid()}-{uuid.uuid4().hex[:12]}"
        self.n_attempts = 0
        self.next_check = 0.0

    # -- workers -----------------------------------------------------------------

    def meet_workers(self) -> None:
        """Wait for workers, check they can run our code, record their hosts."""
        workers = _workers(self.client)
        deadline = time.monotonic() + 30
        while not workers and time.monotonic() < deadline:
            time.sleep(0.5)
            workers = _workers(self.client)
        if not workers:
            raise ExecutionError(f"the Dask scheduler at {self.scheduler} has no workers; start "
                                 f"some with `dask worker {self.scheduler} --nthreads 1 "
                                 f"--resources {RESOURCE}=1`")
        try:
            idents = self.client.run(remote.identity)
        except Exception as exc:  # noqa: BLE001 - raised on the worker, re-raised by Dask
            raise ExecutionError(
                f"the workers of {self.scheduler} cannot run benchharness code "
                f"({_one_line(exc)}); install benchharness on every worker (or start "
                f"`dask worker` with it on PYTHONPATH)") from None
        for w in check_workers(workers, idents, self.same_host_ok):
            print(f"warning: {w}", file=sys.stderr)
        self._learn(idents, self.client.run(remote.host_facts))
        self.workers = workers

    def _learn(self, idents: Mapping, facts: Mapping) -> None:
        for addr, ident in idents.items():
            self.host_of[addr] = ident["worker"] if self.same_host_ok else ident["hostname"]
        for addr, f in facts.items():
            self.hosts_facts.setdefault(self.host_of[addr], f)

    def check_workers(self) -> None:
        """Lost workers give their blocks back; new workers are identified (at most
        every ``poll_s``, and whenever a block ended)."""
        now = time.monotonic()
        if now < self.next_check:
            return
        self.next_check = now + self.poll_s
        live = _workers(self.client)
        for addr in list(self.busy):
            if addr not in live:
                self._lost(addr)
        new = [a for a in live if a not in self.host_of]
        if new:
            self._learn(self.client.run(remote.identity, workers=new),
                        self.client.run(remote.host_facts, workers=new))
        self.workers = live

    def _lost(self, addr: str) -> None:
        """A worker is gone: what its blocks did not send back goes to another host."""
        lost = 0
        for block in reversed(self.busy.pop(addr)):
            self.blocks.pop(block.key, None)   # its late events, if any, are ignored
            try:
                block.future.cancel()
            except Exception:  # noqa: BLE001
                pass
            runs = [pr for pr in block.missing() if pr["run"] not in self.recorded]
            if runs:
                self.queue.appendleft(runs)
                lost += len(runs)
        if lost:
            self.progress.note(f"worker {self.host_of.get(addr, addr)} was lost; {lost} "
                               "runs of its block go to another host")

    # -- blocks ------------------------------------------------------------------

    def fill_queue(self, todo: Sequence[Mapping]) -> None:
        """Blocks in plan order; warm-up runs (block 0) one at a time, to any free host."""
        blocks: collections.OrderedDict = collections.OrderedDict()
        for pr in todo:
            blocks.setdefault(pr["block"], []).append(pr)
        for b, runs in blocks.items():
            if b == 0:
                self.queue.extend([[pr] for pr in runs])
            else:
                self.queue.append(list(runs))

    def dispatch(self) -> None:
        """Every live worker holds the block it runs and the next one (``AHEAD``), so
        it goes from one block to the next without waiting for the coordinator."""
        for _ in range(AHEAD):
            for addr in self.workers:
                if len(self.busy.get(addr, ())) < AHEAD and self.queue:
                    self._send(addr, self.queue.popleft())

    def _send(self, addr: str, runs: list) -> None:
        self.n_attempts += 1
        key = f"bh-block-{os.getpid()}-{self.n_attempts}-{runs[0]['run']}"
        payloads = []
        for pr in runs:
            self.attempts[pr["run"]] += 1
            payloads.append(self._payload(pr))
        has_resource = (self.workers.get(addr, {}).get("resources") or {}).get(RESOURCE)
        block = _Block(key, addr, runs)
        self.blocks[key] = block
        self.busy.setdefault(addr, []).append(block)
        block.future = self.client.submit(
            remote.execute_block, payloads, self.topic, key, key=key, workers=[addr],
            allow_other_workers=False, resources={RESOURCE: 1} if has_resource else None,
            pure=False, retries=0)
        block.future.add_done_callback(lambda _f, k=key: self.events.put(("done", k)))

    def _payload(self, pr: Mapping) -> dict:
        eng = self.engine
        p = eng.prepare(pr, sample_later=True, pad=False)  # both done on the worker
        p.pad_bytes = eng.pad_length()
        self.prepared[pr["run"]] = (pr, p)
        out = _payload(p.cell, pr, eng.timeout_s, spec=p.spec,
                       clean_env=eng.controls.clean_env, pad_bytes=p.pad_bytes)
        out["keep_output"] = not self.quality.fast
        return out

    # -- results -----------------------------------------------------------------

    def wait(self) -> None:
        """Sleep until a result or a block's end arrives (or ``poll_s``), then take
        everything that is there."""
        try:
            items = [self.events.get(timeout=self.poll_s)]
        except queue.Empty:
            return
        while True:
            try:
                items.append(self.events.get_nowait())
            except queue.Empty:
                break
        for kind, value in items:
            if kind == "result":
                self._result(value.get("attempt"), value.get("result") or {})
            else:
                self._block_done(value)

    def on_event(self, event) -> None:
        """Called by the Dask client (its own thread) for every streamed result."""
        _ts, msg = event
        self.events.put(("result", msg))

    def _result(self, key, result: Mapping) -> None:
        block = self.blocks.get(key)
        run = result.get("run")
        if block is None or run in self.recorded or run not in self.prepared:
            return  # from an attempt given up on, or a late duplicate: recorded once already
        block.back.add(run)
        pr, p = self.prepared.pop(run)
        ran = self._ran(pr, p, result)
        rec = self.engine.record(dict(pr, position=self.position), ran, extra={
            "host": self.host_of.get(block.addr, result.get("hostname")),
            "worker": result.get("worker"), "host_position": result.get("host_position")})
        self.position += 1
        self.recorded.add(run)
        self.progress.advance(rec, " ".join(f"{k}={v}" for k, v in pr["levels"].items()))

    def _ran(self, pr: Mapping, p, result: Mapping):
        md = result.get("measurement")
        if md is None:
            ran = not_run(pr, result.get("not_run") or "not run")
        else:
            m = Measurement(**{k: v for k, v in md.items()
                               if k in Measurement.__dataclass_fields__})
            ran = self.engine.conclude(pr, m, p.token, result.get("conditions") or {})
            if result.get("teardown"):
                ran.message = (ran.message + "; " if ran.message else "") + result["teardown"]
        ran.pad_bytes = p.pad_bytes
        return ran

    def _block_done(self, key: str) -> None:
        block = self.blocks.pop(key, None)
        if block is None:
            return  # given up on already (its worker was lost)
        mine = self.busy.get(block.addr, [])
        if block in mine:
            mine.remove(block)
        if not mine:
            self.busy.pop(block.addr, None)
        self.next_check = 0.0
        fut = block.future
        if fut.status == "finished":
            self.blocks[key] = block      # results not streamed yet are taken from here
            for result in fut.result():
                self._result(key, result)
            self.blocks.pop(key, None)
            rest = [pr for pr in block.missing() if pr["run"] not in self.recorded]
            if rest:
                self.queue.appendleft(rest)   # stopped before its end
            return
        self._failed(block)

    def _failed(self, block: _Block) -> None:
        """Errored or cancelled (worker died, comm lost): run what is missing elsewhere."""
        rest = [pr for pr in block.missing() if pr["run"] not in self.recorded]
        if not rest:
            return
        first = rest[0]
        if self.attempts[first["run"]] >= 5:
            why = _one_line(block.future.exception())
            hint = ""
            if "deserializ" in why or "No module" in why:
                hint = ("; the scheduler and workers need the same Python packages as this "
                        "machine, benchharness included")
            raise ExecutionError(f"run {first['run']} failed on the cluster 5 times "
                                 f"({why}){hint}")
        self.queue.appendleft(rest)

    # -- the whole run -------------------------------------------------------------

    def run(self, todo: Sequence[Mapping]) -> None:
        self.meet_workers()
        self.fill_queue(todo)
        self.progress.start(len(self.planned), len(self.planned) - len(todo), self.folder)
        self.client.subscribe_topic(self.topic, self.on_event)
        while self.queue or self.busy:
            self.check_workers()
            self.dispatch()
            if self.busy or self.queue:
                self.wait()
        for note in self.quality.notes:
            self.progress.note(note)
        self.quality.notes.clear()

    def close(self) -> None:
        self.progress.stop()
        self.jr.close()
        try:
            self.client.unsubscribe_topic(self.topic)
        except Exception:  # noqa: BLE001
            pass
        try:
            self.client.close(timeout=5)
        except Exception:  # noqa: BLE001
            pass


def execute_on_cluster(folder: Path, exp, planned: Sequence[Mapping], done: set, session: dict,
                       progress, facts: dict, scheduler: str, same_host_ok: bool = False,
                       prior=(), known_hosts: Mapping | None = None, poll_s: float = 0.25):
    """Run the not-yet-done planned runs on the cluster; returns a `RunOutcome`."""
    co = _Coordinator(folder, exp, planned, done, session, progress, scheduler, same_host_ok,
                      prior, known_hosts, poll_s)
    interrupted = False
    try:
        co.run([pr for pr in planned if int(pr["run"]) not in done])
    except KeyboardInterrupt:
        interrupted = True
    finally:
        co.close()
    host_json = {"coordinator": facts, "hosts": co.hosts_facts}
    return finalize(folder, exp, session, facts, dict(co.engine.counts), len(planned),
                    interrupted, host_json=host_json, quality=co.quality)
