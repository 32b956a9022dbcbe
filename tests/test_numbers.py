"""The one formatter of numbers leaving the tool (`benchharness.numbers`), and output
that scripts read: no hard wrapping, no trailing spaces, no ANSI codes when piped."""

from __future__ import annotations

import re

import pytest

from benchharness.numbers import (
    fmt_change, fmt_interval, fmt_num, fmt_p, fmt_pct, fmt_quantity, fmt_ratio,
    fmt_ratio_interval, fmt_seconds, pick_scale, plural, plural_word,
)

ANSI = re.compile(r"\x1b\[")


def test_ratios_use_the_multiplication_sign_with_three_significant_figures():
    assert fmt_ratio(1.234) == "1.23×"
    assert fmt_ratio(0.9123) == "0.912×"
    assert fmt_ratio(12.34) == "12.3×"
    assert fmt_ratio(153.2) == "153×"
    assert fmt_ratio(1) == "1.00×"
    for missing in (None, float("nan"), float("inf"), "text"):
        assert fmt_ratio(missing) == "–"
    assert "x" not in fmt_ratio(2.5)


def test_ratio_intervals_read_low_to_high_with_shared_decimals():
    assert fmt_ratio_interval(1.0912, 1.2934) == "1.09× to 1.29×"
    # both ends keep the decimals of the smaller one, so 1.01 is not shortened to 1.01/1.0
    assert fmt_ratio_interval(0.9981, 1.0104) == "0.998× to 1.010×"
    # ends more than ten times apart: each with three significant figures, not the small
    # end's decimals on the large one (a Tukey interval once read "4.91× to 107.30×" and a
    # history interval "0.0181 ms to 1,131.0171 ms": digits nothing measured)
    assert fmt_ratio_interval(0.5, 12.5) == "0.500× to 12.5×"
    assert fmt_ratio_interval(4.912, 107.3) == "4.91× to 107×"
    assert fmt_ratio_interval(0.2991, 3.348) == "0.299× to 3.35×"
    assert fmt_ratio_interval(1.97, 10.39) == "1.97× to 10.39×"      # within ten: shared
    assert pick_scale("s", [4.53e-3]).interval(1.81e-5, 1.1310171) == "0.0181 ms to 1,131 ms"
    assert fmt_interval(-0.0123, 0.151) == "-0.0123 to 0.151"
    assert fmt_ratio_interval(None, 1.2) == "no interval"


def test_other_intervals_have_the_same_notation_with_their_unit():
    assert fmt_interval(12.13, 14.31, "ms") == "12.1 ms to 14.3 ms"
    assert fmt_interval(-0.3214, 0.1512) == "-0.151 to 0.151".replace("-0.151", "-0.321")
    assert pick_scale("s", [0.0121, 0.0143]).interval(0.0121, 0.0143) == "12.1 ms to 14.3 ms"


def test_one_unit_per_column_chosen_from_its_values():
    # a column of seconds from 80 µs to 1.5 s: one unit (ms) for every row, never µs
    # above ms above s
    col = [8e-5, 0.012, 0.35, 1.5]
    sc = pick_scale("s", col)
    shown = [sc.fmt(v) for v in col]
    assert {s.rsplit(" ", 1)[1] for s in shown} == {"ms"}, shown
    assert shown == ["0.0800 ms", "12.0 ms", "350 ms", "1,500 ms"]
    # small and large columns take the unit that suits them
    assert pick_scale("s", [2e-6, 5e-6]).unit == "µs"
    assert pick_scale("s", [3.0, 40.0]).unit == "s"
    assert pick_scale("s", [5e-9, 9e-9]).unit == "ns"
    # a column named in ms keeps the same rule (values converted to seconds first)
    assert pick_scale("ms", [250.0, 900.0]) == (1e-3, "s")
    # memory in KiB: 45,000 KiB is about 43.9 MiB (1 MiB = 1024 KiB, common practice)
    assert pick_scale("KiB", [45_000, 60_000]).fmt(45_000) == "43.9 MiB"
    # a unit we do not scale is still printed; none at all prints none
    assert pick_scale("ops", [1, 2]).fmt(1500) == "1,500 ops"
    assert pick_scale("", [1, 2]).fmt(0.25) == "0.250"
    # missing values in a column are skipped when choosing and shown as a dash
    assert pick_scale("s", [None, float("nan"), 0.02]).fmt(None) == "–"


