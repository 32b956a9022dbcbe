"""Factor roles: choose never recommends an input, says why, and reads declared roles.

Planted truths (invented, fixed seeds): a C kernel built with opt x arch and run
on two input sizes, where the bigger input is faster per item; declared roles
in an experiment file run through the real runner with a planted executor.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from benchharness.choose import choose
from benchharness.errors import ExperimentError, UsageError
from benchharness.execute.base import Measurement
from benchharness.experiment.roles import guess_roles


def _kernel_csv(path, seed=1):
    """opt x arch x n; ns_per_item: opt=3/native best, and n=400 is 1.3x cheaper per
    item than n=100 for every build (the input, not a choice, would "win")."""
    rng = np.random.default_rng(seed)
    rows = []
    for opt in ["0", "2", "3"]:
        for arch in ["generic", "native"]:
            for n in ["100", "400"]:
                base = {"0": 3.0, "2": 1.2, "3": 1.0}[opt] * {"generic": 1.0, "native": 0.9}[arch]
                for _ in range(4):
                    ns = base * (1.3 if n == "100" else 1.0) * float(np.exp(rng.normal(0, 0.02)))
                    rows.append(dict(opt=opt, arch=arch, n=n, status="ok", ns_per_item=ns,
                                     wall_s=ns * int(n) / 100))
    pd.DataFrame(rows).to_csv(path, index=False)
    return path


def test_an_input_size_is_never_recommended_and_the_reason_is_given(main_cli, tmp_path):
    csv = _kernel_csv(tmp_path / "kernel.csv")
    r = main_cli("choose", csv, "--factors", "opt,arch,n", "--response", "ns_per_item",
            "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert d["best"] == {"opt": "3", "arch": "native"}      # no n in the recommendation
    assert d["factors"] == ["opt", "arch"] and d["across"] == ["n"]
    assert d["roles"]["source"] == "guessed" and d["roles"]["workload"] == ["n"]
    assert "reads as an input" in d["roles"]["reasons"]["n"]
    assert "current default" not in " ".join(c["reason"] for c in d["candidates"])
    r = main_cli("choose", csv, "--factors", "opt,arch,n", "--response", "ns_per_item")
    assert r.returncode == 0
    first = r.stdout.splitlines()[0]
    assert first == "Recommended default: opt=3, arch=native"
    assert "treated as workloads and never recommended: n (its name reads as an input)" \
        in r.stdout
    assert "Treated as settings: opt, arch" in r.stdout
    assert "roles: {workload: [n]}" in r.stdout and "--workload n" in r.stdout


def test_without_the_guess_the_input_would_have_been_recommended(tmp_path):
    # The same data with every factor declared a setting: the tool then does what
    # it is told and picks n=400 -- the guess above is what keeps n out.
    df = pd.read_csv(_kernel_csv(tmp_path / "k.csv"), dtype={"opt": str, "arch": str, "n": str})
    c = choose(df, factors=["opt", "arch", "n"], response="ns_per_item",
               roles={"setting": ["opt", "arch", "n"]})
    assert c.best == {"opt": "3", "arch": "native", "n": "400"}
    assert c.to_dict()["roles"]["source"] == "command line"


def test_a_workload_named_on_the_command_line_is_held_as_a_condition(main_cli, tmp_path):
    # "disk" does not look like an input; --environment makes it a condition.
    rng = np.random.default_rng(4)
    rows = [dict(pool=p, disk=k, status="ok",
                 wall_s={"4": 1.0, "8": 0.8}[p] * {"ssd": 1.0, "hdd": 2.0}[k]
                 * float(np.exp(rng.normal(0, 0.02))))
            for p in ["4", "8"] for k in ["ssd", "hdd"] for _ in range(4)]
    csv = tmp_path / "pool.csv"
    pd.DataFrame(rows).to_csv(csv, index=False)
    guessed = json.loads(main_cli("choose", csv, "--factors", "pool,disk", "--json").stdout)
    assert guessed["factors"] == ["pool", "disk"]            # nothing looks like an input
    assert guessed["reasons"][0].startswith("No roles are declared: pool, disk treated as settings")
    r = main_cli("choose", csv, "--factors", "pool,disk", "--environment", "disk", "--json")
    d = json.loads(r.stdout)
    assert d["factors"] == ["pool"] and d["across"] == ["disk"] and d["best"] == {"pool": "8"}
    assert d["roles"]["environment"] == ["disk"] and d["roles"]["declared"] is True
    r = main_cli("choose", csv, "--factors", "pool,disk", "--workload", "disk", "--setting", "disk")
    assert r.returncode == 2 and "two roles" in r.stderr and "Traceback" not in r.stderr
    r = main_cli("choose", csv, "--factors", "pool,disk", "--workload", "nope")
    assert r.returncode == 2 and "'nope' is not a factor" in r.stderr


def test_every_factor_an_input_is_refused_with_the_declaration_to_write(tmp_path):
    df = pd.DataFrame([dict(corpus=c, status="ok", wall_s=1.0 + i * 0.01 + (c == "b"))
                       for c in "ab" for i in range(3)])
    with pytest.raises(UsageError, match=r"roles: \{setting: \[corpus\]\}"):
        choose(df, factors=["corpus"])


@pytest.mark.parametrize("name,levels,role", [
    ("n", ["100", "400"], "workload"),
    ("size", ["small", "large"], "workload"),
    ("input_size", ["1", "2"], "workload"),
    ("corpus", ["text", "binary"], "workload"),
    ("dataset", ["a", "b"], "workload"),
    ("doc", ["data/a.txt", "data/b.txt"], "workload"),        # paths
    ("case", ["logs.json", "dump.bin"], "workload"),          # file names
    ("scale", [("s", {"n": "1000"}), ("l", {"n": "9000"})], "workload"),  # named input value
    ("threads", ["1", "2", "4"], "setting"),
    ("n_threads", ["1", "2"], "setting"),
    ("buffer_size", ["4k", "64k"], "setting"),
    ("level", ["1", "6", "9"], "setting"),
    ("version", ["1.10", "1.12"], "setting"),                 # numbers, not file names
])
def test_guessed_roles(name, levels, role):
    r = guess_roles([name], {name: levels})
    assert r.role_of(name) == role, r.reasons[name]
    assert r.declared is False


# -- declared roles in an experiment file, through the real runner -------------------

EXPERIMENT = """\
experiment: squeeze-logs
about: Which codec should the log shipper use?
command: [squeeze, --codec, "{codec}", --input, "{logs}", --host, "{box}"]
factors:
  codec: [fast, small]
  logs: [app, audit]
  box: [arm, x86]
