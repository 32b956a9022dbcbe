"""Local execution: runs commands on this machine through the launcher process.

`LocalExecutor` implements the `Executor` protocol of `benchharness.execute.base`.
It owns one launcher process (`benchharness/execute/launcher.py`, stdlib only)
and sends it one `RunSpec` at a time over a pipe; the launcher spawns, times and
reaps the child and answers with the measurement. Why a separate process: on
Linux ``ru_maxrss`` of a child includes the peak of the address space it was
spawned from, so children of a big harness would report the harness's size; the
launcher's address space is small and reset (``/proc/self/clear_refs``) before
each spawn. See ``docs/execution.md`` for what each figure means.

The resource figures come from ``wait4(2)`` (Linux ``getrusage`` fields, KiB for
``ru_maxrss`` — common practice). Noise controls (CPU affinity, niceness, ASLR
off) follow the advice of Mytkowicz et al. (2009), "Producing wrong data without
doing anything obviously wrong!".
"""

from __future__ import annotations

import dataclasses as _dc
import os
import select
import signal
import subprocess
import sys
import threading
from pathlib import Path

from benchharness.errors import ExecutionError
from benchharness.execute import launcher as _proto
from benchharness.execute.base import Measurement, OnStart, RunSpec
from benchharness.execute.noise import check_cpus

LAUNCHER_PATH = Path(_proto.__file__).resolve()


