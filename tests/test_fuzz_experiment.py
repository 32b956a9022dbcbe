"""Fuzzing the experiment file: mutated files never crash, hang, or pass `plan` only to be
refused by `run`.

A corpus of valid experiment files (covering the core keys and most sections)
is mutated at random with a fixed seed: scalars replaced by hostile values,
lines deleted, repeated, swapped or re-indented, hostile lines inserted
(aliases, tags, huge counts, NUL, catastrophic regular expressions), characters
flipped, files cut short. Each mutant goes through `benchharness plan` in a
subprocess with a time limit; a mutant `plan` accepts (with at most
`RUN_CAP` planned runs) then goes through `benchharness run`. The properties:

* no traceback and no exit code 70 (an internal error), for `plan` and `run`;
* no hang: every command ends within its time limit;
* a refusal is exit 2 with one line on stderr naming the file;
* nothing `plan` accepts is refused by `run` (exit 2 at the start of run).

The commands of the corpus are harmless (`printf`, `true`), so a mutant that runs
can do no damage. The default run checks a fixed-seed sample of 24 mutants; the
slow set checks 320 (`python -m pytest -m slow tests/test_fuzz_experiment.py`).
"""

from __future__ import annotations

import random
import re

import pytest

from conftest import run_cli, run_main

PLAN_LIMIT_S = 30   # a hostile file is answered in well under a second; this is for load
RUN_LIMIT_S = 90
RUN_CAP = 24        # mutants planning more runs are checked by plan only

SEEDS = [
    """\
experiment: codecs
about: which codec is fastest?
command: [printf, "%s-%s", "{codec}", "{level}"]
factors:
  codec: [zlib, lzma]
  level: [1, 9]
replicates: 2
order: randomized
seed: 7
timeout: 30s
""",
    """\
experiment: named-values
command: ["{build.bin}", "{n}"]
factors:
  build:
    old: {bin: printf}
    new: {bin: printf}
  n: ["1", "2"]
replicates: 2
warmup: 1
order: blocked
env: {GREETING: "hi {n}", OMP_NUM_THREADS: "1"}
workdir: .
""",
    """\
experiment: steps
command: printf '%s' {mode}
factors: {mode: [fast, safe]}
build: [true, "{mode}"]
reset: true
teardown: [true]
replicates: 3
order: listed
max_runs: 100
""",
    """\
experiment: shelled
shell: true
command: printf '[%s]' "{v}" && printf done
factors:
  v: [a, "b c", "$(echo hi)"]
replicates: 1
""",
    """\
experiment: checked
command: [printf, "result {x}\\nrate 12.5\\n"]
factors: {x: [p, q]}
replicates: 2
expect:
  exit: [0]
  stdout: '^result [pq]$'
metrics:
  rate: {pattern: 'rate ([0-9.]+)', better: higher, unit: ops}
compare:
  - {x: [q, p]}
""",
    """\
experiment: controlled
command: [printf, "{t}"]
factors: {t: ["0", "1"]}
replicates: 2
pin: "0"
nice: 5
pad_env: true
clean_env: false
aslr: on
host_check: off
""",
    """\
experiment: fraction
command: [printf, "{A}{B}{C}{D}"]
factors:
  A: [lo, hi]
  B: [lo, hi]
  C: [lo, hi]
  D: [lo, hi]
design: {type: fractional, generators: ["D = ABC"]}
replicates: 1
""",
    """\
experiment: adaptive
command: [printf, "{k}"]
factors: {k: [a, b]}
replicates: {until: {ratio_halfwidth: 50%}, min: 2, max: 3}
""",
]

VALUES = [
    "", "0", "-1", "1000000000", "99999999999999999999", "1e309", "nan", ".inf", "null", "~",
    "true", "no", "{x}", "{a.b}", "{{", "}", "[", "'", '"\\0"', '"a\\x00b"', "0-99999999",
    "5-2", "x" * 3000, "ü", "🙂", "*anchor", "&a", "!!binary aGVsbG8=", "!!python/object:os.system",
    "2020-01-01", "0x1F", "1_000", "90s", "1h30m", "600h", "-5s", "5%", "150%", "a=b", "--flag",
    "$(echo hi)", "|", ">", "%", "@", "`", "{a: 1}", "[1, 2]", "[]", "{}", "'(a+)+$'", "-",
    "? x", "*", "&", "!", "#", "\\t", "'{codec}'", "fractional", "full", "blocked", "listed",
]

LINES = [
    "pin: &loop [x, *loop]", "x: &a [1, 1, 1]\ny: [*a, *a, *a]", "replicates: 1000000000",
    "<<: {a: 1}", "about: !!python/object/apply:os.system [true]", "factors: {}",
    'env: {A: "\\0"}', "timeout: 9999999h", "expect: {stdout: '(a+)+$'}", "\tbad: tab",
    "design: {resolution: 3}", "design: {cells: 3}", "compare: [{nope: [a, b]}]",
    "workdir: /nonexistent/dir", "order: sideways", "seed: -3", "warmup: 100000",
    "pin: \"{codec}\"", "nice: 40", "metrics: {m: {pattern: '(', better: up}}",
    "samples: {}", "perf: [cycles]", "---", "...", "%YAML 1.1", "max_runs: 0",
    "choose: {prefer: {x: p}}", "gate: {factor: x, baseline: p}", "roles: {x: setting}",
    "- dangling", "replicates: {min: 5, max: 2, until: {ratio_halfwidth: 2%}}",
    "command: []", "command: ''", "shell: maybe", "host_check: strict",
]