def test_single_quantities_always_carry_their_unit():
    assert fmt_seconds(0.0125) == "12.5 ms"
    assert fmt_seconds(1.2) == "1.20 s"
    assert fmt_seconds(4e-5) == "40.0 µs"
    assert fmt_quantity(2048, "KiB") == "2.00 MiB"
    assert fmt_quantity(3, "us") == "3.00 µs"


def test_numbers_changes_shares_and_p_values():
    assert fmt_num(1234.5) == "1,234"      # Python rounds half to even: 1234.5 -> 1234
    assert fmt_num(0.012345) == "0.0123"
    assert fmt_num(0.99996) == "1.00" and fmt_num(9.9996) == "10.0"   # rounding up a decade
    assert fmt_num(2.5e-6) == "2.50e-06"
    assert fmt_change(1.034) == "+3.4%" and fmt_change(0.88) == "-12.0%"
    assert fmt_pct(0.05) == "5.0%"
    assert fmt_p(0.0004) == "< 0.001" and fmt_p(0.0123) == "0.012"


@pytest.mark.parametrize("n, noun, text", [
    (1, "run", "1 run"), (0, "run", "0 runs"), (2, "warm-up run", "2 warm-up runs"),
    (1, "warm-up run", "1 warm-up run"), (3, "workload", "3 workloads"),
    (2, "match", "2 matches"), (2, "repository", "2 repositories"), (2, "day", "2 days"),
    (4, "cell series", "4 cell series"), (1, "cell series", "1 cell series"),
])
def test_plural_helper(n, noun, text):
    assert plural(n, noun) == text


def test_plural_word_irregular():
    assert plural_word("series") == "series"
    assert plural(2, "child", "children") == "2 children"


def _gate_outcome(verdict_of_each, ratio=1.3):
    """A gate outcome built from plain judgements (no runs): enough for the renderers."""
    from benchharness.gate.decide import GateSettings, Judgement
    from benchharness.gate.orchestrate import GateOutcome

    judgements = {}
    for i, v in enumerate(verdict_of_each):
        judgements[f"w{i}"] = Judgement(
            verdict=v, reason="planted", blocks=12, usable_blocks=12, ratio=ratio,
            lower=ratio * 0.9, upper=ratio * 1.1, horizon_blocks=40, alpha=0.05,
            sd_log=0.05)
    return GateOutcome(settings=GateSettings(), response="wall_s", judgements=judgements,
                       workload_levels={k: {} for k in judgements}, runs=48, warmups=1)


@pytest.mark.parametrize("verdicts, word", [
    (["regression", "no_regression"], "worse"), (["no_regression"], "not worse"),
    (["improvement", "improvement"], "better"), (["inconclusive"], "undecided"),
    (["never_ok"], "broken"),
])
def test_gate_verdict_words_are_the_same_in_its_four_outputs(verdicts, word):
    import xml.etree.ElementTree as ET

    from benchharness.gate import output

    out = _gate_outcome(verdicts)
    term = output.terminal_lines(out)
    md = output.markdown_summary(out)
    js = output.to_json_dict(out)
    xml = ET.fromstring(output.junit_xml(out).split("\n", 1)[1])
    assert js["verdict"] == word
    assert any(line.startswith(f"verdict: {word}: ") for line in term), term
    assert f"### Performance gate: {word}" in md
    for i, v in enumerate(verdicts):
        each = output.WORDS[v]
        assert js["workloads"][i]["verdict"] == each
        row = next(line for line in term if line.strip().startswith(f"w{i} "))
        assert row.split()[1:1 + len(each.split())] == each.split()
        assert f"| w{i} | {each} |" in md
        case = xml.findall(".//testcase")[i]
        assert case.find("system-out").text.startswith(f"verdict {each};")
        for tag in ("failure", "skipped", "error"):
            el = case.find(tag)
            if el is not None:
                assert el.get("message").startswith(f"{each}: ")
    # no word of the earlier vocabularies survives in any of the four
    everything = "\n".join(term) + md + str(js) + output.junit_xml(out)
    for old in ("SLOWER", "FASTER", "UNDECIDED", "NEVER-OK", "FAIL", "PASS", "BROKEN",
                "inconclusive:", "'regression'", "no_regression"):
        assert old not in everything, old
    # ratios with the multiplication sign, one interval notation
    assert "1.30×" in "\n".join(term) and "1.17× to 1.43×" in md


