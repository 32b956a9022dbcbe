"""Plain data exchanged between the runner and an executor.

An executor takes a `RunSpec` (what to start, with which environment, limits
and noise controls) and returns a `Measurement` (what happened and what it
cost). Executors: `local` (real processes through a small launcher process),
`simulated` (draws run times from a known model, for tests and validation of
statistical procedures), `dask` (runs on a cluster of hosts). `Executor` is
the contract, with every optional capability an executor may offer declared.
"""

from __future__ import annotations

import abc
from dataclasses import dataclass, field
from typing import Callable, Mapping

# Resource-usage fields every measurement carries, in runs.csv column order.
USAGE_FIELDS = (
    "wall_s", "user_s", "sys_s", "max_rss_kib", "minor_faults", "major_faults",
    "voluntary_switches", "involuntary_switches", "in_blocks", "out_blocks",
)

STATUSES = ("ok", "failed", "timeout", "warmup")


@dataclass(frozen=True)
class RunSpec:
    """One process to start and measure.

    Exactly one of ``argv`` (executed directly, no shell) and ``shell_command``
    (given to ``/bin/sh -c``; substituted values already quoted) is set.
    ``env`` is the child's complete environment. ``levels`` and ``run_id`` are
    informational (simulated executors use them to decide the outcome).
    """

    argv: tuple[str, ...] | None = None
    shell_command: str | None = None
    env: Mapping[str, str] = field(default_factory=dict)
    cwd: str | None = None
    timeout_s: float | None = None
    run_id: int | None = None
    levels: Mapping[str, str] = field(default_factory=dict)
    # Noise controls (measurement-quality issue); None = leave as inherited.
    cpus: tuple[int, ...] | None = None
    nice: int | None = None
    no_aslr: bool = False
    # How much of each output stream to keep (the tail), in bytes.
    capture_bytes: int = 64 * 1024
    # A file where the executor records the running child as soon as it exists
    # (``{"run", "pid", "pgid", "boot"}`` at offset 0), so that a later resume can
    # stop what a dead harness left running; costs the harness no wake-up.
    inflight_path: str | None = None


@dataclass(frozen=True)
class Measurement:
    """What one run did and cost.

    ``status`` is ``ok`` (exit code 0), ``failed`` (non-zero exit, or could
    not start) or ``timeout`` (killed after ``timeout_s``). Times are seconds,
    memory KiB (Linux ``ru_maxrss`` unit), counts are per run (not
    cumulative). ``started_at`` is ISO 8601 UTC with microseconds.
    """

    status: str
    exit_code: int | None
    wall_s: float | None
    user_s: float | None = None
    sys_s: float | None = None
    max_rss_kib: int | None = None
    minor_faults: int | None = None
    major_faults: int | None = None
    voluntary_switches: int | None = None
    involuntary_switches: int | None = None
    in_blocks: int | None = None
    out_blocks: int | None = None
    started_at: str = ""
    message: str = ""
    stdout_tail: bytes = b""
    stderr_tail: bytes = b""
    extra: Mapping[str, object] = field(default_factory=dict)


# Called by an executor as soon as the child exists: (pid, process group id).
OnStart = Callable[[int, int], None]

# Called by an executor (on another thread) while a run executes: work the
# caller does meanwhile (the next run's request, this run's conditions).
WhileRunning = Callable[[], None]


class Executor(abc.ABC):
    """Anything that can run a `RunSpec` and measure it: the executor contract.

    Every executor implements `execute`; `close` releases what it holds. The
    run engine (`benchharness.execute.engine`) reads the optional capabilities
    below from the executor itself, never by probing for attributes: a
    subclass that offers one sets its flag and implements its method; the
    defaults here say "not offered", which is always correct (the engine then
    does the work itself, one run at a time).

    ``records_inflight``
        `execute` writes the running child to ``RunSpec.inflight_path`` itself
        (so the engine passes no ``on_start`` callback and wakes up for nothing
        mid-run). Otherwise the executor calls ``on_start(pid, pgid)``.
    ``supports_while_running``
        `execute` accepts ``while_running`` (called once the child started,
        while it executes) and ``prepared`` (a request built by
        `prepare_request` ahead of time).
    ``supports_queued_runs``
        `open_stream` queues runs back to back and journals those that end ok
        itself (`benchharness.execute.local.RunStream`).
    ``aslr_control``, ``aslr_reason``
        whether a run can turn address-space randomization off, and why not.
    ``launcher_pid``
        a helper process of ours that a busy-process check must not count.
    ``memory_floor``
        ``{"kib": ..., "how": ...}``: the ``max_rss_kib`` a do-nothing run
        records here (`benchharness.measure.floor`), or None.
    ``stopped_runs``
        after the executor died under a run: what it did to stop that run.
    """

    records_inflight: bool = False
    supports_while_running: bool = False
    supports_queued_runs: bool = False
    launcher_pid: int | None = None
    stopped_runs: str | None = None

    @property
    def aslr_control(self) -> bool:
        """Whether a run may turn ASLR off here (`aslr_reason` says why not)."""
        return True

    @property
    def aslr_reason(self) -> str:
        return "the kernel does not allow it"

    @property
    def memory_floor(self) -> dict | None:
        """The smallest ``max_rss_kib`` a run can record here, when measured."""
        return None

    @abc.abstractmethod
    def execute(self, spec: RunSpec, on_start: OnStart | None = None) -> Measurement:
        """Run ``spec`` to its end (or timeout) and return what it did and cost.

        With ``supports_while_running`` the executor also takes the keywords
        ``while_running`` (a `WhileRunning`) and ``prepared``.
        """

    def prepare_request(self, spec: RunSpec, notify: bool = False) -> dict:
        """Check ``spec`` and build its request ahead of time (``supports_while_running``)."""
        raise NotImplementedError(f"{type(self).__name__} does not prepare requests ahead")

    def open_stream(self, journal_path, freq_files: dict | None = None,
                    fields: Mapping | None = None):
        """Queue runs to be run back to back (``supports_queued_runs``)."""
        raise NotImplementedError(f"{type(self).__name__} does not queue runs")

    def close(self) -> None:
        """Release what the executor holds (a helper process, connections)."""


class BasicExecutor(Executor):
    """Any object with ``execute(spec, on_start=None)`` (and maybe ``close()``), seen
    through the contract with none of its optional capabilities."""

    def __init__(self, inner):
        self.inner = inner

    def execute(self, spec: RunSpec, on_start: OnStart | None = None) -> Measurement:
        return self.inner.execute(spec, on_start=on_start)

    def close(self) -> None:
        self.inner.close()


def as_executor(obj) -> Executor:
    """``obj`` itself when it declares the contract, else a `BasicExecutor` around it."""
    return obj if isinstance(obj, Executor) else BasicExecutor(obj)
