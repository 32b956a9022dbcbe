"""A response surface end to end, as a user runs it: run, analyze, report and choose (what
`plan` says is checked in test_surface_design.py)
on a command whose output follows a known formula (a planted optimum), and what `choose`
says when the surface does not hold."""

from __future__ import annotations

import json
import math
import textwrap

import numpy as np
import pandas as pd
import pytest

from benchharness.experiment.file import parse_experiment

# The planted cost: ln cost = ln 0.2 + 0.35 u^2 + 0.25 v^2 + 0.10 u v, u = log2(b/64)/2 - 0.25,
# v = (w - 5)/3 + 0.3: a minimum at buffer_kib = 64 * 2**0.5 = 90.5, workers = 4.1.
WORKLOAD = textwrap.dedent("""\
    import json, math, random, sys
    b, w, state = float(sys.argv[1]), float(sys.argv[2]), sys.argv[3]
    with open(state, "a+") as f:          # the run's number: deterministic noise
        f.seek(0)
        n = len(f.read())
        f.write("x")
    u = math.log2(b / 64) / 2 - 0.25
    v = (w - 5) / 3 + 0.3
    noise = random.Random(n).gauss(0, 0.02)
    print(json.dumps({"cost_s": 0.2 * math.exp(0.35 * u * u + 0.25 * v * v + 0.10 * u * v
                                               + noise)}))
    """)

EXP = textwrap.dedent("""\
    experiment: spool-cost
    about: Which buffer size and worker count cost least?
    command: [{python}, {script}, "{{buffer_kib}}", "{{workers}}", {state}]
    factors:
      buffer_kib: [16, 256]
      workers: [2, 8]
    design:
      type: response-surface
      log_scale: [buffer_kib]
    metrics:
      cost_s: {{json: cost_s, unit: s, better: lower}}
    choose:
      response: cost_s
    replicates: 1
    seed: 4
    """)

TRUE_CODED = (0.25, -0.3 * 3 / 3)     # u = 0.25; workers 4.1 is coded (4.1 - 5) / 3 = -0.3


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    import sys

    from conftest import run_main

    d = tmp_path_factory.mktemp("surface")
    (d / "work.py").write_text(WORKLOAD)
    exp = d / "spool.yaml"
    exp.write_text(EXP.format(python=sys.executable, script=d / "work.py", state=d / "n"))
    r = run_main("run", str(exp), "--out", str(d / "res"), "--no-analysis")
    assert r.returncode == 0, r.stderr
    return d / "res"


@pytest.fixture(scope="module")
def analysis(folder):
    from benchharness.analysis import analyze

    return analyze(folder, response="cost_s")


def test_analyze_finds_the_planted_minimum_and_says_so(folder, analysis, main_cli):
    sf = json.loads(analysis.to_json())["surface"]
    st = sf["stationary_point"]
    assert st["kind"] == "minimum" and st["inside_region"] and st["kind_settled"]
    for (lo, hi), t in zip(st["coded_intervals"], TRUE_CODED):
        assert lo <= t <= hi
    assert sf["lack_of_fit"]["verdict"] == "fits"
    assert sf["proposal"]["supported"] and sf["proposal"]["actual"]["workers"] == 4
    assert abs(math.log2(sf["proposal"]["actual"]["buffer_kib"] / 90.5)) < 0.5
    r = main_cli("analyze", str(folder), "--response", "cost_s")
    head = r.stdout.splitlines()
    assert head[0].startswith("Proposed setting: buffer_kib=")
    assert "workers=4 (the fitted surface's minimum; whole numbers rounded)" in head[0]
    assert "supported by the fitted surface: the second-order surface fits" in head[0]
    assert head[1].startswith("  • The fitted surface has a minimum at buffer_kib=")
    assert "no ok runs" not in r.stdout      # untested combinations are by plan