replicates: 3
seed: 5
roles:
  workload: [logs]
  environment: box
"""


class Planted:
    """codec=small is 20 % slower than fast everywhere; audit logs take twice as long."""

    def __init__(self, seed=0):
        self.rng = np.random.default_rng(seed)

    def execute(self, spec, on_start=None):
        lv = spec.levels
        wall = ({"fast": 1.0, "small": 1.2}[lv["codec"]] * {"app": 1.0, "audit": 2.0}[lv["logs"]]
                * float(np.exp(self.rng.normal(0, 0.02))))
        return Measurement(status="ok", exit_code=0, wall_s=wall, user_s=wall, sys_s=0.0,
                           max_rss_kib=10_000, started_at="2026-01-01T00:00:00.000000+00:00")

    def close(self):
        pass


@pytest.fixture
def declared_folder(tmp_path):
    from benchharness.experiment.file import Experiment
    from benchharness.execute.runner import run_experiment

    exp = Experiment.from_text(EXPERIMENT, path=str(tmp_path / "squeeze.yaml"))
    return run_experiment(exp, out=tmp_path / "results", executor=Planted(2)).folder


def test_declared_roles_reach_plan_the_folder_choose_and_analysis_json(main_cli, tmp_path,
                                                                      declared_folder):
    from benchharness.analysis import analyze

    f = tmp_path / "squeeze.yaml"
    f.write_text(EXPERIMENT)
    r = main_cli("plan", f)
    assert r.returncode == 0, r.stderr
    assert "codec  2 levels: fast, small  (setting)" in r.stdout
    assert "logs   2 levels: app, audit  (workload)" in r.stdout
    assert "box    2 levels: arm, x86  (environment)" in r.stdout
    assert "roles       declared in the file" in r.stdout
    plan = json.loads(main_cli("plan", f, "--json").stdout)
    assert plan["roles"]["workload"] == ["logs"] and plan["roles"]["environment"] == ["box"]
    session = json.loads((declared_folder / "session.json").read_text())
    assert session["roles"]["setting"] == ["codec"] and session["roles"]["declared"]
    d = json.loads(main_cli("choose", declared_folder, "--json").stdout)
    assert d["factors"] == ["codec"] and d["across"] == ["logs", "box"]
    assert d["best"] == {"codec": "fast"}
    assert d["roles"]["source"] == "experiment file"
    assert d["reasons"][0].startswith("Roles from the experiment file: choosing among the "
                                      "settings codec; the workload logs and environment box are conditions")
    # no default declared: never called "the current default"
    assert "current default" not in json.dumps(d)
    a = analyze(declared_folder).to_dict()
    assert a["roles"]["workload"] == ["logs"] and a["roles"]["setting"] == ["codec"]


def test_current_default_only_when_declared(declared_folder):
    c = choose(declared_folder, prefer={"codec": "fast"})
    best = next(x for x in c.candidates if x["recommended"])
    assert "it is the current default" in best["reason"]
    assert c.to_dict()["declared_default"] == {"codec": "fast"}
    c = choose(declared_folder)
    assert "current default" not in next(x for x in c.candidates if x["recommended"])["reason"]
    assert c.to_dict()["declared_default"] == {}


@pytest.mark.parametrize("block,where,what", [
    ("roles:\n  input: [logs]\n", "7:3", "unknown role 'input'"),
    ("roles:\n  workload: [logz]\n", "7:14", "'logz' is not a factor; did you mean 'logs'?"),
    ("roles:\n  workload: [logs]\n  environment: [logs]\n", "8:17",
     "'logs' already has the role 'workload' (line 7)"),
])
def test_bad_roles_are_reported_at_their_line_and_column(main_cli, tmp_path, block, where, what):
    text = ("experiment: x\ncommand: [true]\nfactors:\n  codec: [a, b]\n  logs: [p, q]\n"
            + block)
    f = tmp_path / "bad.yaml"
    f.write_text(text)
    r = main_cli("plan", f)
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert f"bad.yaml:{where}:" in r.stderr and what in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    with pytest.raises(ExperimentError):
        from benchharness.experiment.file import Experiment
        from benchharness.experiment.sections import validate_sections

        validate_sections(Experiment.from_text(text, path=str(f)))


def test_choose_uses_the_scale_the_folders_analysis_recorded(declared_folder):
    # analysis.json says the response was analysed on the original scale: choose follows it
    # (losses become differences, no ratios); without a record it takes the log scale.
    assert choose(declared_folder).scale == "log"
    (declared_folder / "analysis.json").write_text(json.dumps(
        {"response": "wall_s", "transform": {"name": "none"}}))
    c = choose(declared_folder)
    assert c.scale == "none" and c.candidates[0]["ratio_vs_best_of_others"] is None
    # a record about another response is not this response's scale
    (declared_folder / "analysis.json").write_text(json.dumps(
        {"response": "max_rss_kib", "transform": {"name": "none"}}))
    assert choose(declared_folder).scale == "log"


def test_a_default_declared_for_a_workload_is_refused_with_the_way_out(tmp_path):
    df = pd.read_csv(_kernel_csv(tmp_path / "k.csv"), dtype={"opt": str, "arch": str, "n": str})
    with pytest.raises(UsageError, match=r"'n', which is a workload, not a setting.*--setting n"):
        choose(df, factors=["opt", "arch", "n"], response="ns_per_item", prefer={"n": "100"})
