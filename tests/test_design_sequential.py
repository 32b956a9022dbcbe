"""Adaptive replication and time budgets wired into the runner (simulated executor)."""

from __future__ import annotations

import json

import pytest

from benchharness.design import sequential
from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel
from benchharness.experiment.file import Experiment
from benchharness.execute.runner import resume_experiment, run_experiment

BASE = """\
experiment: codecs
command: [python3, -c, "pass", "{codec}", "{level}"]
factors:
  codec: [zlib, lzma]
  level: [1, 9]
seed: 4
"""
MODEL = SimulatedModel(base_s=0.5, effects={"codec": {"lzma": 1.3}}, cv=0.05)


def test_adaptive_replication_stops_when_intervals_are_narrow(tmp_path):
    exp = Experiment.from_text(BASE + "replicates: {until: {ratio_halfwidth: 2%}, max: 60, "
                                      "min: 3}\n")
    out = run_experiment(exp, out=tmp_path / "r", executor=SimulatedExecutor(MODEL, seed=1))
    stop = json.loads((tmp_path / "r" / "stopping.json").read_text())
    n = stop["stopped"]["replicates"]
    runs = out.runs
    assert len(runs) == 4 * n                      # complete replicates only
    assert sorted(runs["replicate"].unique()) == list(range(1, n + 1))
    last = stop["decisions"][-1]
    assert last["stop"] and last["adaptive"]["widest"]["halfwidth"] <= 0.02
    # The rule kept going while the widest interval was too wide.
    before = stop["decisions"][-2]
    assert not before["stop"]
    assert before["adaptive"]["widest"] is None or before["adaptive"]["widest"]["halfwidth"] > 0.02
    # Expected size: half-width ~ t * sigma / sqrt(n) on the log scale for these 2x2 cells.
    assert 8 <= n <= 40
    session = json.loads((tmp_path / "r" / "session.json").read_text())
    assert session["stopped"]["replicates"] == n
    assert any("within ±2%" in note for note in out.notes)
    # Resuming a stopped folder runs nothing more.
    again = resume_experiment(tmp_path / "r", executor=SimulatedExecutor(MODEL, seed=2))
    assert len(again.runs) == 4 * n


def test_adaptive_reaches_max(tmp_path):
    exp = Experiment.from_text(BASE + "replicates: {until: {ratio_halfwidth: 0.1%}, max: 5, "
                                      "min: 2}\n")
    out = run_experiment(exp, out=tmp_path / "r", executor=SimulatedExecutor(MODEL, seed=1))
    assert len(out.runs) == 20
    assert any("maximum of 5" in n for n in out.notes)


class ClockedExecutor(SimulatedExecutor):
    """Advances a fake clock by each drawn run time plus a fixed overhead."""

    def __init__(self, *a, clock, **kw):
        super().__init__(*a, **kw)
        self.clock = clock

    def execute(self, spec, on_start=None):
        m = super().execute(spec, on_start)
        self.clock[0] += (m.wall_s or 0) + 0.1
        return m


def test_budget_stops_at_the_last_complete_replicate(tmp_path, monkeypatch):
    clock = [1000.0]
    monkeypatch.setattr(sequential, "_now", lambda: clock[0])
    exp = Experiment.from_text(BASE + "replicates: 50\n")
    ex = ClockedExecutor(MODEL, seed=3, clock=clock)
    # One replicate is about 4 runs x (0.5..0.65 s + 0.1 s) = 2.6 s; 30 s fits 11.
    out = run_experiment(exp, out=tmp_path / "r", executor=ex, budget_s=30.0)
    n = int(out.runs["replicate"].max())
    assert len(out.runs) == 4 * n
    elapsed = clock[0] - 1000.0
    assert elapsed <= 30.0
    per = elapsed / n
    assert elapsed + per > 30.0 - 0.5            # one more would (about) not have fitted
    assert 9 <= n <= 12
    assert any("stopped after" in note for note in out.notes)
    stop = json.loads((tmp_path / "r" / "stopping.json").read_text())
    assert stop["budget_s"] == 30.0 and stop["stopped"]["replicates"] == n


def test_budget_with_pilot_estimate_can_refuse_the_first_replicate(tmp_path, monkeypatch):
    clock = [0.0]
    monkeypatch.setattr(sequential, "_now", lambda: clock[0])
    exp = Experiment.from_text(BASE + "replicates: 5\n")
    out = run_experiment(exp, out=tmp_path / "r", executor=ClockedExecutor(MODEL, seed=3,
                                                                           clock=clock),
                         budget_s=1.0, estimate_s=2.6)
    assert out.counts.get("ok", 0) == 0
    assert any("only" in n for n in out.notes)