FLIPS = "{}[]:,&*!|>'\"-#%@\t\n \\?"


def mutate(text: str, rng: random.Random) -> str:
    """One to three random edits of an experiment file's text."""
    for _ in range(rng.choice((1, 1, 1, 2, 3))):
        lines = text.split("\n")
        op = rng.randrange(8)
        i = rng.randrange(len(lines))
        if op == 0:  # replace a value after a colon or a list item
            line = lines[i]
            cut = max(line.find(": "), line.find("- "))
            if cut >= 0:
                lines[i] = line[:cut + 2] + rng.choice(VALUES)
            else:
                lines[i] = line + " " + rng.choice(VALUES)
        elif op == 1 and len(lines) > 1:
            del lines[i]
        elif op == 2:
            lines.insert(i, lines[i])
        elif op == 3:
            j = rng.randrange(len(lines))
            lines[i], lines[j] = lines[j], lines[i]
        elif op == 4:
            lines.insert(i, rng.choice(LINES))
        elif op == 5:
            k = rng.choice([-2, -1, 1, 2])
            lines[i] = (" " * k + lines[i]) if k > 0 else lines[i][-k:]
        elif op == 6:
            t = "\n".join(lines)
            if t:
                p = rng.randrange(len(t))
                t = t[:p] + rng.choice(FLIPS) + t[p + 1:]
            lines = t.split("\n")
        else:
            t = "\n".join(lines)
            lines = t[:rng.randrange(len(t) + 1)].split("\n")
        text = "\n".join(lines)
    return text


def mutants(n: int, seed: int):
    rng = random.Random(seed)
    for k in range(n):
        yield k, mutate(SEEDS[k % len(SEEDS)], rng)


def planned_runs(text: str) -> int:
    """Timed and warm-up runs `plan` shows (adaptive replication: at its maximum)."""
    timed = int(re.search(r"^timed runs\s+(\d+)", text, re.M).group(1))
    warm = int(re.search(r"^warm-up\s+(\d+)", text, re.M).group(1))
    cells = int(re.search(r"^cells\s+(\d+)", text, re.M).group(1))
    adaptive = re.search(r"adaptive: \d+ to (\d+)", text)
    if adaptive:
        timed = max(timed, cells * int(adaptive.group(1)))
    return timed + warm


def check_mutant(k: int, text: str, tmp_path) -> str:
    """Run one mutant through plan (and run); returns what happened, asserts the properties."""
    d = tmp_path / f"m{k}"
    d.mkdir()
    f = d / "exp.yaml"
    f.write_text(text, encoding="utf-8")
    where = f"mutant {k}:\n{text[:2000]}"
    plan = run_cli("plan", f, cwd=d, timeout=PLAN_LIMIT_S)
    assert "Traceback" not in plan.stderr, where + "\n" + plan.stderr
    assert plan.returncode in (0, 2), (where, plan.returncode, plan.stderr)
    if plan.returncode == 2:
        lines = [ln for ln in plan.stderr.strip().splitlines() if not ln.startswith("warning:")]
        assert len(lines) == 1, (where, plan.stderr)
        # located errors start "benchharness: FILE:LINE:COL:", others name the command
        assert lines[0].startswith(("benchharness: ", "benchharness plan: ")), \
            (where, plan.stderr)
        return "refused"
    runs = planned_runs(plan.stdout)
    if runs > RUN_CAP:
        return "accepted (not run: many runs)"
    out = d / "out"
    run = run_cli("run", f, "--out", out, "--quiet", "--no-analysis", cwd=d,
                  timeout=RUN_LIMIT_S)
    assert "Traceback" not in run.stderr, where + "\n" + run.stderr
    assert run.returncode != 70, (where, run.stderr)
    if run.returncode == 2 and "(host_check: strict)" in run.stderr:
        return "accepted; run refused this busy machine (host_check: strict)"  # by design
    assert run.returncode != 2, f"{where}\nplan accepted this file but run refused it:\n" \
                                f"{run.stderr}"
    return "accepted and run"


def test_corpus_is_valid(tmp_path):
    # the seeds themselves must pass plan, or the mutants test little (valid files: read
    # in this process; the mutants get a new process with a time limit)
    for k, text in enumerate(SEEDS):
        f = tmp_path / f"seed{k}.yaml"
        f.write_text(text)
        proc = run_main("plan", f, cwd=tmp_path)
        assert proc.returncode == 0, (text, proc.stderr)
        assert planned_runs(proc.stdout) > 0, (text, proc.stdout)


@pytest.mark.parametrize("k,text", list(mutants(24, seed=20261205)),
                         ids=[f"m{k}" for k in range(24)])
def test_mutant_sample(k, text, tmp_path):
    check_mutant(k, text, tmp_path)


@pytest.mark.slow
def test_mutants_many(tmp_path):
    outcomes: dict[str, int] = {}
    for k, text in mutants(320, seed=7):
        what = check_mutant(k, text, tmp_path)
        outcomes[what] = outcomes.get(what, 0) + 1
    # the corpus must exercise both sides: refusals and accepted files that run
    assert outcomes.get("refused", 0) >= 50, outcomes
    assert outcomes.get("accepted and run", 0) >= 30, outcomes
