"""The worker side of cluster runs: what a Dask worker executes for one run.

Each worker process keeps one `LocalExecutor` (its own small launcher, so peak
memory figures are the run's, not the worker's), a cache of the build steps it
has already run (once per host and rendered form), and a counter giving each
run's position on that host. The coordinator sends whole blocks
(`execute_block`); each result streams back as an event the moment its run
ends, so a run costs the worker its own launch and nothing more. Functions
here are sent to workers by reference, so benchharness must be importable on
every worker (same version as the coordinator).
"""

from __future__ import annotations

import os
import socket
import threading

_STATE: dict = {}
_LOCK = threading.Lock()


def _state() -> dict:
    with _LOCK:
        if "executor" not in _STATE:
            from benchharness.execute.local import LocalExecutor

            _STATE["executor"] = LocalExecutor()
            _STATE["builds"] = {}
            _STATE["position"] = 0
        return _STATE


def _worker_name(dask_worker=None) -> tuple[str, str]:
    if dask_worker is not None:
        return str(dask_worker.name), str(dask_worker.address)
    try:
        from distributed import get_worker

        w = get_worker()
        return str(w.name), str(w.address)
    except (ImportError, ValueError):
        return socket.gethostname(), ""


def host_facts() -> dict:
    """Machine facts of the host this worker runs on (for host.json)."""
    from benchharness.measure.host import collect_facts

    facts = collect_facts()
    facts["worker_pid"] = os.getpid()
    return facts


def identity(dask_worker=None) -> dict:
    """Who runs here; `Client.run` passes ``dask_worker`` to functions that take it."""
    name, addr = _worker_name(dask_worker)
    return {"hostname": socket.gethostname(), "worker": name, "address": addr,
            "pid": os.getpid()}


def _spec(part: dict, timeout_s, run_id=None, levels=None):
    from benchharness.execute.base import RunSpec

    if part.get("clean_env"):
        from benchharness.execute.envs import clean_environment

        env = clean_environment(os.environ)
    else:
        env = dict(os.environ)
    env.update(part.get("env") or {})
    if part.get("pad_bytes") is not None:
        from benchharness.execute.envs import PAD_VARIABLE

        env[PAD_VARIABLE] = "x" * int(part["pad_bytes"])
    return RunSpec(argv=tuple(part["argv"]) if part.get("argv") else None,
                   shell_command=part.get("shell"), env=env, cwd=part.get("cwd"),
                   timeout_s=timeout_s, run_id=run_id, levels=levels or {},
                   cpus=tuple(part["cpus"]) if part.get("cpus") else None,
                   nice=part.get("nice"), no_aslr=bool(part.get("no_aslr")),
                   capture_bytes=int(part.get("capture_bytes") or 64 * 1024))


def _step(ex, part: dict | None, timeout_s, levels) -> str | None:
    """Run one untimed step; why it failed, or None."""
    from benchharness.execute.engine import short_reason

    m = ex.execute(_spec(part, timeout_s, levels=levels))
    return None if m.status == "ok" else short_reason(m)


def _build(st: dict, ex, build: dict, levels) -> str:
    """Build once per host and rendered form; "" when it went well, else why not."""
    from benchharness.execute.engine import output_tail, short_reason

    # the rendered form includes the environment: `env: {CFLAGS: "-O{opt}"}` with a
    # plain `build: make` is one build per level of opt
    key = (tuple(build.get("argv") or ()), build.get("shell"), build.get("cwd"),
           tuple(sorted((build.get("env") or {}).items())))
    if key not in st["builds"]:
        bm = ex.execute(_spec(build, None, levels=levels))
        st["builds"][key] = "" if bm.status == "ok" else (
            f"build failed: {short_reason(bm)}"
            + ("" if bm.message else output_tail(bm.stderr_tail or bm.stdout_tail)))
    return st["builds"][key]


def execute_run(payload: dict) -> dict:
    """Run one planned run (with its build, reset and teardown) on this worker.

    ``payload``: ``run``, ``warmup``, ``levels``, ``timeout_s``, ``command``,
    ``build``, ``reset``, ``teardown`` (each ``{argv|shell, env, cwd}`` or None),
    ``keep_output`` (the coordinator reads the output: metrics, expect, samples).
    Returns plain data: ``measurement`` (a dict, or None when a step before the
    run failed: ``not_run`` says why), ``teardown`` (why the teardown failed,
    or ""), ``conditions``, ``host_position`` (0-based order of runs on this
    worker) and who ran it.
    """
    from dataclasses import asdict

    st = _state()
    ex = st["executor"]
    out: dict = {"run": payload["run"], "measurement": None, "not_run": None, "teardown": ""}
    timeout_s = payload.get("timeout_s")
    levels = payload.get("levels") or {}
    why = _build(st, ex, payload["build"], levels) if payload.get("build") else ""
    if not why and payload.get("reset") is not None and not payload.get("warmup"):
        failed = _step(ex, payload["reset"], timeout_s, levels)
        why = f"reset failed: {failed}" if failed else ""
    if why:
        out["not_run"] = why
    else:
        from benchharness.measure.host import sample_run_conditions

        cmd = payload["command"]
        out["conditions"] = sample_run_conditions(tuple(cmd["cpus"]) if cmd.get("cpus")
                                                  else None)
        m = ex.execute(_spec(cmd, timeout_s, run_id=payload["run"], levels=levels))
        md = asdict(m)
        if not payload.get("keep_output", True):
            md["stdout_tail"] = md["stderr_tail"] = b""
        out["measurement"] = md
        if payload.get("teardown") is not None:
            failed = _step(ex, payload["teardown"], timeout_s, levels)
            out["teardown"] = f"teardown failed: {failed}" if failed else ""
    with _LOCK:
        out["host_position"] = st["position"]
        st["position"] += 1
    if "identity" not in st:
        st["identity"] = identity()
    out.update(st["identity"])
    return out


def execute_block(payloads: list, topic: str, attempt: str) -> list:
    """Run a whole block here, back to back, streaming each result as it ends.

    Each result goes to the coordinator at once as an event on ``topic``
    (``{"attempt", "result"}``; the coordinator subscribed to it before it sent
    the block), without waiting for it to arrive; the block's return value
    holds every result again, so nothing is lost when an event is. The block
    stops early, after the run in progress, once the coordinator is gone (the
    scheduler then cancels this task).
    """
    results = []
    for payload in payloads:
        if not _still_wanted():
            break
        res = execute_run(payload)
        results.append(res)
        _send(topic, {"attempt": attempt, "result": res})
    return results


def _send(topic: str, msg: dict) -> None:
    try:
        from distributed import get_worker

        get_worker().log_event(topic, msg)
    except (ImportError, ValueError, TypeError):
        pass  # not on a worker, or not serializable: the block's return value carries it


def _still_wanted() -> bool:
    """False once the scheduler cancelled this task (its coordinator went away)."""
    try:
        from distributed import get_worker
        from distributed.worker import thread_state

        ts = get_worker().state.tasks.get(thread_state.key)
        return ts is None or ts.state not in ("cancelled", "released", "forgotten")
    except Exception:  # noqa: BLE001 - outside a worker, or another version: keep going
        return True
