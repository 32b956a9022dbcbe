"""Quality sections through the runner: expect, metrics, samples, provenance, perf note."""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from benchharness.execute.base import Measurement
from benchharness.experiment.file import load_experiment
from benchharness.execute.runner import run_experiment

ROOT = Path(__file__).resolve().parent.parent
PY = sys.executable


class PopenExecutor:
    """A tiny stand-in executor (real processes, no launcher) for these tests."""

    def __init__(self):
        self.specs = []

    def execute(self, spec, on_start=None):
        from benchharness.results.journal import utc_iso

        self.specs.append(spec)
        started = utc_iso()
        t0 = time.perf_counter()
        if spec.argv is not None:
            p = subprocess.Popen(list(spec.argv), cwd=spec.cwd, env=dict(spec.env),
                                 stdout=subprocess.PIPE, stderr=subprocess.PIPE)
        else:
            p = subprocess.Popen(spec.shell_command, shell=True, cwd=spec.cwd,
                                 env=dict(spec.env), stdout=subprocess.PIPE,
                                 stderr=subprocess.PIPE)
        if on_start:
            on_start(p.pid, p.pid)
        out, err = p.communicate(timeout=spec.timeout_s)
        wall = time.perf_counter() - t0
        code = p.returncode
        return Measurement(status="ok" if code == 0 else "failed", exit_code=code, wall_s=wall,
                           started_at=started, stdout_tail=out[-spec.capture_bytes:],
                           stderr_tail=err[-spec.capture_bytes:])

    def close(self):
        pass


def _write(tmp_path, body):
    p = tmp_path / "exp.yaml"
    p.write_text(textwrap.dedent(body).replace("PY", PY).replace("TMP", str(tmp_path)))
    return load_experiment(p)


def _rows(folder):
    with open(folder / "runs.csv") as fh:
        return list(csv.DictReader(fh))


def test_warm_cache_demo_end_to_end(tmp_path, monkeypatch):
    monkeypatch.chdir(ROOT)   # the demo's command path is relative to the checkout
    # The demo file as shipped, with fewer replicates and batches to keep the test quick.
    text = (ROOT / "experiments" / "warm-cache.yaml").read_text()
    # the copy lives elsewhere: its workdir points at the checkout explicitly
    assert "\nworkdir: ..\n" in text
    text = text.replace("\nworkdir: ..\n", f"\nworkdir: {json.dumps(str(ROOT))}\n")
    assert '--seed, "7"]' in text and "replicates: 4\nwarmup: 1\n" in text
    text = text.replace('--seed, "7"]', '--seed, "7", --batches, "80"]')
    text = text.replace("replicates: 4\nwarmup: 1\n", "replicates: 2\nwarmup: 0\n")
    p = tmp_path / "warm-cache.yaml"
    p.write_text(text)
    exp = load_experiment(p)
    out = run_experiment(exp, out=tmp_path / "res", executor=PopenExecutor())
    folder = out.folder
    rows = _rows(folder)
    assert len(rows) == 8 and {r["status"] for r in rows} == {"ok"}
    header = list(rows[0])
    assert header[-3:] == ["throughput_rps", "hit_ratio", "served_rps"]
    for col in ("load_1m", "cpu_mhz", "steady_s", "steady_state"):
        assert col in header
    for r in rows:
        assert float(r["throughput_rps"]) > 0
        # the stderr regex and the JSON line report the same throughput (rounded)
        assert float(r["served_rps"]) == pytest.approx(float(r["throughput_rps"]), rel=1e-3)
        assert 0 <= float(r["hit_ratio"]) <= 1
        assert r["steady_state"] in ("steady from the start", "steady after speeding up",
                                     "steady after slowing down", "never steady")
    # a cache that holds every product fills over tens of batches: the first
    # iterations are visibly slower than the last ones (robust to a busy machine;
    # the PELT classification itself is checked on planted series elsewhere)
    big_runs = {int(r["run"]) for r in rows if r["cache_size"] == "4096"}
    recs = [json.loads(x) for x in (folder / "samples.jsonl").read_text().splitlines()]
    import statistics

    def slowdown(rec):
        s = rec["samples_s"]
        return statistics.median(s[:8]) / statistics.median(s[-30:])

    assert max(slowdown(r) for r in recs if r["run"] in big_runs) > 1.2
    metrics = json.loads((folder / "metrics.json").read_text())
    assert metrics["throughput_rps"]["unit"] == "requests/s"
    assert metrics["throughput_rps"]["better"] == "higher"
    assert metrics["steady_s"]["unit"] == "s"
    lines = (folder / "samples.jsonl").read_text().splitlines()
    assert len(lines) == 8
    rec = json.loads(lines[0])
    assert len(rec["samples_s"]) == 80 and rec["analysis"]["iterations"] == 80
    steady = json.loads((folder / "steady.json").read_text())
    assert len(steady["cells"]) == 4
    advised = [c for c in steady["cells"] if "advice" in c]
    assert advised and all(c["advice"]["executions"] >= 2 for c in advised)
    prov = json.loads((folder / "provenance.json").read_text())
    assert prov["cell_count"] == 4 and prov["programs_vary_with"] == []   # one program
    script = [f for f in prov["programs"][0]["files"] if f["path"].endswith("warmcache.py")]
    assert script and len(script[0]["sha256"]) == 64
    assert prov["programs"][0]["executable_sha256"]


