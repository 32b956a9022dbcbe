"""Fault injection: small hostile experiment files and checks made before running.

Each case plants a file that used to hang, fill memory or crash the harness,
runs the command a user would (in a subprocess with a timeout, so a regression
fails instead of hanging the suite) and asserts what the tool says: exit code 2,
one line on stderr naming FILE:LINE:COL and what to do, and no traceback.

The damaged results folders (a journal line that is not a record, garbage in
plan.csv or session.json, a changed frozen experiment) are read in this process
(conftest's `run_main`): those commands only read small files, which cannot hang
or fill memory, and a new process for each would cost a second of imports.
"""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from conftest import ROOT, run_cli, run_main

LIMIT_S = 30  # generous on a loaded 2-core machine; each case takes well under a second


def one_line_error(proc, *needles):
    """Assert a refused input: exit 2, a single stderr line holding every needle."""
    assert proc.returncode == 2, (proc.returncode, proc.stdout, proc.stderr)
    err = proc.stderr.strip()
    assert "Traceback" not in err, err
    lines = [ln for ln in err.splitlines() if not ln.startswith("warning:")]
    assert len(lines) == 1, err
    for n in needles:
        assert n in lines[0], (n, lines[0])
    return lines[0]


def write(tmp_path, text, name="exp.yaml"):
    p = tmp_path / name
    p.write_text(text)
    return p


HEAD = 'experiment: hostile\ncommand: [echo, "{a}"]\nfactors: {a: [x, y]}\n'


# -- item 10: bounded reading ------------------------------------------------------------

def alias_bomb() -> str:
    """About 500 bytes whose aliases stand for 9**9 (387 million) values."""
    lines = [HEAD, "pin: &a0 [x, x, x, x, x, x, x, x, x]\n"]
    for i in range(1, 9):
        refs = ", ".join([f"*a{i - 1}"] * 9)
        lines.append(f"x{i}: &a{i} [{refs}]\n")
    return "".join(lines)


def test_alias_bomb_is_refused_at_once(tmp_path):
    text = alias_bomb()
    assert len(text.encode()) < 600
    p = write(tmp_path, text)
    proc = run_cli("plan", p, timeout=LIMIT_S)
    line = one_line_error(proc, str(p), "aliases", "100,000")
    # located at the first value whose expansion passes the bound (the line of &a5)
    assert f"{p}:9:" in line, line


def test_alias_used_many_times_below_the_bound_is_fine(tmp_path):
    # the same alias used in several places is ordinary YAML and must keep working
    p = write(tmp_path, 'experiment: ok\ncommand: [echo, "{a}", "{b}"]\n'
                        "factors: {a: &lv [x, y], b: *lv}\n")
    proc = run_cli("plan", p, timeout=LIMIT_S)
    assert proc.returncode == 0, proc.stderr
    assert "4 cells" in proc.stdout or "cells" in proc.stdout


def test_self_referencing_alias_is_a_loop(tmp_path):
    p = write(tmp_path, HEAD + "pin: &p [x, *p]\n")
    proc = run_cli("plan", p, timeout=LIMIT_S)
    one_line_error(proc, f"{p}:4:", "*p", "loop")


@pytest.mark.parametrize("style", ["flow", "block"])
def test_deep_nesting_has_a_limit(tmp_path, style):
    if style == "flow":
        body = "pin: " + "[" * 1000 + "]" * 1000 + "\n"
    else:
        body = "pin:\n" + "\n".join(" " * (2 * i) + "-" for i in range(1000)) + " x\n"
    p = write(tmp_path, HEAD + body)
    proc = run_cli("plan", p, timeout=LIMIT_S)
    one_line_error(proc, str(p), "nested more than 40 deep")


def test_nesting_within_the_limit_is_read(tmp_path):
    # 30 levels inside an unknown-to-us section still parses (and is judged by its owner)
    p = write(tmp_path, HEAD + "about: " + "[" * 30 + "]" * 30 + "\n")
    proc = run_cli("plan", p, timeout=LIMIT_S)
    one_line_error(proc, f"{p}:4:8", "'about' must be a single value")


