"""Plain data exchanged between the runner and an executor.

An executor takes a `RunSpec` (what to start, with which environment, limits
and noise controls) and returns a `Measurement` (what happened and what it
cost). Executors: `local` (real processes through a small launcher process),
`simulated` (draws run times from a known model, for tests and validation of
statistical procedures), `dask` (runs on a cluster of hosts).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Mapping, Protocol

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


class Executor(Protocol):
    """Anything that can run a `RunSpec` and measure it."""

    def execute(self, spec: RunSpec, on_start: OnStart | None = None) -> Measurement:
        ...

    def close(self) -> None:
        ...