class LocalExecutor:
    """Run `RunSpec`s as local processes, one at a time, and measure them.

    ``kill_grace_s``: time between SIGTERM and SIGKILL when a run times out.
    ``linger_s``: how long output pipes are still read after the child was
    reaped (descendants that escaped may hold them open; then reading stops).
    Use as a context manager or call `close()`.
    """

    def __init__(self, kill_grace_s: float = 0.5, linger_s: float = 0.1,
                 python: str | None = None):
        self.kill_grace_s = float(kill_grace_s)
        self.linger_s = float(linger_s)
        self._proc: subprocess.Popen | None = None
        self._lock = threading.Lock()
        self._closed = False
        c2l_r, c2l_w = os.pipe()   # harness -> launcher
        l2c_r, l2c_w = os.pipe()   # launcher -> harness
        try:
            self._proc = subprocess.Popen(
                [python or sys.executable, "-I", "-S", "-B", str(LAUNCHER_PATH),
                 str(c2l_r), str(l2c_w)],
                pass_fds=(c2l_r, l2c_w), stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                close_fds=True, process_group=0,  # Ctrl-C reaches the harness only
            )
        except OSError as e:
            for fd in (c2l_r, c2l_w, l2c_r, l2c_w):
                os.close(fd)
            raise ExecutionError(f"cannot start the launcher process: {e}") from e
        os.close(c2l_r)
        os.close(l2c_w)
        self._w = c2l_w
        self._r = l2c_r
        self._reader = _proto.FrameReader(l2c_r)
        hello = self._recv(timeout_s=30)
        if hello.get("op") != "hello":
            self._kill_launcher()
            raise ExecutionError(f"the launcher answered {hello!r} instead of hello")
        if hello.get("pidfd_error"):
            self.close()
            raise ExecutionError("local execution needs Linux 5.3 or later (pidfd_open); "
                                 f"here it fails: {hello['pidfd_error']}")
        self.launcher_pid: int = hello["pid"]
        self.subreaper: bool = hello["subreaper"]
        #: Whether this kernel lets a run turn off ASLR; reason when it does not.
        self.aslr_control: bool = hello["aslr_control"]
        self.aslr_reason: str = hello["aslr_reason"]
        #: Writes RunSpec.inflight_path itself (the runner then needs no on_start call).
        self.records_inflight: bool = True
        self._current: tuple[int, int] | None = None
        self._last_env: dict | None = None

    # ---------------------------------------------------------------- protocol

    def _recv(self, timeout_s: float | None = None) -> dict:
        if timeout_s is not None and not self._reader.buf:
            ready, _, _ = select.select([self._r], [], [], timeout_s)
            if not ready:
                self._kill_launcher()
                raise ExecutionError(f"the launcher did not answer within {timeout_s:g} s")
        try:
            msg = self._reader.read()
        except OSError as e:
            msg = None
            err = e
        else:
            err = None
        if msg is None:
            code = self._proc.poll() if self._proc else None
            if code is None and self._proc is not None:
                try:
                    code = self._proc.wait(timeout=2)
                except subprocess.TimeoutExpired:
                    code = "still running"
            self._cleanup_after_death()
            raise ExecutionError(
                f"the launcher process died (exit status {code})"
                + (f": {err}" if err else "") + "; no further runs can be measured")
        return msg

    def _send(self, obj: dict) -> None:
        try:
            _proto.send(self._w, obj)
        except OSError as e:
            self._cleanup_after_death()
            raise ExecutionError(f"the launcher process is gone ({e.strerror or e})") from e

    def _cleanup_after_death(self) -> None:
        """The launcher is gone: kill the run it was watching, release the pipes."""
        if self._current is not None:
            try:
                os.killpg(self._current[1], signal.SIGKILL)
            except OSError:
                pass
            self._current = None
        self._release(wait_s=5)

    def _release(self, wait_s: float) -> None:
        """Close our pipe ends and reap the launcher (killed if it does not exit in time)."""
        self._closed = True
        for fd in (self._w, self._r):
            try:
                os.close(fd)
            except OSError:
                pass
        self._w = self._r = -1
        if self._proc is not None:
            try:
                self._proc.wait(timeout=wait_s)
            except subprocess.TimeoutExpired:
                self._proc.kill()
                self._proc.wait()

    def _kill_launcher(self) -> None:
        if self._proc is not None and self._proc.poll() is None:
            self._proc.kill()
        self._cleanup_after_death()

    # ---------------------------------------------------------------- API

    #: `execute` takes ``while_running``: work the caller does while the run executes.
    supports_while_running = True

    def execute(self, spec: RunSpec, on_start: OnStart | None = None,
                while_running=None, prepared: dict | None = None) -> Measurement:
        """Run ``spec`` to completion (or timeout) and return its `Measurement`.

        Raises `ExecutionError` when the request itself is impossible (no
        command, CPUs that do not exist) or the launcher died; a command that
        fails, cannot start or times out is a `Measurement` with status
        ``failed``/``timeout``, not an exception. Calls from several threads
        are served one after another (runs on one machine never overlap).
        """
        with self._lock:
            return self._execute(spec, on_start, while_running, prepared)

    def prepare_request(self, spec: RunSpec, notify: bool = False) -> dict:
        """Check ``spec`` and build its request (without the environment).

        The runner builds the next run's request while the current run
        executes and hands it to `execute` as ``prepared``.
        """
        if (spec.argv is None) == (spec.shell_command is None):
            raise ExecutionError("a run needs exactly one of argv and shell_command")
        if spec.argv is not None and (not spec.argv or not spec.argv[0]):
            raise ExecutionError("the command is empty")
        cpus = check_cpus(spec.cpus) if spec.cpus is not None else None
        req = {
            "op": "run",
            "argv": list(spec.argv) if spec.argv is not None else None,
            "shell_command": spec.shell_command,
            "cwd": str(spec.cwd) if spec.cwd is not None else None,
            "timeout_s": float(spec.timeout_s) if spec.timeout_s is not None else None,
            "cpus": list(cpus) if cpus else None,
            "nice": int(spec.nice) if spec.nice is not None else None,
            "no_aslr": bool(spec.no_aslr),
            "capture_bytes": int(spec.capture_bytes),
            "kill_grace_s": self.kill_grace_s,
            "linger_s": self.linger_s,
            "notify": notify,
        }
        if spec.inflight_path:
            req["inflight"] = (str(spec.inflight_path), int(spec.run_id or 0), _boot_id())
        return req

    def _execute(self, spec: RunSpec, on_start: OnStart | None,
                 while_running=None, prepared: dict | None = None) -> Measurement:
        if self._closed:
            raise ExecutionError("this executor is closed")
        if prepared is not None and prepared.get("notify") == (on_start is not None):
            req = prepared
        else:
            req = self.prepare_request(spec, on_start is not None)
        # The environment is sent only when it differs from the previous run's
        # (the runner reuses one per cell), which keeps the request small.
        if self._last_env is None or spec.env != self._last_env:
            env = {str(k): str(v) for k, v in spec.env.items()}
            req["env"] = env
            self._last_env = env
        try:
            self._send(req)
            if while_running is not None:
                # The caller's own bookkeeping (the next run's spec), done while
                # the launcher starts this run instead of after it ends.
                while_running()
            msg = self._recv()
            if msg.get("op") == "started":
                self._current = (msg["pid"], msg["pgid"])
                if on_start is not None:
                    on_start(msg["pid"], msg["pgid"])
                msg = self._recv()
        except BaseException:
            # Ctrl-C or an error in on_start: the launcher kills the run's tree
            # when our end of its pipe closes; wait for that, then re-raise.
            if not self._closed:
                self._shutdown(hard=True)
            raise
        self._current = None
        if msg.get("op") != "done":
            self._kill_launcher()
            raise ExecutionError(f"unexpected message from the launcher: {msg.get('op')!r}")
        return _measurement(msg)

    def leftovers(self) -> list[int]:
        """Pids of processes that earlier runs left running (still alive)."""
        with self._lock:
            self._send({"op": "ping"})
            return list(self._recv(timeout_s=30)["leftovers"])

    def close(self) -> None:
        """Stop the launcher (processes that runs left behind are not killed)."""
        if not self._closed:
            self._shutdown(hard=False)

    def _shutdown(self, hard: bool) -> None:
        if not hard:
            try:
                _proto.send(self._w, {"op": "exit"})
            except OSError:
                pass
        self._release(wait_s=10)
        self._current = None

    def __enter__(self) -> "LocalExecutor":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __del__(self):  # pragma: no cover - best effort at interpreter exit
        try:
            if not self._closed and self._proc is not None:
                self._shutdown(hard=False)
        except Exception:
            pass