def test_billion_replicates_refused_with_the_override_named(tmp_path):
    p = write(tmp_path, HEAD + "replicates: 1000000000\n")
    proc = run_cli("plan", p, timeout=LIMIT_S)
    one_line_error(proc, f"{p}:4:1", "2,000,000,000 runs", "limit of 1,000,000")
    # an absurd count is not offered the override: no plan that size fits in memory
    assert "max_runs" not in proc.stderr


def test_forty_factors_refused_before_any_cell_is_built(tmp_path):
    names = [f"f{i}" for i in range(40)]
    text = ("experiment: wide\ncommand: [echo, " + ", ".join(f'"{{{n}}}"' for n in names)
            + "]\nfactors:\n" + "".join(f"  {n}: [a, b]\n" for n in names))
    p = write(tmp_path, text)
    proc = run_cli("plan", p, timeout=LIMIT_S)
    one_line_error(proc, f"{p}:3:1", f"{2 ** 40:,} runs")


def test_max_runs_is_the_override(tmp_path):
    # 3 cells x 400 replicates = 1,200 runs: refused under max_runs 1000, accepted at 1200
    base = 'experiment: many\ncommand: [echo, "{a}"]\nfactors: {a: [x, y, z]}\nreplicates: 400\n'
    p = write(tmp_path, base + "max_runs: 1000\n")
    proc = run_cli("plan", p, timeout=LIMIT_S)
    one_line_error(proc, f"{p}:4:1", "1,200 runs", "limit of 1,000", "'max_runs: 1200'")
    p = write(tmp_path, base + "max_runs: 1200\n")
    proc = run_cli("plan", p, "--json", timeout=LIMIT_S)
    assert proc.returncode == 0, proc.stderr
    import json

    assert json.loads(proc.stdout)["runs"] == 1200
    # the override has a ceiling: every planned run is held in memory
    p = write(tmp_path, base + "max_runs: 6000000\n")
    one_line_error(run_cli("plan", p, timeout=LIMIT_S), f"{p}:5:11", "at most 5,000,000")


def test_adaptive_maximum_counts_against_the_limit(tmp_path):
    # plan must refuse what run would plan: adaptive replication plans its maximum
    p = write(tmp_path, HEAD + "replicates: {until: {ratio_halfwidth: 2%}, min: 3, "
                               "max: 600000}\n")
    proc = run_cli("plan", p, timeout=LIMIT_S)
    one_line_error(proc, f"{p}:4:1", "1,200,000 runs")


def test_fifo_is_refused_without_blocking(tmp_path):
    fifo = tmp_path / "exp.yaml"
    os.mkfifo(fifo)
    proc = run_cli("plan", fifo, timeout=LIMIT_S)
    one_line_error(proc, str(fifo), "FIFO", "not a regular file")


def test_dev_zero_is_refused(tmp_path):
    proc = run_cli("plan", "/dev/zero", timeout=LIMIT_S)
    one_line_error(proc, "/dev/zero", "device", "not a regular file")


def test_oversized_file_is_refused(tmp_path):
    p = tmp_path / "big.yaml"
    p.write_text(HEAD + "about: '" + "x" * (1 << 20) + "'\n")
    proc = run_cli("plan", p, timeout=LIMIT_S)
    one_line_error(proc, str(p), "1,048,576 bytes")


def test_catastrophic_expect_regex_is_stopped_and_named(tmp_path):
    # (a+)+$ against 40 a's and a b backtracks about 2**40 times: stopped after 2 s a search
    p = write(tmp_path, "experiment: rx\n"
                        "command: [printf, 'aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaab{a}']\n"
                        "factors: {a: [x]}\nreplicates: 1\n"
                        "expect: {stdout: '^(a+)+$'}\n")
    out = tmp_path / "out"
    proc = run_cli("run", p, "--out", out, "--no-analysis", "--quiet", timeout=60)
    assert "Traceback" not in proc.stderr
    import json

    recs = [json.loads(x) for x in (out / "runs.jsonl").read_text().splitlines()]
    assert len(recs) == 1
    assert recs[0]["status"] == "failed"
    assert "/^(a+)+$/ took more than 2 s" in recs[0]["message"]


