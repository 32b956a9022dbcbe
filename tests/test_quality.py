"""Correctness and provenance: expect, custom metrics, executable hashes, perf, load."""

from __future__ import annotations

import json
import os
import stat
import subprocess
import sys
import time

import pytest

from benchharness.errors import ExperimentError
from benchharness.execute.base import Measurement
from benchharness.experiment.file import Experiment


def _exp(section: str, factors: str = "{codec: [zlib, lzma]}"):
    text = f"experiment: t\ncommand: [\"true\"]\nfactors: {factors}\n{section}\n"
    return Experiment.from_text(text, path="exp.yaml")


def _m(status="ok", code=0, out=b"", err=b""):
    return Measurement(status=status, exit_code=code, wall_s=0.01, stdout_tail=out,
                       stderr_tail=err)


# --------------------------------------------------------------------------- expect

def test_expect_catches_wrong_output_and_exit():
    from benchharness.measure.expect import apply_expect, check_expect, parse_expect

    spec = parse_expect(_exp("expect: {exit: 0, stdout: '^checksum 9f2c$'}").sections["expect"])
    assert check_expect(spec, _m(out=b"warming\nchecksum 9f2c\n")) == (True, "")
    ok, why = check_expect(spec, _m(out=b"checksum 0000\n"))
    assert not ok and "does not match" in why and "checksum 0000" in why
    bad = apply_expect(spec, _m(out=b"checksum 0000\n"))
    assert bad.status == "failed" and "wrong output" in bad.message
    ok, why = check_expect(spec, _m(status="failed", code=3, out=b"checksum 9f2c\n"))
    assert not ok and why == "exit code 3, expected 0"
    # the executor's own message (with the stderr tail that says why) is kept
    failed = Measurement(status="failed", exit_code=2, wall_s=0.01,
                         message="exit code 2: can't open file 'w.py'")
    bad = apply_expect(spec, failed)
    assert bad.status == "failed"
    assert bad.message == "exit code 2: can't open file 'w.py' (expected exit code 0)"
    # timeouts stay timeouts
    assert apply_expect(spec, _m(status="timeout", code=None)).status == "timeout"


def test_expect_accepts_listed_nonzero_exit_and_checks_stderr():
    from benchharness.measure.expect import apply_expect, parse_expect

    spec = parse_expect(_exp("expect: {exit: [0, 3], stderr: 'done'}").sections["expect"])
    m = apply_expect(spec, _m(status="failed", code=3, err=b"all done\n"))
    assert m.status == "ok" and m.message == ""
    m = apply_expect(spec, _m(code=0, err=b"oops\n"))
    assert m.status == "failed" and "stderr" in m.message


@pytest.mark.parametrize("section,needle", [
    ("expect: {stdout: '(unclosed'}", "not a valid regular expression"),
    ("expect: {exit: zero}", "whole number"),
    ("expect: {stdot: x}", "did you mean 'stdout'"),
])
def test_expect_errors_name_file_line_col(section, needle):
    from benchharness.measure.expect import parse_expect

    with pytest.raises(ExperimentError) as ei:
        parse_expect(_exp(section).sections["expect"])
    assert str(ei.value).startswith("exp.yaml:4:") and needle in str(ei.value)


# --------------------------------------------------------------------------- metrics

METRICS = """metrics:
  rate_rps: {pattern: 'rate ([0-9.]+) req/s', unit: req/s, better: higher}
  warn_count: {pattern: 'warnings: (\\d+)', from: stderr, unit: count, better: lower}
  p99_ms: {json: latency.p99_ms, unit: ms, better: lower}
  first_ms: {json: samples.0, unit: ms, better: lower}
  hit_ratio: {file: 'stats-{codec}.json', json: cache.hit_ratio, unit: ratio, better: higher}
"""


def _metrics():
    from benchharness.measure.metrics import parse_metrics

    exp = _exp(METRICS)
    return parse_metrics(exp.sections["metrics"], exp.factor_names)