def test_scheduler_with_budget_is_refused(tmp_path):
    from benchharness.errors import UsageError

    exp = Experiment.from_text(BASE + "replicates: 5\n")
    with pytest.raises(UsageError, match="--scheduler"):
        run_experiment(exp, out=tmp_path / "r", budget_s=10, scheduler="tcp://127.0.0.1:1")


def test_plan_command_estimates_time_from_a_pilot(main_cli, tmp_path):
    exp = Experiment.from_text(BASE + "replicates: 2\n", path=str(tmp_path / "c.yaml"))
    run_experiment(exp, out=tmp_path / "pilot", executor=SimulatedExecutor(MODEL, seed=5))
    f = tmp_path / "c.yaml"
    f.write_text(BASE + "replicates: 10\nwarmup: 1\n")
    r = main_cli("plan", f, "--pilot", tmp_path / "pilot", "--budget", "30s", "--json")
    assert r.returncode == 0, r.stderr
    t = json.loads(r.stdout)["time_estimate"]
    # Mean run time of the pilot is about 0.5 * (1 + 1.3) / 2 = 0.575 s; 11 runs per cell.
    assert t["expected_total_s"] == pytest.approx(44 * 0.575, rel=0.15)
    assert t["replicates_in_budget"] == int((30 - t["expected_warmup_s"]) //
                                            t["expected_replicate_s"])
    r = main_cli("plan", f, "--budget", "30s")
    assert r.returncode == 2 and "--pilot" in r.stderr


def test_size_command_with_a_pilot_folder(main_cli, tmp_path):
    # Planted answer: the simulated pilot has CV 5%, so sd of ln(wall_s) is about
    # sqrt(ln(1 + 0.05^2)) = 0.05; the sizing must use it and give the pilot's run time.
    exp = Experiment.from_text(BASE + "replicates: 8\n", path=str(tmp_path / "c.yaml"))
    run_experiment(exp, out=tmp_path / "pilot", executor=SimulatedExecutor(MODEL, seed=8))
    r = main_cli("size", "--detect", "4%", "--pilot", tmp_path / "pilot", "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert d["sigma_log"] == pytest.approx(0.05, rel=0.3)
    assert d["cells"] == 4 and d["runs"] == 4 * d["replicates"]
    assert d["expected_run_s"] == pytest.approx(0.575, rel=0.1)
    from benchharness.design import sizing

    assert d["power"] == pytest.approx(sizing.f_power(d["replicates"], 2, 4, __import__("math")
                                                      .log1p(0.04), d["sigma_log"], 0.05))


def test_plan_shows_the_adaptive_rule(main_cli, tmp_path):
    f = tmp_path / "c.yaml"
    f.write_text(BASE + "replicates: {until: {ratio_halfwidth: 2%}, max: 30, min: 4}\n")
    r = main_cli("plan", f, "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert d["adaptive"] == {"ratio_halfwidth": 0.02, "max": 30, "min": 4, "confidence": 0.95,
                             "response": "wall_s"}
    assert d["runs"] == 4 * 4
    r = main_cli("plan", f)
    assert "adaptive: 4 to 30" in r.stdout


def test_resume_keeps_the_decisions_of_the_interrupted_session(tmp_path):
    # Interrupted in replicate 4 (after three boundary decisions), then resumed: the
    # first session's decisions stay in stopping.json under earlier_sessions.
    class Interrupted(SimulatedExecutor):
        calls = 0

        def execute(self, spec, on_start=None):
            Interrupted.calls += 1
            if Interrupted.calls == 14:
                raise KeyboardInterrupt
            return super().execute(spec, on_start=on_start)

    exp = Experiment.from_text(BASE + "replicates: {until: {ratio_halfwidth: 0.1%}, max: 6, "
                                      "min: 2}\n")
    run_experiment(exp, out=tmp_path / "r", executor=Interrupted(MODEL, seed=1))  # Ctrl-C: kept
    first = json.loads((tmp_path / "r" / "stopping.json").read_text())
    assert [d["after_replicate"] for d in first["decisions"]] == [1, 2, 3]
    resume_experiment(tmp_path / "r", executor=SimulatedExecutor(MODEL, seed=2))
    stop = json.loads((tmp_path / "r" / "stopping.json").read_text())
    assert stop["earlier_sessions"][0]["decisions"] == first["decisions"]
    assert [d["after_replicate"] for d in stop["decisions"]][-1] == 6