def test_bounded_search_puts_back_an_outer_timer():
    # A test runner's own alarm (pytest-timeout) must survive a bounded search.
    code = r"""
import re, signal, time
from benchharness.measure.expect import bounded, RegexTimeout
fired = []
signal.signal(signal.SIGALRM, lambda *a: fired.append(1))
signal.setitimer(signal.ITIMER_REAL, 1.0)
assert bounded(lambda: re.search('b', 'ab'), 'b', 0.5) is not None
try:
    bounded(lambda: re.search(r'(a+)+$', 'a' * 40 + 'b'), '(a+)+$', 0.2)
    raise SystemExit('not stopped')
except RegexTimeout:
    pass
time.sleep(1.2)
print('fired', len(fired))
"""
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=LIMIT_S, cwd=ROOT, env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "fired 1"


def test_bounded_search_off_the_main_thread():
    code = r"""
import re, threading
from benchharness.measure.expect import bounded, RegexTimeout
out = {}
def work():
    m = bounded(lambda: list(re.finditer(r'r=(\d+)', 'r=1 r=22')), 'x', 5)
    out['groups'] = [x.group(1) for x in m]
    try:
        bounded(lambda: re.search(r'(a+)+$', 'a' * 40 + 'b'), '(a+)+$', 0.3)
    except RegexTimeout:
        out['stopped'] = True
t = threading.Thread(target=work); t.start(); t.join()
print(out)
"""
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=LIMIT_S, cwd=ROOT, env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "{'groups': ['1', '22'], 'stopped': True}"


# -- item 11: checked before running, not after ------------------------------------------

BEFORE_RUN = {
    # name: (file text, expected FILE:LINE:COL suffix, words of the message)
    "compare-level": ('experiment: cmp\ncommand: [echo, "{a}", "{b}"]\n'
                      "factors: {a: [x, y], b: [p, q]}\n"
                      "compare:\n  - {a: [x, y]}\n  - {a: [x, z], within: {b: p}}\n",
                      ":6:5:", ["'z' is not a level of 'a'", "levels: x, y"]),
    "compare-factor": ('experiment: cmp\ncommand: [echo, "{a}"]\nfactors: {a: [x, y]}\n'
                       "compare: [{codec: [x, y]}]\n", ":4:11:", ["'codec' is not a factor"]),
    "nul-level": ('experiment: nul\ncommand: [echo, "{a}"]\nfactors: {a: [x, "y\\0z"]}\n',
                  ":3:18:", ["NUL character"]),
    "nul-env": ('experiment: nul\ncommand: [echo, "{a}"]\nfactors: {a: [x]}\n'
                'env: {GREETING: "hi\\0there"}\n', ":4:17:", ["NUL character"]),
    "nul-command": ('experiment: nul\ncommand: [echo, "{a}", "a\\x00b"]\nfactors: {a: [x]}\n',
                    ":2:24:", ["NUL character"]),
    "nul-workdir": ('experiment: nul\ncommand: [echo, "{a}"]\nfactors: {a: [x]}\n'
                    'workdir: "/tmp\\0/x"\n', ":4:10:", ["NUL character"]),
    "timeout-huge": ('experiment: to\ncommand: [echo, "{a}"]\nfactors: {a: [x]}\n'
                     "timeout: 9999999999999999h\n", ":4:10:", ["longer than the harness can "
                                                              "wait", "24 days"]),
    "timeout-597h": ('experiment: to\ncommand: [echo, "{a}"]\nfactors: {a: [x]}\n'
                     "timeout: 597h\n", ":4:10:", ["at most 24 days"]),
    "pin-reversed": ('experiment: pin\ncommand: [echo, "{a}"]\nfactors: {a: [x]}\n'
                     'pin: "5-2"\n', ":4:6:", ["LOW <= HIGH"]),
    "pin-huge": ('experiment: pin\ncommand: [echo, "{a}"]\nfactors: {a: [x]}\n'
                 'pin: "0-99999999"\n', ":4:6:", ["CPU 99999999", "at most 8191"]),
    # found by the fuzz test: plan accepted it, run refused it (after starting its launcher)
    "host-check": ('experiment: hc\ncommand: [echo, "{a}"]\nfactors: {a: [x]}\n'
                   "host_check: off\n 1000000000\n", ":4:13:", ["'host_check' is 'off 1000000000'"]),
    "run-limit": ('experiment: many\ncommand: [echo, "{a}"]\nfactors: {a: [x, y]}\n'
                  "replicates: 1000000000\n", ":4:1:", ["2,000,000,000 runs"]),
    "exclude-everything": ('experiment: ex\ncommand: [echo, "{a}"]\nfactors: {a: [x, y]}\n'
                           "exclude:\n  - {a: x}\n  - {a: [y]}\n", ":6:5:",
                           ["remove every combination"]),
    "only-when-unknown-level": ('experiment: ow\ncommand: [echo, "{a}", "{b}"]\n'
                                "factors: {a: [x, y], b: [p, q]}\n"
                                "only_when:\n  b: {a: z}\n", ":5:10:",
                                ["'z' is not a level of 'a'", "x, y"]),
    "pin-absent-cpu-in-one-cell": ('experiment: pin\ncommand: [echo, "{c}"]\n'
                                   'factors: {c: ["0", "8191"]}\npin: "{c}"\n',
                                   ":4:6:", ["CPU 8191 does not exist"]),
}