def test_piped_output_is_not_wrapped_and_has_no_trailing_spaces_or_colour(cli, tmp_path):
    """`report` through a pipe: no line broken to fit a width, no padding at the end of a
    line, no ANSI escape; a long factor level (a 200-character path) stays on its line."""
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(4)
    long = "/srv/data/" + "deeply-nested-folder/" * 9 + "input.bin"
    levels = ["small", long]
    rows = [{"input": lv, "mode": m, "wall_s": 0.02 * (1.5 if lv == long else 1.0)
             * (1.2 if m == "b" else 1.0) * float(np.exp(rng.normal(0, 0.05))),
             "status": "ok"}
            for lv in levels for m in ("a", "b") for _ in range(4)]
    csv = tmp_path / "runs.csv"
    pd.DataFrame(rows).to_csv(csv, index=False)
    r = cli("analyze", csv, "--factors", "input,mode", env={"COLUMNS": "60", "NO_COLOR": "", "FORCE_COLOR": "1"})
    assert r.returncode == 0, r.stdout + r.stderr
    assert not ANSI.search(r.stdout)
    lines = r.stdout.splitlines()
    assert lines and all(line == line.rstrip() for line in lines)
    # the long level is printed whole on the lines that name it (not folded at 60 or 110)
    assert any(long in line for line in lines), r.stdout
    assert not any(line.strip() and long.startswith(line.strip()) and line.strip() != long
                   for line in lines)
    # prose is one line per sentence group, longer than any terminal width
    assert max(len(line) for line in lines) > 110


#: a metric whose name ends in _per_s but which declares its own unit: its values must be
#: printed as declared (`rows/s`), never as "per s" (the numerator lost) nor bare. Planted:
#: level `on` gives about 3,000 rows/s, `off` about 1,000 (a little spread from the pid).
METRIC_EXPERIMENT = """\
experiment: unit-fixture
command: [/bin/sh, -c, "echo rows $(( {cache.r} + $$ % 7 ))"]
factors:
  cache: {off: {r: "1000"}, on: {r: "3000"}}
metrics:
  rows_per_s: {pattern: 'rows ([0-9]+)', unit: rows/s, better: higher}
replicates: 3
seed: 4
timeout: 10s
"""


def test_a_metrics_declared_unit_is_printed_as_declared(tmp_path, capsys, monkeypatch):
    from benchharness.cli import main
    from benchharness.report import units

    monkeypatch.setattr(units, "DECLARED_UNITS", {})   # nothing left from other tests
    (tmp_path / "exp.yaml").write_text(METRIC_EXPERIMENT)
    res = tmp_path / "res"
    assert main(["run", str(tmp_path / "exp.yaml"), "--out", str(res), "--quiet",
                 "--no-analysis"]) == 0
    capsys.readouterr()
    # resuming a folder whose runs are all recorded says so (it said "running 0 runs")
    assert main(["run", "--resume", str(res), "--no-analysis"]) == 0
    assert "nothing left to run: every planned run of" in capsys.readouterr().err
    outs = {}
    for name, argv in [("analyze", ["analyze", res]), ("choose", ["choose", res]),
                       ("compare", ["compare", res, res])]:
        monkeypatch.setattr(units, "DECLARED_UNITS", {})   # each command finds it itself
        assert main([*map(str, argv), "--response", "rows_per_s"]) == 0
        outs[name] = capsys.readouterr().out
        assert "per s" not in outs[name], (name, outs[name])
    # the best setting is the planted one, with its value in the declared unit
    assert re.search(r"cache=on \(3,00\d rows/s\)", outs["analyze"]), \
        outs["analyze"]
    assert re.search(r"^cache=on\s+3,00\d rows/s\s+3\s+recommended", outs["choose"], re.M), \
        outs["choose"]
    rows = [ln for ln in outs["compare"].splitlines() if ln.startswith("│ o")]
    assert len(rows) == 2 and all(ln.count(" rows/s") == 2 for ln in rows), rows
    # the history keeps the unit, and shows it once the folder is gone
    db = tmp_path / "h.sqlite"
    assert main(["history", "add", str(res), "--response", "rows_per_s", "--commit", "c1",
                 "--branch", "main", "--history-db", str(db)]) == 0
    import shutil

    shutil.rmtree(res)
    monkeypatch.setattr(units, "DECLARED_UNITS", {})
    capsys.readouterr()
    assert main(["history", "show", "--response", "rows_per_s", "--history-db", str(db)]) == 0
    shown = capsys.readouterr().out
    rows = [ln for ln in shown.splitlines() if ln.startswith("│ 1")]
    assert len(rows) == 2 and all(re.search(r"[13],00\d rows/s .* rows/s to .* rows/s", ln)
                                  for ln in rows), shown