def test_choose_proposes_between_tested_levels(folder, main_cli):
    r = main_cli("choose", str(folder))
    assert r.returncode == 0, r.stderr
    lines = r.stdout.splitlines()
    assert lines[0].startswith("Proposed default (between the tested levels): buffer_kib=")
    assert lines[0].endswith(", workers=4")
    assert "the second-order surface fits (lack of fit p = " in lines[1]
    assert lines[2].startswith("Recommended among the tested settings: ")


def test_report_has_the_surface_section_and_contour_figure(folder, analysis):
    from benchharness.report import write_reports

    write_reports(folder, analysis=analysis, response="cost_s")
    md = (folder / "report.md").read_text()
    assert "## Response surface" in md and "figures/surface.png" in md
    assert "| buffer\\_kib:workers |" in md
    assert "The fitted surface has a minimum at buffer\\_kib=" in md
    # how the fit was made: whole-number settings as whole numbers, every p said as one
    import re

    assert "buffer\\_kib: 16 is -1 and 256 is +1, coded in its logarithm" in md
    assert "workers: 2 is -1 and 8 is +1, coded linearly" in md
    assert re.search(r"the surface against a flat one: p (=|&lt;) ", md)
    assert re.search(r"Lack of fit: .*, F = [0-9.]+, p (=|&lt;) ", md)
    assert (folder / "figures" / "surface.svg").exists()
    assert 'id="surface"' in (folder / "report.html").read_text()


def test_choose_falls_back_to_the_best_tested_setting_when_the_surface_does_not_fit():
    from benchharness.choose.surface import proposal

    exp = parse_experiment(EXP.format(python="python3", script="w.py", state="n"), "s.yaml")
    from benchharness.design.spec import design_of

    d = design_of(exp).surface
    rng = np.random.default_rng(3)
    rows = []
    for rep in range(3):
        for pt in d.coded_points():
            labels = {s.name: s.label(x) for s, x in zip(d.settings, pt)}
            x = d.coded_of_labels(labels)
            # a step the quadratic cannot follow: lack of fit
            z = -1.6 + 0.5 * (x[0] > 0.5) * (abs(x[1]) < 0.5) + rng.normal(0, 0.01)
            rows.append({**labels, "status": "ok", "cost_s": math.exp(z)})
    df = pd.DataFrame(rows)
    out = proposal(df, exp, "cost_s", "lower", "log", 0.95, ["buffer_kib", "workers"], [],
                   {"buffer_kib": "64", "workers": "5"})
    assert out["supported"] is False and out["reason"] == "lack_of_fit"
    assert out["statement"].startswith("No value between the tested levels is proposed "
                                       "because the fitted second-order surface does not hold")
    assert out["statement"].endswith("falls back to the best tested setting, buffer_kib=64, "
                                     "workers=5")


def test_choose_proposes_nothing_between_levels_for_other_settings_and_no_surface_otherwise():
    from benchharness.choose.surface import proposal

    exp = parse_experiment(EXP.format(python="python3", script="w.py", state="n"), "s.yaml")
    df = pd.DataFrame({"buffer_kib": ["64"], "workers": ["5"], "status": ["ok"],
                       "cost_s": [0.2]})
    out = proposal(df, exp, "cost_s", "lower", "log", 0.95, ["buffer_kib"], ["workers"],
                   {"buffer_kib": "64"})
    assert out["used"] is False
    assert out["statement"].endswith("no value between the tested levels is proposed")
    no_design = "design:\n  type: response-surface\n  log_scale: [buffer_kib]\n"
    assert no_design in EXP
    plain = parse_experiment(EXP.replace(no_design, "")
                             .format(python="python3", script="w.py", state="n"), "p.yaml")
    assert proposal(df, plain, "cost_s", "lower", "log", 0.95, ["buffer_kib", "workers"], [],
                    {}) is None


