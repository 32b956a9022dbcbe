"""What a gate session records about where it ran (gate/session.py).

Planted truth: the experiment file lives in its own folder and names a ``workdir``
relative to that folder; the gate is started from another folder. The session
record names the experiment's folder, and every run starts in the workdir beside
the file, not beside the caller. Written to kill a mutant that survived the rest of
the suite (DEVELOPERS.md, "Mutation testing").
"""

from __future__ import annotations

import json

from benchharness.execute.base import Executor
from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel
from benchharness.experiment.file import load_experiment
from benchharness.gate.config import gate_settings
from benchharness.gate.session import run_session

GATE = """\
experiment: where
command: [echo, "{build}"]
workdir: wd
factors:
  build: [old, new]
seed: 3
gate: {factor: build, baseline: old, candidate: new, max_pairs: 6, first_look_pairs: 4}
"""


class Recording(Executor):
    """A simulated executor that keeps the folder each run would start in."""

    def __init__(self):
        model = SimulatedModel(effects={"build": {"old": 1.0, "new": 1.0}}, cv=0.02)
        self.inner = SimulatedExecutor(model, seed=5)
        self.cwds = []

    def execute(self, spec, on_start=None):
        self.cwds.append(spec.cwd)
        return self.inner.execute(spec, on_start=on_start)

    def close(self):
        pass


def test_a_gate_started_elsewhere_runs_in_the_workdir_beside_the_file(tmp_path, monkeypatch):
    home = tmp_path / "project"
    (home / "wd").mkdir(parents=True)
    (home / "gate.yaml").write_text(GATE)
    caller = tmp_path / "elsewhere"
    caller.mkdir()
    monkeypatch.chdir(caller)
    exp = load_experiment(home / "gate.yaml")
    ex = Recording()
    _outcome, folder = run_session(exp, gate_settings(exp), executor=ex, simulated=True,
                                   base=str(tmp_path / "results"))
    session = json.loads((folder / "session.json").read_text())
    assert session["experiment_dir"] == str(home.resolve())
    assert session["cwd"] == str(caller.resolve())
    assert ex.cwds and set(ex.cwds) == {str(home.resolve() / "wd")}