@pytest.mark.parametrize("case", sorted(BEFORE_RUN))
def test_checked_by_plan_and_at_the_start_of_run(tmp_path, case):
    text, where, words = BEFORE_RUN[case]
    p = write(tmp_path, text)
    one_line_error(run_cli("plan", p, timeout=LIMIT_S), f"{p}{where}", *words)
    out = tmp_path / "out"
    proc = run_cli("run", p, "--out", out, "--quiet", "--no-analysis", timeout=LIMIT_S)
    one_line_error(proc, f"{p}{where}", *words)
    assert not out.exists(), "run must refuse before it creates a results folder"


def test_timeout_just_under_the_bound_runs(tmp_path):
    # 576h is the most accepted, and the launcher can wait that long (it used to fail every
    # run with "timeout is too large" from 597h)
    p = write(tmp_path, 'experiment: to\ncommand: [echo, "{a}"]\nfactors: {a: [x]}\n'
                        "timeout: 576h\n")
    out = tmp_path / "out"
    proc = run_cli("run", p, "--out", out, "--quiet", "--no-analysis", timeout=LIMIT_S)
    assert proc.returncode == 0, proc.stderr
    import json

    rec = json.loads((out / "runs.jsonl").read_text())
    assert rec["status"] == "ok", rec


# -- item 7: damaged results folders -----------------------------------------------------

import json as _json
import shutil

SMALL = ('experiment: small\ncommand: [printf, "{a}"]\nfactors: {a: [x, y]}\nreplicates: 5\n'
         "seed: 1\n")


@pytest.fixture(scope="module")
def measured(tmp_path_factory):
    """A finished folder: 2 cells x 5 replicates, all ok."""
    d = tmp_path_factory.mktemp("measured")
    exp = d / "small.yaml"
    exp.write_text(SMALL)
    proc = run_main("run", exp, "--out", d / "folder", "--quiet", "--no-analysis",
                   timeout=120)
    assert proc.returncode == 0, proc.stderr
    return d / "folder"


@pytest.fixture
def folder(measured, tmp_path):
    f = tmp_path / "folder"
    shutil.copytree(measured, f)
    return f


def analysis_json(folder, tmp_path):
    out = tmp_path / "analysis.json"
    proc = run_main("analyze", folder, "--json-out", out, timeout=120)
    assert proc.returncode == 0, proc.stderr
    return _json.loads(out.read_text())


def insert_line(folder, n, text):
    p = folder / "runs.jsonl"
    lines = p.read_text().splitlines(True)
    lines.insert(n - 1, text + "\n")
    p.write_text("".join(lines))


BAD_LINES = {
    "one": ("1", "the line holds '1', not a run record"),
    "list": ("[]", "the line holds '[]', not a run record"),
    "null": ("null", "the line holds 'null', not a run record"),
    "no-run": ('{"levels": {"a": "x"}, "status": "ok", "wall_s": 1.0}', "has no 'run'"),
    "no-levels": ('{"run": 50, "status": "ok", "wall_s": 1.0}', "has no 'levels'"),
    "no-status": ('{"run": 50, "levels": {"a": "x"}, "wall_s": 1.0}', "has no 'status'"),
}


