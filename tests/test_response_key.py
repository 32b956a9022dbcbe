"""The experiment file's ``response:`` key: the column run, analyze, report and choose use.

Planted truth: the workload times its own work (the metric ``work_s``), and 4 threads do
that work 3x faster than 1; the process start-up that ``wall_s`` adds makes 4 threads
*slower* from outside (5.5 s against 5.0 s). So the verdict tells which column was read:
threads=4 on ``work_s``, threads=1 on ``wall_s``. Precedence: the command line, then
``choose: {response:}`` (choose only), then the file's key, then ``wall_s``.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from benchharness.execute.base import Measurement

EXPERIMENT = """\
experiment: batch-threads
about: How many threads should the nightly batch use?
command: [batch-job, --threads, "{threads}"]
factors:
  threads: [1, 4]
metrics:
  work_s:
    json: work_s
    unit: s
    better: lower
response: work_s
replicates: 4
seed: 5
"""

WORK = {"1": 1.2, "4": 0.4}          # the job's own time: 4 threads 3x faster
WALL = {"1": 5.0, "4": 5.5}          # from outside, start-up included: 4 threads slower


class PlantedExecutor:
    """Stands in for processes: times around the planted truth, work_s on stdout as JSON."""

    def __init__(self, seed=0):
        self.rng = np.random.default_rng(seed)

    def execute(self, spec, on_start=None):
        t = spec.levels["threads"]
        work = WORK[t] * float(np.exp(self.rng.normal(0, 0.02)))
        wall = WALL[t] * float(np.exp(self.rng.normal(0, 0.02)))
        return Measurement(status="ok", exit_code=0, wall_s=wall, user_s=wall, sys_s=0.01,
                           max_rss_kib=50_000, started_at="2026-01-01T00:00:00.000000+00:00",
                           stdout_tail=(json.dumps({"work_s": work}) + "\n").encode())

    def close(self):
        pass


def _folder(tmp_path, text=EXPERIMENT, name="results"):
    from benchharness.experiment.file import Experiment
    from benchharness.execute.runner import run_experiment

    exp = Experiment.from_text(text, path=str(tmp_path / "batch.yaml"))
    return run_experiment(exp, out=tmp_path / name, executor=PlantedExecutor(1)).folder


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    return _folder(tmp_path_factory.mktemp("response"))


def _analyze_json(capsys, *args):
    from benchharness.cli import main

    assert main(["analyze", *map(str, args), "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_run_analyze_and_report_read_the_files_response(folder, capsys):
    from benchharness.commands.postrun import analyse_and_report
    from benchharness.report.data import collect
    from benchharness.results.journal import load_results

    analyse_and_report(load_results(folder))              # what `run` does after the runs
    capsys.readouterr()
    stored = json.loads((folder / "analysis.json").read_text())
    assert stored["response"] == "work_s"
    d = _analyze_json(capsys, folder)
    assert d["response"] == "work_s"
    # what it says: 4 threads take a third of the time (the planted 0.4 / 1.2)
    eff = next(f for f in d["findings"] if f["kind"] == "main")
    assert eff["significant"] and eff["lower"] < 1 / 3 < eff["upper"]
    best = next(f for f in d["findings"] if f["kind"] == "best")
    assert best["statement"].startswith("Best: threads=4")
    # the reports, without analysis.json to lean on, compute the same response
    (folder / "analysis.json").rename(folder / "analysis.kept")
    try:
        assert collect(folder).response == "work_s"
    finally:
        (folder / "analysis.kept").rename(folder / "analysis.json")
    # the command line comes first
    d = _analyze_json(capsys, folder, "--response", "wall_s")
    assert d["response"] == "wall_s"
    eff = next(f for f in d["findings"] if f["kind"] == "main")
    assert eff["lower"] < 1.1 < eff["upper"]                 # the planted 5.5 / 5.0
    best = next(f for f in d["findings"] if f["kind"] == "best")
    assert best["statement"].startswith("Best: threads=1")


def test_choose_precedence_cli_then_section_then_file_then_wall_s(folder, tmp_path):
    from benchharness.choose import choose

    # response=None: the section's, else the file's (what the CLI passes without --response)
    assert choose(folder, response=None).best == {"threads": "4"}       # the file: work_s
    assert choose(folder, response="wall_s").best == {"threads": "1"}   # the call
    with_section = EXPERIMENT + "choose:\n  response: wall_s\n"
    f2 = _folder(tmp_path, with_section, "section")
    assert choose(f2, response=None).best == {"threads": "1"}           # the section
    assert choose(f2, response="work_s").best == {"threads": "4"}       # the call again
    f3 = _folder(tmp_path, EXPERIMENT.replace("response: work_s\n", ""), "old")
    assert choose(f3, response=None).best == {"threads": "1"}           # no key: wall_s


def test_no_key_keeps_wall_s_and_plan_states_the_key(tmp_path, capsys):
    from benchharness.analysis import analyze
    from benchharness.commands.plan import format_plan
    from benchharness.design import build_plan
    from benchharness.experiment.file import Experiment

    old = _folder(tmp_path, EXPERIMENT.replace("response: work_s\n", ""), "old")
    assert analyze(old, comparisons=False).response == "wall_s"
    exp = Experiment.from_text(EXPERIMENT, path="batch.yaml")
    assert "response    work_s" in format_plan(exp, build_plan(exp))


@pytest.mark.parametrize("value, says", [
    ("wrk_s", "'response': 'wrk_s' is not a measured column or a declared metric; use one of wall_s"),
    ("[work_s]", "'response' must be one column name, not a list"),
])
def test_a_bad_response_is_one_located_line(value, says, tmp_path):
    from benchharness.errors import ExperimentError
    from benchharness.experiment.file import Experiment
    from benchharness.experiment.sections import validate_sections

    text = EXPERIMENT.replace("response: work_s", f"response: {value}")
    exp = Experiment.from_text(text, path=str(tmp_path / "batch.yaml"))
    with pytest.raises(ExperimentError) as err:
        validate_sections(exp)
    msg = str(err.value)
    assert f"batch.yaml:11:11: {says}" in msg and "work_s" in msg and "\n" not in msg


def test_plan_refuses_an_unknown_response_with_exit_2(cli, tmp_path):
    path = tmp_path / "batch.yaml"
    path.write_text(EXPERIMENT.replace("response: work_s", "response: work_ms"))
    r = cli("plan", path)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in r.stderr
    assert f"{path}:11:11:" in lines[0] and "'work_ms'" in lines[0] and "work_s" in lines[0]