def test_expect_marks_wrong_answers_failed_and_metrics_missing(tmp_path):
    exp = _write(tmp_path, """\
        experiment: answers
        command: [PY, -c, "import sys; v = sys.argv[1]; print('answer', 42 if v == 'good' else 41); print('rate', 'fast' if v == 'odd' else 3.5)", "{variant}"]
        factors:
          variant: [good, wrong, odd]
        replicates: 1
        expect:
          stdout: '^answer 42$'
        metrics:
          rate: {pattern: 'rate ([0-9.]+)', unit: ops/s, better: higher}
        """)
    out = run_experiment(exp, out=tmp_path / "res", executor=PopenExecutor())
    rows = {r["variant"]: r for r in _rows(out.folder)}
    assert rows["good"]["status"] == "ok" and rows["good"]["rate"] == "3.5"
    assert rows["wrong"]["status"] == "failed"
    assert "does not match /^answer 42$/" in rows["wrong"]["message"]
    assert rows["odd"]["status"] == "failed"            # answer 41 for 'odd' too
    assert rows["odd"]["rate"] == ""


def test_missing_metric_keeps_the_run_ok_with_a_reason(tmp_path):
    exp = _write(tmp_path, """\
        experiment: partial
        command: [PY, -c, "import sys; print('rate', sys.argv[1])", "{v}"]
        factors:
          v: ["2.5", "n/a"]
        metrics:
          rate: {pattern: 'rate (\\S+)', unit: ops/s, better: higher}
        """)
    out = run_experiment(exp, out=tmp_path / "res", executor=PopenExecutor())
    rows = {r["v"]: r for r in _rows(out.folder)}
    assert rows["2.5"]["rate"] == "2.5" and rows["2.5"]["message"] == ""
    assert rows["n/a"]["status"] == "ok" and rows["n/a"]["rate"] == ""
    assert "metric rate missing" in rows["n/a"]["message"] and "not a number" in rows["n/a"][
        "message"]


def test_bad_section_fails_before_any_folder_exists(tmp_path):
    from benchharness.errors import ExperimentError

    exp = _write(tmp_path, """\
        experiment: bad
        command: [PY, -c, "pass"]
        factors: {a: [1]}
        metrics:
          m: {pattern: 'no group', better: lower}
        """)
    with pytest.raises(ExperimentError, match=r"exp.yaml:5:.*capture group"):
        run_experiment(exp, out=tmp_path / "res", executor=PopenExecutor())
    assert not (tmp_path / "res").exists()


def test_perf_section_without_counters_gives_a_note(tmp_path):
    from benchharness.measure.perfstat import perf_support

    works, note = perf_support()
    exp = _write(tmp_path, """\
        experiment: counters
        command: [PY, -c, "sum(range(10000))"]
        factors: {a: [1]}
        perf: [instructions]
        """)
    ex = PopenExecutor()
    out = run_experiment(exp, out=tmp_path / "res", executor=ex)
    row = _rows(out.folder)[0]
    man = json.loads((out.folder / "metrics.json").read_text())
    assert man["perf_instructions"]["available"] is works
    if works:
        assert ex.specs[0].argv[1] == "stat" and float(row["perf_instructions"]) > 0
    else:
        assert ex.specs[0].argv[0] == PY           # not wrapped
        assert row["perf_instructions"] == "" and "note" in man["perf_instructions"]


def test_no_steady_state_is_flagged(tmp_path):
    exp = _write(tmp_path, """\
        experiment: drifting
        command: [PY, -c, "import random; r = random.Random(1); [print(0.001 * (1 + i / 10) * (1 + 0.01 * r.random())) for i in range(60)]"]
        factors: {a: [1]}
        replicates: 2
        samples: {format: lines}
        """)
    out = run_experiment(exp, out=tmp_path / "res", executor=PopenExecutor())
    rows = _rows(out.folder)
    assert all(r["steady_state"] == "never steady" and r["steady_s"] == "" for r in rows)
    assert all("never steady" in r["message"] for r in rows)
    steady = json.loads((out.folder / "steady.json").read_text())
    assert len(steady["runs_without_steady_state"]) == 2
    assert any("never reached a steady state" in n for n in out.notes)