@pytest.mark.parametrize("case", sorted(BAD_LINES))
def test_journal_line_that_is_not_a_record(folder, case):
    text, words = BAD_LINES[case]
    insert_line(folder, 4, text)
    before = (folder / "runs.jsonl").read_bytes()
    for args in (("analyze", folder), ("run", "--resume", folder, "--quiet")):
        proc = run_main(*args, timeout=LIMIT_S * 2)
        one_line_error(proc, f"{folder}/runs.jsonl:4: ", words, "move it out of the journal",
                       "the 10 runs recorded on the other lines are kept")
        # nothing measured is lost or rewritten by a refused command
        assert (folder / "runs.jsonl").read_bytes() == before


def test_two_records_on_one_line_says_where_to_split(folder, tmp_path):
    p = folder / "runs.jsonl"
    lines = p.read_text().splitlines(True)
    joined = lines[2].rstrip("\n") + lines[3]
    p.write_text("".join(lines[:2] + [joined] + lines[4:]))
    proc = run_main("analyze", folder, timeout=LIMIT_S * 2)
    line = one_line_error(proc, f"{p}:3: ", "two records run together")
    col = int(line.split("put a newline at column ")[1].split()[0])
    # planted truth: the column given is where the first record ends
    assert col == len(lines[2].rstrip("\n")) + 1
    fixed = lines[:2] + [joined[:col - 1] + "\n", joined[col - 1:]] + lines[4:]
    p.write_text("".join(fixed))
    assert analysis_json(folder, tmp_path)["counts"]["rows"] == 10


