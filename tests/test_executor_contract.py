"""The executor contract (`execute/base.py`) declares every capability the run loops use.

The run engine and the loops around it read an executor's capabilities from the
executor itself: each attribute they use must be declared on `Executor`, and
none is probed for with ``getattr``/``hasattr``. Checked on the source with
`ast`; the checker is tried first on planted code, so it cannot pass by seeing
nothing. Then the behaviour: an executor declaring no capability gets plain
one-at-a-time calls, and a plain object with only ``execute`` still works.
"""

from __future__ import annotations

import ast
import textwrap
from pathlib import Path

from benchharness.execute.base import Executor, Measurement, as_executor

ROOT = Path(__file__).resolve().parent.parent
# the cluster coordinator hands runs to workers, not to an executor (remote.py runs them)
USERS = ("benchharness/execute/engine.py", "benchharness/execute/runner.py",
         "benchharness/gate/session.py", "benchharness/execute/remote.py")
EXECUTOR_NAMES = {"executor", "ex"}


def _is_executor(node) -> bool:
    if isinstance(node, ast.Name):
        return node.id in EXECUTOR_NAMES
    return (isinstance(node, ast.Attribute) and node.attr == "executor"
            and isinstance(node.value, ast.Name) and node.value.id == "self")


def executor_uses(source: str):
    """(attributes read on an executor, getattr/hasattr calls on one) in ``source``."""
    attrs, probes = set(), []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Attribute) and _is_executor(node.value):
            attrs.add(node.attr)
        if (isinstance(node, ast.Call) and isinstance(node.func, ast.Name)
                and node.func.id in ("getattr", "hasattr") and node.args
                and _is_executor(node.args[0])):
            probes.append(node.lineno)
    return attrs, probes


def declared() -> set:
    return {n for n in dir(Executor) if not n.startswith("__")} | \
        set(Executor.__annotations__)


def test_checker_sees_planted_uses():
    src = textwrap.dedent("""\
        def f(executor, other):
            executor.execute(1)
            if getattr(executor, "open_stream", None):
                pass
            other.whatever
            return self.executor.secret_power
        """)
    attrs, probes = executor_uses(src)
    assert attrs == {"execute", "secret_power"}
    assert probes == [3]
    assert "secret_power" not in declared() and "execute" in declared()


def test_every_capability_used_is_declared_and_none_is_probed():
    for rel in USERS:
        attrs, probes = executor_uses((ROOT / rel).read_text())
        assert attrs, rel   # the file does use an executor (the checker saw it)
        assert attrs <= declared(), f"{rel}: undeclared executor attributes {attrs - declared()}"
        assert probes == [], f"{rel}: getattr/hasattr on an executor at lines {probes}"


def test_defaults_say_not_offered():
    class Minimal(Executor):
        def execute(self, spec, on_start=None):
            return Measurement(status="ok", exit_code=0, wall_s=0.0)

    ex = Minimal()
    assert not ex.records_inflight and not ex.supports_while_running
    assert not ex.supports_queued_runs and ex.launcher_pid is None and ex.stopped_runs is None
    assert ex.aslr_control is True
    ex.close()


def test_a_plain_object_runs_one_at_a_time_with_its_start_reported(tmp_path):
    # Any object with execute(spec, on_start) works: it is seen through the contract with
    # no optional capability, so the engine asks it to report each start (on_start),
    # which is how a resume could stop what it left running.
    from benchharness.execute.runner import run_experiment
    from benchharness.experiment.file import Experiment

    class Plain:
        def __init__(self):
            self.starts = 0
            self.closed = False

        def execute(self, spec, on_start=None):
            assert spec.inflight_path is None   # it does not record the in-flight run itself
            if on_start is not None:
                on_start(0, 0)
                self.starts += 1
            return Measurement(status="ok", exit_code=0, wall_s=0.001)

        def close(self):
            self.closed = True

    plain = Plain()
    assert not isinstance(plain, Executor) and isinstance(as_executor(plain), Executor)
    exp = Experiment.from_text("experiment: plain\ncommand: [x, '{a}']\nfactors:\n  a: [p, q]\n"
                               "replicates: 3\nseed: 2\nhost_check: off\n")
    out = run_experiment(exp, out=tmp_path / "r", executor=plain)
    assert out.counts == {"ok": 6} and plain.starts == 6
    assert not plain.closed   # the caller's executor is the caller's to close