def test_regex_and_json_metrics_parse(tmp_path):
    from benchharness.measure.metrics import extract_metrics

    cfg = _metrics()
    assert cfg.names == ("rate_rps", "warn_count", "p99_ms", "first_ms", "hit_ratio")
    stats_file = tmp_path / "stats-zlib.json"
    t0 = time.time()
    stats_file.write_text(json.dumps({"cache": {"hit_ratio": 0.875}}))
    out = (b"rate 10.5 req/s\nrate 12.25 req/s\n"
           b'{"latency": {"p99_ms": 3.5}, "samples": [1.5, 2]}\n')
    vals, why = extract_metrics(cfg, out, b"warnings: 4\n", {"hit_ratio": "stats-zlib.json"},
                                started_at_epoch=t0, cwd=str(tmp_path))
    assert vals == {"rate_rps": 12.25, "warn_count": 4.0, "p99_ms": 3.5, "first_ms": 1.5,
                    "hit_ratio": 0.875}
    assert why == {}
    man = cfg.manifest()
    assert man["rate_rps"] == {"unit": "req/s", "better": "higher", "source": "pattern",
                               "pattern": "rate ([0-9.]+) req/s", "from": "stdout"}
    assert man["hit_ratio"]["file"] == "stats-{codec}.json"


def test_malformed_output_gives_missing_values_with_reasons(tmp_path):
    from benchharness.measure.metrics import extract_metrics, reasons_message, snapshot_files

    cfg = _metrics()
    (tmp_path / "stats-zlib.json").write_text("{not json")
    out = b'rate fast req/s\n{"latency": {"p99_ms": "n/a"}, "samples": []}\n{truncated'
    vals, why = extract_metrics(cfg, out, b"", {"hit_ratio": "stats-zlib.json"},
                                cwd=str(tmp_path))
    assert all(v is None for v in vals.values())
    assert "not found in stdout" in why["rate_rps"]          # 'fast' does not match [0-9.]+
    assert "not found in stderr" in why["warn_count"]
    assert "'n/a', not a number" in why["p99_ms"]
    assert "no list item '0'" in why["first_ms"]
    assert "not valid JSON" in why["hit_ratio"]
    assert reasons_message(why).startswith("metric rate_rps missing:")
    vals, why = extract_metrics(cfg, b"no json here\n", b"", {}, cwd=str(tmp_path))
    assert why["p99_ms"] == "no JSON line on stdout"
    assert "does not exist" in why["hit_ratio"]
    # a file the run did not rewrite is stale
    f = tmp_path / "stats-zlib.json"
    f.write_text(json.dumps({"cache": {"hit_ratio": 0.5}}))
    before = snapshot_files(cfg, {"hit_ratio": "stats-zlib.json"}, str(tmp_path))
    vals, why = extract_metrics(cfg, b"", b"", {"hit_ratio": "stats-zlib.json"},
                                cwd=str(tmp_path), files_before=before)
    assert vals["hit_ratio"] is None and "stale" in why["hit_ratio"]
    os.utime(f, ns=(time.time_ns() + 10**9, time.time_ns() + 10**9))
    vals, _ = extract_metrics(cfg, b"", b"", {"hit_ratio": "stats-zlib.json"},
                              cwd=str(tmp_path), files_before=before)
    assert vals["hit_ratio"] == 0.5
    # non-finite values are missing too
    vals, why = extract_metrics(cfg, b'{"latency": {"p99_ms": NaN}}\n', b"", {},
                                cwd=str(tmp_path))
    assert vals["p99_ms"] is None and "finite" in why["p99_ms"]


@pytest.mark.parametrize("body,needle", [
    ("m: {pattern: 'a(b)(c)', better: lower}", "exactly one capture group"),
    ("m: {pattern: 'x', better: faster}", "use lower or higher"),
    ("m: {json: a.b}", "needs `better: lower`"),
    ("m: {unit: s, better: lower}", "needs a source"),
    ("codec: {json: a, better: lower}", "already a factor"),
    ("wall_s: {json: a, better: lower}", "already a runs.csv column"),
    ("aslr: {json: a, better: lower}", "already a runs.csv column"),
    ("steady_state: {json: a, better: lower}", "already a runs.csv column"),
    ("m: {file: out.json, better: lower}", "file needs json"),
    ("m: {json: 'a..b', better: lower}", "empty part"),
    ("m: {pattern: '(x)', from: stdin, better: lower}", "use stdout or stderr"),
    ("m: {pattern: '(x)', json: a, better: lower}", "one source"),
    ("bad-name: {json: a, better: lower}", "letters, digits"),
])
def test_metric_config_errors_are_located(body, needle):
    from benchharness.measure.metrics import parse_metrics

    exp = _exp("metrics:\n  " + body)
    with pytest.raises(ExperimentError) as ei:
        parse_metrics(exp.sections["metrics"], exp.factor_names)
    assert str(ei.value).startswith("exp.yaml:5:") and needle in str(ei.value)