def test_choose_falls_back_when_a_tested_setting_is_predicted_better_than_any_proposal():
    # A planted saddle: ln cost falls towards both ends of workers. With workers [3, 7] the
    # rotatable design's axial values 2.17 and 7.83 run as 2 and 8, coded -/+1.5, beyond the
    # explored region's radius 1.414: every untested point inside is predicted worse than
    # those tested ones, so choose keeps to the tested setting and says why.
    from benchharness.choose.surface import proposal
    from benchharness.design.spec import design_of

    text = EXP.replace("workers: [2, 8]", "workers: [3, 7]")
    exp = parse_experiment(text.format(python="python3", script="w.py", state="n"), "s.yaml")
    d = design_of(exp).surface
    rng = np.random.default_rng(5)
    rows = []
    for _rep in range(2):
        for labels in d.cells():
            x = d.coded_of_labels(labels)
            z = -1.6 + 0.3 * x[0] ** 2 - 0.3 * x[1] ** 2 + rng.normal(0, 0.02)
            rows.append({**labels, "status": "ok", "cost_s": math.exp(z)})
    out = proposal(pd.DataFrame(rows), exp, "cost_s", "lower", "log", 0.95,
                   ["buffer_kib", "workers"], [], {"buffer_kib": "64", "workers": "2"})
    assert out["supported"] is False and out["reason"] == "tested_better"
    assert out["statement"].startswith(
        "No value between the tested levels is proposed because the fitted surface predicts "
        "no untested setting inside the explored region better than")
    assert out["statement"].endswith("falls back to the best tested setting, buffer_kib=64, "
                                     "workers=2")


BB_EXP = """\
experiment: ingest-latency
about: Which queue depth, worker count and fill fraction give the lowest latency?
command: [ingest, --depth, "{queue_depth}", --workers, "{workers}", --fill, "{fill}"]
factors:
  queue_depth: [25, 75]
  workers: [4, 12]
  fill: [0.25, 0.75]
design:
  type: response-surface
  points: box-behnken
replicates: 1
seed: 7
"""


class _BoxBehnkenLatency:
    """Stands in for processes: ln wall_s = ln 0.02 + 0.3 (x1 - 1.6)^2 + 0.5 x2^2
    + 0.4 (x3 + 0.2)^2 + noise (sd 0.02) on the coded settings."""

    def __init__(self, seed=0):
        self.rng = np.random.default_rng(seed)

    def execute(self, spec, on_start=None):
        from benchharness.execute.base import Measurement

        lv = spec.levels
        x1 = (float(lv["queue_depth"]) - 50) / 25
        x2 = (float(lv["workers"]) - 8) / 4
        x3 = (float(lv["fill"]) - 0.5) / 0.25
        wall = 0.02 * math.exp(0.3 * (x1 - 1.6) ** 2 + 0.5 * x2 ** 2 + 0.4 * (x3 + 0.2) ** 2
                               + self.rng.normal(0, 0.02))
        return Measurement(status="ok", exit_code=0, wall_s=wall, user_s=wall, sys_s=0.0,
                           max_rss_kib=1000, started_at="2026-01-01T00:00:00.000000+00:00")

    def close(self):
        pass


def test_the_cell_table_recommends_only_a_setting_the_surface_ran(tmp_path):
    # A Box-Behnken design runs 13 of the 27 combinations of its settings' values. The
    # main-effects cell table's best combination (queue_depth 75, workers 8, fill 0.5:
    # each value best on its own) was never run; the recommendation must be among those
    # that ran (here queue_depth=75, workers=8, fill=0.25, the planted best of them: ln
    # excess 0.108 + 0.256 against 0.108 + 0.576 for fill 0.75), as choose's is.
    from benchharness.analysis import analyze
    from benchharness.execute.runner import run_experiment
    from benchharness.experiment.file import Experiment

    exp = Experiment.from_text(BB_EXP, path=str(tmp_path / "bb.yaml"))
    out = run_experiment(exp, out=tmp_path / "results", executor=_BoxBehnkenLatency(2))
    a = analyze(out.folder, comparisons=False, art=False)
    runs = pd.read_csv(out.folder / "runs.csv", dtype=str)
    ran = {tuple(r) for r in runs[["queue_depth", "workers", "fill"]].itertuples(index=False)}
    best = a.to_dict()["best"]
    assert len(best["cells"]) == len(ran) == 13
    for c in best["cells"]:
        assert (c["levels"]["queue_depth"], c["levels"]["workers"], c["levels"]["fill"]) in ran
    assert best["cells"][0]["levels"] == {"queue_depth": "75", "workers": "8", "fill": "0.25"}
    found = [f for f in a.to_dict()["findings"] if f["kind"] == "best"][0]
    assert found["statement"].startswith("Best: queue_depth=75, workers=8, fill=0.25")