def test_counts_of_failed_runs_and_cells_take_their_noun_in_the_right_number(tmp_path, capsys):
    """One timed-out run in one cell: "1 run did not finish", "1 cell had timeouts" (the
    notes once said "1 run(s)" and "1 cell(s)")."""
    import json

    from benchharness.cli import main

    csv = tmp_path / "t.csv"
    csv.write_text("a,status,wall_s\n" + "".join(f"x,ok,1.0{i}\ny,ok,2.0{i}\n"
                                                 for i in range(4)) + "y,timeout,\n")
    assert main(["analyze", str(csv), "--factors", "a", "--json"]) == 0
    an = json.loads(capsys.readouterr().out)
    assert an["failures"]["verdict"].startswith("1 run did not finish;")
    assert "1 cell had timeouts: their means" in " ".join(an["notes"])
    assert "(s)" not in json.dumps(an)


def test_host_prints_the_three_load_averages_alike(capsys, monkeypatch):
    from benchharness.cli import main
    from benchharness.measure import host

    facts = {"cpu_model": "Example CPU", "physical_cores": 2, "logical_cores": 2,
             "memory_bytes": 2 ** 33, "load_average_start": [1.5, 0.949, 1.216]}
    monkeypatch.setattr(host, "collect_facts", lambda: facts)
    planted = {"severity": "warning", "message": "planted: the kettle is boiling",
               "fix": "wait for it"}
    monkeypatch.setattr(host, "check_host", lambda f: [planted])
    assert main(["host"]) == 0
    out, err = capsys.readouterr()
    assert re.search(r"^load average\s+1\.50, 0\.95, 1\.22$", out, re.M), out
    # a warning is one line on stderr, as `run` writes it
    assert err.splitlines() == ["warning: planted: the kettle is boiling; fix: wait for it"]


def test_lengths_of_time_read_like_every_quantity():
    from benchharness.numbers import fmt_duration

    assert [fmt_duration(x) for x in (0.153, 13.8, 125, 1800, 3900, 7200)] == [
        "0.153 s", "13.8 s", "2 min 5 s", "30 min", "1 h 5 min", "2 h"]
    assert fmt_duration(59.97) == "1 min" and fmt_duration(None) == "–"


def test_plan_time_estimate_and_budget_use_the_formatter(root, capsys, monkeypatch):
    """`plan --pilot --budget` wrote '13.8s', '0ms overhead', '30m00s fits': a quantity is
    a number, a space and its unit (docs/cli.md)."""
    from benchharness.cli import main

    monkeypatch.chdir(root)
    assert main(["plan", "experiments/archive-codecs.yaml", "--pilot",
                 "results/example-archive-codecs", "--budget", "30m"]) == 0
    out = capsys.readouterr().out
    lines = [ln for ln in out.splitlines() if ln.startswith(("expected", "budget"))]
    assert len(lines) == 2 and lines[1].startswith("budget      30 min fits "), lines
    assert not any(re.search(r"\d(ms|s|m\d+s)\b", ln) for ln in lines), lines
