"""Wrappers around a `LocalExecutor` for tests that compare the runner's paths.

`OneByOne` hides the executor's queued runs and its overlap of the next request
(the runner then sends one run at a time and waits for each); `NoQueue` hides
only the queued runs (one run at a time, the next request made while a run
executes); `Counting` counts the streams of queued runs the runner opens.
"""

from __future__ import annotations

from benchharness.execute.base import Executor


class OneByOne(Executor):
    """The same executor, offering only one run at a time."""

    def __init__(self, inner):
        self.inner = inner
        self.records_inflight = inner.records_inflight

    def execute(self, spec, on_start=None):
        return self.inner.execute(spec, on_start=on_start)

    def close(self):
        pass


class NoQueue(Executor):
    """The same executor without queued runs: one at a time, overlapped."""

    supports_while_running = True

    def __init__(self, inner):
        self.inner = inner
        self.records_inflight = inner.records_inflight
        self.launcher_pid = inner.launcher_pid

    def execute(self, spec, on_start=None, while_running=None, prepared=None):
        return self.inner.execute(spec, on_start=on_start, while_running=while_running,
                                  prepared=prepared)

    def prepare_request(self, spec, notify=False):
        return self.inner.prepare_request(spec, notify)

    @property
    def aslr_control(self):
        return self.inner.aslr_control

    @property
    def aslr_reason(self):
        return self.inner.aslr_reason

    def close(self):
        pass


class Counting(Executor):
    """The executor, counting the streams of queued runs opened on it."""

    supports_while_running = True
    supports_queued_runs = True

    def __init__(self, inner):
        self.inner = inner
        self.streams = 0
        self.records_inflight = inner.records_inflight
        self.launcher_pid = inner.launcher_pid

    def execute(self, spec, on_start=None, while_running=None, prepared=None):
        return self.inner.execute(spec, on_start=on_start, while_running=while_running,
                                  prepared=prepared)

    def prepare_request(self, spec, notify=False):
        return self.inner.prepare_request(spec, notify)

    def close(self):
        pass

    def open_stream(self, *a, **k):
        self.streams += 1
        return self.inner.open_stream(*a, **k)