def test_every_runs_csv_column_is_reserved():
    # A metric (or factor) named like a column the runner writes would overwrite that
    # column in runs.csv (e.g. `aslr`), so every such column is reserved.
    from benchharness.experiment.file import RESERVED_COLUMNS
    from benchharness.results.journal import CORE_COLUMNS, LATER_COLUMNS, LEAD_COLUMNS

    assert set(LEAD_COLUMNS + CORE_COLUMNS + LATER_COLUMNS) <= RESERVED_COLUMNS


# --------------------------------------------------------------------------- provenance

def test_executable_hash_changes_when_the_binary_does(tmp_path):
    from benchharness.measure.provenance import collect_provenance, command_files, sha256_file
    import hashlib

    tool = tmp_path / "bin" / "squeeze"
    tool.parent.mkdir()
    tool.write_text("#!/bin/sh\necho v1\n")
    tool.chmod(tool.stat().st_mode | stat.S_IXUSR)
    env = {"PATH": f"{tool.parent}{os.pathsep}/usr/bin:/bin"}
    a = command_files(("squeeze", "--level", "3"), None, env, str(tmp_path))
    assert a["executable"] == str(tool.resolve())
    # reference: hashlib on the bytes
    assert a["executable_sha256"] == hashlib.sha256(tool.read_bytes()).hexdigest()
    tool.write_text("#!/bin/sh\necho v2\n")
    b = command_files(("squeeze", "--level", "3"), None, env, str(tmp_path))
    assert b["executable_sha256"] != a["executable_sha256"]
    assert sha256_file(tool) == b["executable_sha256"]
    # a relative path resolves against the working directory; file arguments are hashed
    data = tmp_path / "input.txt"
    data.write_text("hello")
    c = command_files(("./bin/squeeze", "input.txt", "--out=input.txt"), None, env, str(tmp_path))
    assert c["executable"] == str(tool.resolve())
    assert [f["path"] for f in c["files"]] == [str(data.resolve())]
    missing = command_files(("no-such-tool-xyz",), None, env, str(tmp_path))
    assert missing["executable"] is None and "not found" in missing["note"]
    prov = collect_provenance(tmp_path, [({"codec": "zlib"}, ("squeeze",), None, env,
                                          str(tmp_path))])
    assert prov["programs"][0]["example"]["levels"] == {"codec": "zlib"}
    assert prov["programs"][0]["executable"] == str(tool.resolve())
    json.dumps(prov)


def test_git_revision_and_dirty_state(tmp_path):
    from benchharness.measure.provenance import git_state

    if subprocess.run(["git", "--version"], capture_output=True).returncode != 0:
        pytest.skip("git is not installed")
    assert git_state(tmp_path) is None or git_state(tmp_path)["root"] != str(tmp_path)
    env = {**os.environ, "GIT_AUTHOR_NAME": "t", "GIT_AUTHOR_EMAIL": "t@example.org",
           "GIT_COMMITTER_NAME": "t", "GIT_COMMITTER_EMAIL": "t@example.org"}
    repo = tmp_path / "repo"
    repo.mkdir()
    run = lambda *a: subprocess.run(["git", *a], cwd=repo, env=env, check=True,  # noqa: E731
                                    capture_output=True, text=True).stdout.strip()
    run("init", "-q")
    (repo / "app.py").write_text("print(1)\n")
    run("add", "app.py")
    run("commit", "-qm", "first")
    s = git_state(repo)
    assert s["revision"] == run("rev-parse", "HEAD") and s["dirty"] is False
    (repo / "app.py").write_text("print(2)\n")
    s = git_state(repo)
    assert s["dirty"] is True and any("app.py" in c for c in s["changed"])


# --------------------------------------------------------------------------- perf

def test_perf_output_parsing_and_wrapping():
    from benchharness.measure.perfstat import PerfConfig, parse_perf_output, wrap

    text = ("# started on Tue\n\n1234567,,cycles:u,1000,100.00,,\n"
            "<not supported>,,cache-misses,0,100.00,,\n987654,,instructions:u,1000,100.00,0.8,insn per cycle\n")
    assert parse_perf_output(text) == {"cycles:u": 1234567.0, "cache-misses": None,
                                       "instructions:u": 987654.0}
    argv = wrap(("./app", "-x"), None, PerfConfig(), "/tmp/o.csv")
    assert argv[1:] == ("stat", "-x", ",", "-o", "/tmp/o.csv", "-e",
                        "cycles,instructions,cache-misses", "--", "./app", "-x")
    assert wrap(None, "a | b", PerfConfig(("cycles",)), "o")[-3:] == ("/bin/sh", "-c", "a | b")
    assert PerfConfig().columns() == ("perf_cycles", "perf_instructions", "perf_cache_misses")