def test_steady_command_reports_advice(tmp_path, main_cli):
    # Planted two-level data: each run has its own offset (between-run spread)
    # plus iteration noise, after a 10-iteration warm-up.
    exp = _write(tmp_path, """\
        experiment: planted
        command: [PY, -c, "import random, sys; r = random.Random(int(sys.argv[1]) * 7 + int(sys.argv[2])); off = r.gauss(0, 0.00005); [print((0.004 if i < 10 else 0.001 + off) * (1 + r.gauss(0, 0.02))) for i in range(100)]", "{a}", "{replicate}"]
        factors: {a: [1, 2]}
        replicates: 4
        samples: {format: lines, target: 1%}
        """.replace('"{replicate}"', '"0"'))
    out = run_experiment(exp, out=tmp_path / "res", executor=PopenExecutor())
    rows = _rows(out.folder)
    assert all(r["steady_state"] == "steady after speeding up" for r in rows)
    r = main_cli("steady", out.folder, "--json")
    assert r.returncode == 0, r.stderr
    data = json.loads(r.stdout)
    assert data["target_rel_halfwidth"] == 0.01
    for cell in data["cells"]:
        assert cell["runs_with_steady_state"] == 4
        assert cell["cell_shape"] == "steady after speeding up"
        assert cell["components"]["iterations"] >= 85
        assert cell["advice"]["executions"] >= 2
    text = main_cli("steady", out.folder, "--target", "5%")
    assert text.returncode == 0 and "advice:" in text.stdout and "±5.0%" in text.stdout
    # the iteration time and its two spreads in one unit (the mean's): "0 ms", never "0 s"
    # beside "1.00 ms"
    import re
    for line in text.stdout.splitlines():
        if line.strip().startswith("steady iteration time"):
            units = re.findall(r"\d (s|ms|µs|ns)\b", line)
            assert len(units) == 3 and len(set(units)) == 1, line
    bad = main_cli("steady", out.folder, "--target", "lots")
    assert bad.returncode == 2 and "--target" in bad.stderr


def test_resumed_folder_keeps_first_provenance_and_flags_changed_files(tmp_path):
    from benchharness.measure.quality import RunQuality

    script = tmp_path / "app.py"
    script.write_text("print(1)\n")
    exp = _write(tmp_path, """\
        experiment: prov
        command: [PY, TMP/app.py]
        factors: {a: [1]}
        """)
    folder = tmp_path / "res"
    folder.mkdir()
    cell = {"argv": (PY, str(script)), "shell": None, "env": dict(os.environ),
            "cwd": str(tmp_path)}
    q = RunQuality(exp, folder)
    q.start([({"a": "1"}, cell)])
    first = json.loads((folder / "provenance.json").read_text())
    assert first["programs"][0]["files"][0]["path"] == str(script.resolve())
    script.write_text("print(2)\n")
    q2 = RunQuality(exp, folder)
    q2.start([({"a": "1"}, cell)])
    assert json.loads((folder / "provenance.json").read_text()) == first   # never overwritten
    again = json.loads((folder / "provenance.resumed-1.json").read_text())
    assert (again["programs"][0]["files"][0]["sha256"]
            != first["programs"][0]["files"][0]["sha256"])
    assert any("changed" in n and "app.py" in n for n in q2.notes)


def test_plan_checks_quality_sections(tmp_path, main_cli):
    p = tmp_path / "exp.yaml"
    p.write_text("experiment: t\ncommand: [\"true\"]\nfactors: {a: [1]}\n"
                 "samples: {format: csv}\n")
    r = main_cli("plan", p)
    assert r.returncode == 2
    assert f"{p}:4:19: samples.format is 'csv'" in r.stderr and "Traceback" not in r.stderr
    r = main_cli("plan", ROOT / "experiments" / "warm-cache.yaml")
    assert r.returncode == 0, r.stderr


def test_metric_file_placeholders_are_checked(tmp_path):
    from benchharness.errors import ExperimentError
    from benchharness.measure.quality import quality_config

    exp = _write(tmp_path, """\
        experiment: files
        command: [PY, -c, "pass"]
        factors: {codec: [zlib, lzma]}
        metrics:
          ratio: {file: 'out-{codek}.json', json: r, better: higher}
        """)
    with pytest.raises(ExperimentError, match=r"exp.yaml:5:17: metric 'ratio': placeholder "
                                              r"\{codek\} names no factor"):
        quality_config(exp)
    ok = _write(tmp_path, """\
        experiment: files
        command: [PY, -c, "import json, sys; json.dump({{'r': 2.5}}, open('out-' + sys.argv[1] + '.json', 'w'))", "{codec}"]
        factors: {codec: [zlib, lzma]}
        workdir: TMP
        metrics:
          ratio: {file: 'out-{codec}.json', json: r, better: higher}
        """)
    out = run_experiment(ok, out=tmp_path / "res", executor=PopenExecutor())
    assert [r["ratio"] for r in _rows(out.folder)] == ["2.5", "2.5"]