class _RowsLinger:
    """Stands in for processes: ln wall_s = ln 0.01 + 0.4 u^2 + 0.3 w^2 + 0.1 u w with
    u = x1 - 0.3, w = x2 + 0.4 on the coded settings (a minimum at batch_rows 620, linger_ms
    3.4), noise sd 0.02."""

    def __init__(self, seed=0):
        self.rng = np.random.default_rng(seed)

    def execute(self, spec, on_start=None):
        from benchharness.execute.base import Measurement

        u = (float(spec.levels["batch_rows"]) - 500) / 400 - 0.3
        w = (float(spec.levels["linger_ms"]) - 5) / 4 + 0.4
        wall = 0.01 * math.exp(0.4 * u * u + 0.3 * w * w + 0.1 * u * w
                               + self.rng.normal(0, 0.02))
        return Measurement(status="ok", exit_code=0, wall_s=wall, user_s=wall, sys_s=0.0,
                           max_rss_kib=1000, started_at="2026-01-01T00:00:00.000000+00:00")

    def close(self):
        pass


def test_a_surface_setting_named_like_an_input_is_still_a_setting(tmp_path):
    # batch_rows reads as an input by its name ('rows'), but a response surface proposes
    # values for all of its settings: without a roles: section it must not be taken as a
    # workload (which left choose with no proposal and the cell table averaged over it).
    from benchharness.choose import choose
    from benchharness.commands.plan import _roles_line
    from benchharness.execute.runner import run_experiment
    from benchharness.experiment.file import Experiment
    from benchharness.experiment.roles import factor_roles

    text = textwrap.dedent("""\
        experiment: ingest-batch
        command: [ingest, --rows, "{batch_rows}", --linger, "{linger_ms}"]
        factors:
          batch_rows: [100, 900]
          linger_ms: [1.0, 9.0]
        design:
          type: response-surface
          axial: face
        replicates: 2
        seed: 5
        """)
    exp = Experiment.from_text(text, path=str(tmp_path / "ingest.yaml"))
    roles = factor_roles(exp)
    assert roles.setting == ("batch_rows", "linger_ms") and not roles.workload
    assert "a response surface proposes values for all of its settings" in _roles_line(roles)
    # nor does plan promise trends or a speed-up for them: analyze fits the surface instead
    from benchharness.experiment.quantities import plan_lines

    assert plan_lines(exp) == ["numeric     every setting, as a quantity in the response "
                               "surface's second-order fit (no separate trends or speed-up)"]
    plain = Experiment.from_text(text.replace("design:\n  type: response-surface\n"
                                              "  axial: face\n", ""), path="p.yaml")
    assert factor_roles(plain).workload == ("batch_rows",)     # the name guess elsewhere
    out = run_experiment(exp, out=tmp_path / "results", executor=_RowsLinger(3))
    c = choose(out.folder).to_dict()
    sf = c["surface"]
    assert sf["used"] and sf["supported"]
    assert abs(float(sf["setting"]["batch_rows"]) - 620) < 40           # planted 620
    assert abs(float(sf["setting"]["linger_ms"]) - 3.4) < 0.5           # planted 3.4