# Defaults of the optional Measurement fields (``extra`` is given per instance).
_M_DEFAULTS = {f.name: f.default for f in _dc.fields(Measurement)
               if f.default is not _dc.MISSING}


_BOOT = None


def _boot_id() -> str:
    global _BOOT
    if _BOOT is None:
        from benchharness.journal import _boot_id as read_boot_id

        _BOOT = read_boot_id()
    return _BOOT


def _measurement(msg: dict) -> Measurement:
    """The reply as a `Measurement`, built field by field.

    The generated ``__init__`` of a frozen dataclass sets each of its 18 fields
    through ``object.__setattr__`` (about 10 us per run); filling the instance
    dictionary directly gives the same object in a fraction of that.
    """
    m = object.__new__(Measurement)
    d = m.__dict__
    d.update(_M_DEFAULTS)
    wall_ns = msg.get("wall_ns")
    d["status"] = msg["status"]
    d["exit_code"] = msg.get("exit_code")
    d["wall_s"] = None if wall_ns is None else wall_ns / 1e9
    d["started_at"] = msg["started_at"]
    d["message"] = msg.get("message", "")
    d["stdout_tail"] = msg.get("stdout", b"")
    d["stderr_tail"] = msg.get("stderr", b"")
    d["extra"] = dict(msg.get("extra") or {})
    ru = msg.get("rusage")
    if ru is not None:
        user, sys_, maxrss, minflt, majflt, nvcsw, nivcsw, inblk, oublk = ru
        d["user_s"] = float(user)
        d["sys_s"] = float(sys_)
        d["max_rss_kib"] = int(maxrss)
        d["minor_faults"] = int(minflt)
        d["major_faults"] = int(majflt)
        d["voluntary_switches"] = int(nvcsw)
        d["involuntary_switches"] = int(nivcsw)
        d["in_blocks"] = int(inblk)
        d["out_blocks"] = int(oublk)
    return m


__all__ = ["LocalExecutor", "LAUNCHER_PATH"]
