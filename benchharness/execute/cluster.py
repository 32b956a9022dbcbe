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

The coordinator keeps the journal exactly as for local runs: each result is
appended as it arrives (``position`` is the order of arrival; ``host_position``
the order on that host) and fsynced within a second. A worker lost mid-run has
its run re-queued, together with the rest of its block, on another host; its
late result, if any, is ignored, so every run is recorded once. The analysis
then uses (block, host) pairs as blocks and says so.
"""

from __future__ import annotations

import collections
import os
import sys
import time
from pathlib import Path
from typing import Mapping, Sequence

from benchharness.results import journal as J
from benchharness.errors import ExecutionError, UsageError
from benchharness.execute.base import Measurement

RESOURCE = "bench"


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


def _record_from(pr: Mapping, result: Mapping, position: int, quality=None, token=None) -> dict:
    from benchharness.execute.runner import _record

    md = result.get("measurement")
    m = None
    if md:
        m = Measurement(**{k: v for k, v in md.items() if k in Measurement.__dataclass_fields__})
        if quality is not None and token is not None:
            token = dict(token, conditions=result.get("conditions") or {})
            m = quality.finish(token, pr, m)
            result = dict(result, status=m.status, message=m.message)
    status = result["status"]
    message = result.get("message") or ""
    if pr["warmup"] and m is not None:
        if status != "ok":
            message = f"warm-up run {status}: {message}"
        status = "warmup"
    rec = _record(pr, m, status, message)
    rec["position"] = position
    rec["host"] = result.get("host_name")
    rec["worker"] = result.get("worker")
    rec["host_position"] = result.get("host_position")
    return rec


def _wait_some(futures, timeout_s: float) -> list:
    """Futures that are done within ``timeout_s`` (possibly none)."""
    end = time.monotonic() + timeout_s
    while True:
        done = [f for f in futures if f.done()]
        if done or time.monotonic() >= end:
            return done
        time.sleep(0.005)


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


def execute_on_cluster(folder: Path, exp, planned: Sequence[Mapping], done: set, session: dict,
                       progress, facts: dict, scheduler: str, same_host_ok: bool = False,
                       prior=(), known_hosts: Mapping | None = None, poll_s: float = 0.25):
    """Run the not-yet-done planned runs on the cluster; returns a `RunOutcome`."""
    from benchharness.execute.runner import Progress, _CellCache, finalize
    from benchharness.execute import remote

    client = _connect(scheduler)
    progress = _HostProgress(progress or Progress())
    cells = _CellCache(exp, session)
    jr = J.Journal(folder)
    from benchharness.measure.quality import RunQuality

    quality = RunQuality(exp, folder)
    distinct = {tuple(sorted(pr["levels"].items())): pr["levels"] for pr in planned}
    quality.start([(lv, cells.get(lv)) for lv in distinct.values()])
    if quality.cfg.metrics is not None and quality.cfg.metrics.file_templates():
        quality.notes.append("note: metrics read from files (file:) are read on the "
                             "coordinator; on a cluster the file must be on a shared path")
    pad_rng = None
    if cells.controls.pad_env:
        import numpy as np

        pad_rng = np.random.default_rng([int(session.get("seed") or 0), len(done), 7])
    counts: dict[str, int] = collections.Counter(r["status"] for r in prior)
    position = max([int(r.get("position", -1)) for r in prior], default=-1) + 1
    recorded = set(done)
    interrupted = False
    hosts_facts = dict(known_hosts or {})
    try:
        workers = _workers(client)
        deadline = time.monotonic() + 30
        while not workers and time.monotonic() < deadline:
            time.sleep(0.5)
            workers = _workers(client)
        if not workers:
            raise ExecutionError(f"the Dask scheduler at {scheduler} has no workers; start "
                                 f"some with `dask worker {scheduler} --nthreads 1 --resources "
                                 f"{RESOURCE}=1`")
        try:
            idents = client.run(remote.identity)
        except Exception as exc:  # noqa: BLE001 - raised on the worker, re-raised by Dask
            raise ExecutionError(
                f"the workers of {scheduler} cannot run benchharness code "
                f"({_one_line(exc)}); install benchharness on every worker (or start "
                f"`dask worker` with it on PYTHONPATH)") from None
        for w in check_workers(workers, idents, same_host_ok):
            print(f"warning: {w}", file=sys.stderr)
        host_of = {}
        for addr, ident in idents.items():
            host_of[addr] = ident["worker"] if same_host_ok else ident["hostname"]
        for addr, f in client.run(remote.host_facts).items():
            hosts_facts.setdefault(host_of[addr], f)

        # Blocks in plan order; warm-up runs (block 0) may go to any free host.
        todo = [pr for pr in planned if int(pr["run"]) not in done]
        blocks: collections.OrderedDict = collections.OrderedDict()
        for pr in todo:
            blocks.setdefault(pr["block"], []).append(pr)
        queue: collections.deque = collections.deque()
        for b, runs in blocks.items():
            if b == 0:
                queue.extend([[pr] for pr in runs])  # warm-ups: one at a time, anywhere
            else:
                queue.append(list(runs))
        current: dict[str, collections.deque] = {}   # worker addr → rest of its block
        inflight: dict = {}                           # future → (addr, planned run)
        attempts = collections.Counter()
        tokens: dict = {}
        timeout_s = exp.timeout_s
        progress.start(len(planned), len(planned) - len(todo), folder)

        def submit(addr):
            rest = current.get(addr)
            if not rest:
                if not queue:
                    return False
                rest = current[addr] = collections.deque(queue.popleft())
            pr = rest.popleft()
            c = cells.get(pr["levels"])
            attempts[pr["run"]] += 1
            from benchharness.execute.runner import _spec

            spec, token = quality.prepare(_spec((c["argv"], c["shell"]), c, timeout_s,
                                                run_id=pr["run"], levels=pr["levels"]),
                                          pr["levels"], c)
            pad = int(pad_rng.integers(0, 4097)) if pad_rng is not None else None
            tokens[pr["run"]] = (token, pad)
            payload = _payload(c, pr, timeout_s, spec=spec,
                               clean_env=cells.controls.clean_env, pad_bytes=pad)
            fut = client.submit(remote.execute_run, payload,
                                key=f"bh-run-{pr['run']}-{attempts[pr['run']]}-{os.getpid()}",
                                workers=[addr], allow_other_workers=False,
                                resources={RESOURCE: 1} if (workers.get(addr, {}).get(
                                    "resources") or {}).get(RESOURCE) else None,
                                pure=False, retries=0)
            inflight[fut] = (addr, pr)
            return True

        def requeue_worker(addr):
            """A worker is gone: its in-flight run and the rest of its block go elsewhere."""
            lost = [(f, pr) for f, (a, pr) in inflight.items() if a == addr]
            rest = list(current.pop(addr, []))
            for f, pr in lost:
                inflight.pop(f, None)
                try:
                    f.cancel()
                except Exception:  # noqa: BLE001
                    pass
            runs = [pr for _f, pr in lost if pr["run"] not in recorded] + rest
            if runs:
                queue.appendleft(runs)
                progress.note(f"worker {host_of.get(addr, addr)} was lost; {len(runs)} runs of "
                              "its block go to another host")

        while True:
            live = _workers(client)
            for addr in list(current) + [a for _f, (a, _p) in inflight.items()]:
                if addr not in live:
                    requeue_worker(addr)
            new = [a for a in live if a not in host_of]
            if new:
                more = client.run(remote.identity, workers=new)
                for addr, ident in more.items():
                    host_of[addr] = ident["worker"] if same_host_ok else ident["hostname"]
                for addr, f in client.run(remote.host_facts, workers=new).items():
                    hosts_facts.setdefault(host_of[addr], f)
            workers = live
            busy = {a for a, _p in inflight.values()}
            for addr in live:
                if addr not in busy:
                    submit(addr)
            if not inflight:
                if not queue and not any(current.values()):
                    break
                if not live:
                    time.sleep(poll_s)
                    continue
            finished = _wait_some(list(inflight), poll_s)
            for fut in finished:
                addr, pr = inflight.pop(fut)
                if fut.status == "finished":
                    result = fut.result()
                    if pr["run"] in recorded:
                        continue  # a late duplicate: recorded once already
                    result["host_name"] = host_of.get(addr, result.get("hostname"))
                    token, pad = tokens.get(pr["run"], (None, None))
                    rec = _record_from(pr, result, position, quality, token)
                    if pad is not None:
                        rec["pad_env_bytes"] = pad
                    position += 1
                    jr.append(rec)
                    recorded.add(pr["run"])
                    counts[rec["status"]] += 1
                    progress.advance(rec, " ".join(f"{k}={v}" for k, v in pr["levels"].items()))
                else:
                    # Errored or cancelled (worker died, comm lost): run it elsewhere.
                    if pr["run"] not in recorded:
                        if attempts[pr["run"]] >= 5:
                            why = _one_line(fut.exception())
                            hint = ""
                            if "deserializ" in why or "No module" in why:
                                hint = ("; the scheduler and workers need the same Python "
                                        "packages as this machine, benchharness included")
                            raise ExecutionError(f"run {pr['run']} failed on the cluster 5 "
                                                 f"times ({why}){hint}")
                        rest = list(current.pop(addr, []))
                        queue.appendleft([pr] + rest)
        for note in quality.notes:
            progress.note(note)
        quality.notes.clear()
    except KeyboardInterrupt:
        interrupted = True
    finally:
        progress.stop()
        jr.close()
        try:
            client.close(timeout=5)
        except Exception:  # noqa: BLE001
            pass
    host_json = {"coordinator": facts, "hosts": hosts_facts}
    return finalize(folder, exp, session, facts, dict(counts), len(planned), interrupted,
                    host_json=host_json, quality=quality)