def test_perf_counts_where_supported_or_a_clear_note(tmp_path):
    from benchharness.measure.perfstat import PerfConfig, perf_support, read_counts, wrap

    works, note = perf_support()
    if not works:
        assert note.startswith("hardware counters unavailable")
        pytest.skip(note)
    out = tmp_path / "perf.csv"
    cfg = PerfConfig(("instructions",))
    subprocess.run(wrap((sys.executable, "-c", "sum(range(100000))"), None, cfg, str(out)),
                   check=True, capture_output=True)
    vals, why = read_counts(str(out), cfg)
    assert vals["perf_instructions"] > 1e5 and why == ""


def test_perf_section_values():
    from benchharness.measure.perfstat import parse_perf

    assert parse_perf(_exp("perf: true").sections["perf"]).events[0] == "cycles"
    assert parse_perf(_exp("perf: false").sections["perf"]) is None
    assert parse_perf(_exp("perf: [instructions]").sections["perf"]).events == ("instructions",)
    with pytest.raises(ExperimentError):
        parse_perf(_exp("perf: []").sections["perf"])


@pytest.mark.parametrize("section,needle", [
    ("perf: true\nmetrics: {perf_cycles: {json: a, better: lower}}", "rename the metric"),
    ("perf: true", "rename the factor"),
])
def test_perf_columns_may_not_be_taken_by_a_metric_or_factor(section, needle):
    # Either would overwrite the counter's runs.csv column.
    from benchharness.measure.quality import quality_config

    with pytest.raises(ExperimentError, match=needle):
        quality_config(_exp(section, factors="{perf_cycles: [a, b]}" if "factor" in needle
                            else "{codec: [zlib, lzma]}"))


# --------------------------------------------------------------------------- load

def test_load_correlation_finds_planted_relation_like_scipy():
    import numpy as np
    from scipy import stats

    from benchharness.analysis.load_check import load_correlation

    rng = np.random.default_rng(2)
    load = rng.uniform(0, 4, 60)
    resid = 0.05 * load + rng.normal(0, 0.05, 60)      # planted: residuals follow load
    out = load_correlation(resid, load)
    ref = stats.spearmanr(resid, load)                 # reference: scipy.stats.spearmanr
    assert out["rho"] == pytest.approx(ref.statistic) and out["p"] == pytest.approx(ref.pvalue)
    assert out["verdict"] == "related" and "rise" in out["message"]
    quiet = load_correlation(rng.normal(0, 1, 60), load)
    assert quiet["verdict"] in ("unrelated", "related")
    assert load_correlation([1, 2, 3, 4, 5, 6], [0.5] * 6)["verdict"] == "no variation"
    assert load_correlation([1, 2, float("nan")], [1, 2, 3])["verdict"] == "too few runs"


def test_metric_direction_from_results_folder(tmp_path):
    from benchharness.measure.metrics import better_direction, read_manifest

    (tmp_path / "metrics.json").write_text(json.dumps(_metrics().manifest()))
    assert better_direction(tmp_path, "rate_rps") == "higher"
    assert better_direction(tmp_path, "p99_ms") == "lower"
    assert better_direction(tmp_path, "wall_s") == "lower"
    assert read_manifest(tmp_path / "nowhere") == {}


def test_load_check_on_a_fitted_analysis():
    # Planted: run times grow with the load recorded at their start.
    import numpy as np
    import pandas as pd

    from benchharness.analysis import analyze
    from benchharness.analysis.load_check import load_check

    rng = np.random.default_rng(4)
    n = 40
    load = rng.uniform(0, 6, n)
    a = np.repeat(["x", "y"], n // 2)
    wall = np.where(a == "x", 1.0, 1.5) * np.exp(0.08 * load + rng.normal(0, 0.03, n))
    runs = pd.DataFrame({"run": np.arange(n), "position": rng.permutation(n), "a": a,
                         "status": "ok", "wall_s": wall, "load_1m": load})
    res = analyze(runs, response="wall_s", factors=["a"])
    out = load_check(res, runs)
    assert out["verdict"] == "related" and out["rho"] > 0.5 and out["n"] == n
    assert load_check(res, runs.drop(columns="load_1m"))["verdict"] == "not recorded"