def test_duplicate_lines_are_set_aside_not_counted(folder, measured, tmp_path):
    (tmp_path / "clean").mkdir()
    clean = analysis_json(measured, tmp_path / "clean")
    p = folder / "runs.jsonl"
    text = p.read_text()
    x_lines = [ln for ln in text.splitlines() if _json.loads(ln)["levels"]["a"] == "x"]
    with open(p, "a") as fh:  # three of cell x's five runs written twice
        fh.write("\n".join(x_lines[:3]) + "\n")
    an = analysis_json(folder, tmp_path)
    # the cell keeps its 5 runs (it showed 8) and the residual df stays that of 10 runs (8)
    n = {m["levels"]["a"]: m["n"] for m in an["means"] if m["term"] == "a"}
    assert n == {"x": 5, "y": 5}
    assert an["counts"]["df_resid"] == clean["counts"]["df_resid"] == 8
    assert an["counts"]["rows"] == 10
    assert any("3 lines repeat a run already recorded" in n and "not counted" in n
               for n in an["notes"]), an["notes"]
    # resume sets them aside in a file of their own: nothing deleted
    before = p.read_bytes()
    proc = run_main("run", "--resume", folder, "--quiet", "--no-analysis", timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert "moved to runs.jsonl.duplicates" in proc.stdout + proc.stderr
    side = (folder / "runs.jsonl.duplicates").read_bytes()
    assert len(p.read_text().splitlines()) == 10
    assert sorted(p.read_bytes().splitlines() + side.splitlines()) == \
        sorted(before.splitlines())
    assert sum(1 for _ in open(folder / "runs.csv")) == 11  # header + 10 runs


def test_garbage_session_json(folder, tmp_path):
    (folder / "session.json").write_text("{not json")
    proc = run_main("run", "--resume", folder, "--quiet", timeout=LIMIT_S * 2)
    one_line_error(proc, f"{folder}/session.json: damaged", "put back the file",
                   f"benchharness analyze {folder}")
    (folder / "session.json").write_text("[1, 2]")
    proc = run_main("run", "--resume", folder, "--quiet", timeout=LIMIT_S * 2)
    one_line_error(proc, f"{folder}/session.json: damaged")
    # the measured runs stay readable
    an = analysis_json(folder, tmp_path)
    assert an["counts"]["rows"] == 10
    assert any("session.json is damaged" in n for n in an["notes"])


@pytest.mark.parametrize("text,where,words", [
    ("garbage\n", ":1:", "no column 'run'"),
    ("run,position,block,replicate,warmup,a\n0,0,1,one,false,x\n", ":2:", "'one'"),
    ("run,position,block,replicate,warmup,a\n0,0,1,1,false\n", ":2:", "one value per column"),
    ("run,position,block,replicate,warmup,b\n0,0,1,1,false,x\n", ":1:", "no column 'a'"),
    ("run,position,block,replicate,warmup,a\n0,0,1,1,false,x\n0,1,1,2,false,y\n", ":3:",
     "planned twice"),
])
def test_garbage_plan_csv(folder, text, where, words):
    (folder / "plan.csv").write_text(text)
    before = (folder / "runs.jsonl").read_bytes()
    proc = run_main("run", "--resume", folder, "--quiet", timeout=LIMIT_S * 2)
    one_line_error(proc, f"{folder}/plan.csv{where}", words, "put back the file")
    assert (folder / "runs.jsonl").read_bytes() == before
    proc = run_main("analyze", folder, timeout=LIMIT_S * 2)
    assert proc.returncode == 0, proc.stderr


def test_changed_frozen_experiment(folder):
    frozen = folder / "experiment.yaml"
    frozen.write_text(frozen.read_text().replace("replicates: 5", "replicates: 7"))
    proc = run_main("run", "--resume", folder, "--quiet", timeout=LIMIT_S * 2)
    one_line_error(proc, f"{frozen}: changed since this experiment started", "put back")
    # a level renamed in the frozen copy: the analysis refuses rather than losing those runs
    frozen.write_text(SMALL.replace("[x, y]", "[x, z]"))
    proc = run_main("analyze", folder, timeout=LIMIT_S * 2)
    one_line_error(proc, f"{frozen}: run ", "the level 'y' of 'a'", "does not list",
                   "put that level back")


def test_read_only_folder(folder, tmp_path):
    before = (folder / "runs.jsonl").read_bytes()
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    if os.geteuid() != 0:
        subprocess.run(["chmod", "-R", "a-w", str(folder)], check=True)
        try:
            proc = subprocess.run([sys.executable, "-m", "benchharness", "run", "--resume",
                                   str(folder)], capture_output=True, text=True, env=env,
                                  timeout=LIMIT_S)
        finally:
            subprocess.run(["chmod", "-R", "u+w", str(folder)], check=True)
        one_line_error(proc, f"{folder}: cannot be written", "resume appends runs here")
        return
    # root ignores permission bits: make the folder a read-only mount in a private namespace
    script = (f'mount --bind "{folder}" "{folder}" && mount -o remount,bind,ro "{folder}" '
              f'|| exit 99; exec "{sys.executable}" -m benchharness run --resume "{folder}"')
    try:
        proc = subprocess.run(["unshare", "-m", "sh", "-c", script], capture_output=True,
                              text=True, env=env, timeout=LIMIT_S)
    except FileNotFoundError:
        pytest.skip("unshare is not installed")
    if proc.returncode == 99 or "unshare failed" in proc.stderr:
        pytest.skip("cannot make a read-only mount here: " + proc.stderr.strip()[:200])
    one_line_error(proc, f"{folder}: cannot be written (Read-only file system)",
                   "copy it to a writable place")
    assert (folder / "runs.jsonl").read_bytes() == before


def test_out_at_a_dangling_link(tmp_path):
    exp = write(tmp_path, SMALL)
    link = tmp_path / "link"
    link.symlink_to(tmp_path / "nowhere")
    proc = run_cli("run", exp, "--out", link, "--quiet", timeout=LIMIT_S)
    one_line_error(proc, f"{link}: a symbolic link to {tmp_path / 'nowhere'}, which does not "
                         "exist")
    assert not (tmp_path / "nowhere").exists()


@pytest.mark.parametrize("out", ["/proc/benchharness-results", "/proc/self/results"])
def test_out_under_proc(tmp_path, out):
    exp = write(tmp_path, SMALL)
    proc = run_cli("run", exp, "--out", out, "--quiet", timeout=LIMIT_S)
    one_line_error(proc, f"{out}: cannot create the results folder here",
                   "give --out a path in a writable folder")
