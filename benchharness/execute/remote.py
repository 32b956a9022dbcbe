"""The worker side of cluster runs: what a Dask worker executes for one run.

Each worker process keeps one `LocalExecutor` (its own small launcher, so peak
memory figures are the run's, not the worker's), a cache of the build steps it
has already run (once per host and rendered form), and a counter giving each
run's position on that host. Functions here are sent to workers by reference,
so benchharness must be importable on every worker (same version as the
coordinator).
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


def execute_run(payload: dict) -> dict:
    """Run one planned run (with its build, reset and teardown) on this worker.

    ``payload``: ``run``, ``warmup``, ``levels``, ``timeout_s``, ``command``,
    ``build``, ``reset``, ``teardown`` (each ``{argv|shell, env, cwd}`` or None).
    Returns the measurement as a plain dict plus ``host``/``worker`` facts and
    ``host_position`` (0-based order of runs on this worker).
    """
    from dataclasses import asdict

    st = _state()
    ex = st["executor"]
    out: dict = {"status": None, "message": "", "measurement": None}
    timeout_s = payload.get("timeout_s")
    levels = payload.get("levels") or {}
    build = payload.get("build")
    if build is not None:
        # the rendered form includes the environment: `env: {CFLAGS: "-O{opt}"}` with a
        # plain `build: make` is one build per level of opt
        key = (tuple(build.get("argv") or ()), build.get("shell"), build.get("cwd"),
               tuple(sorted((build.get("env") or {}).items())))
        if key not in st["builds"]:
            bm = ex.execute(_spec(build, None, levels=levels))
            ok = bm.status == "ok"
            msg = "" if ok else "build failed: " + (bm.message or f"exit code {bm.exit_code}")
            st["builds"][key] = (ok, msg)
        ok, msg = st["builds"][key]
        if not ok:
            out.update(status="failed", message=msg)
    if out["status"] is None and payload.get("reset") is not None and not payload.get("warmup"):
        rm = ex.execute(_spec(payload["reset"], timeout_s, levels=levels))
        if rm.status != "ok":
            out.update(status="failed",
                       message="reset failed: " + (rm.message or f"exit code {rm.exit_code}"))
    if out["status"] is None:
        from benchharness.measure.host import sample_run_conditions

        cmd = payload["command"]
        out["conditions"] = sample_run_conditions(tuple(cmd["cpus"]) if cmd.get("cpus")
                                                  else None)
        m = ex.execute(_spec(cmd, timeout_s, run_id=payload["run"], levels=levels))
        out["measurement"] = asdict(m)  # output tails included: metrics and expect need them
        out["status"] = m.status
        out["message"] = m.message
        if payload.get("teardown") is not None:
            tm = ex.execute(_spec(payload["teardown"], timeout_s, levels=levels))
            if tm.status != "ok":
                out["message"] = (out["message"] + "; " if out["message"] else "") + \
                    "teardown failed: " + (tm.message or f"exit code {tm.exit_code}")
    with _LOCK:
        out["host_position"] = st["position"]
        st["position"] += 1
    out.update(identity())
    return out
