"""Validation of the experiment file: one test per bad-file case, with its line number."""

from __future__ import annotations

import textwrap

import pytest

from benchharness.errors import ExperimentError
from benchharness.experiment.file import Experiment, load_experiment

GOOD = """\
experiment: archive-codecs
about: Which codec?
command: [python3, squeeze.py, --codec, "{codec}", --level, "{level}"]
factors:
  codec: [zlib, bz2]
  level: [1, 6]
replicates: 3
"""


def parse(text):
    return Experiment.from_text(textwrap.dedent(text), path="exp.yaml")


def error_of(text):
    with pytest.raises(ExperimentError) as ei:
        parse(text)
    return ei.value


def test_good_file_loads():
    exp = parse(GOOD)
    assert exp.name == "archive-codecs"
    assert exp.factor_names == ("codec", "level")
    assert exp.levels_of("level") == ("1", "6")
    assert exp.replicates == 3 and exp.warmup == 0 and exp.order == "randomized"
    assert exp.cells == 4
    assert exp.warnings == ()


def test_labels_are_source_text():
    exp = parse("""\
        experiment: x
        command: [echo, "{v}"]
        factors:
          v: [off, 1.10, 1.1, 010, 1, 1.0, yes, ~x]
        """)
    assert exp.levels_of("v") == ("off", "1.10", "1.1", "010", "1", "1.0", "yes", "~x")
    argv, _ = exp.render_command(exp.command, {"v": "1.10"})
    assert argv == ("echo", "1.10")


def test_yaml_syntax_error_has_line():
    e = error_of("experiment: x\ncommand: [echo\nfactors: {a: [1]}\n")
    assert e.path == "exp.yaml" and e.line == 3
    assert "YAML syntax error" in str(e)
    assert str(e).startswith("exp.yaml:3:")


def test_unknown_key_suggests_closest():
    e = error_of(GOOD + "replicate: 4\n")
    assert e.line == 8 and e.col == 1
    assert "unknown key 'replicate'" in str(e) and "did you mean 'replicates'?" in str(e)


def test_wrong_type():
    e = error_of(GOOD.replace("replicates: 3", "replicates: [3]"))
    assert e.line == 7 and "single value" in str(e)
    e = error_of(GOOD.replace("replicates: 3", "replicates: many"))
    assert e.line == 7 and "whole number" in str(e)
    e = error_of(GOOD.replace("factors:\n  codec: [zlib, bz2]\n  level: [1, 6]",
                              "factors: [codec, level]"))
    assert e.line == 4 and "mapping" in str(e)


def test_factor_with_no_levels():
    e = error_of(GOOD.replace("level: [1, 6]", "level: []"))
    assert e.line == 6 and "no levels" in str(e)
    e = error_of(GOOD.replace("level: [1, 6]", "level:"))
    assert e.line == 6 and "no levels" in str(e)


def test_duplicate_level_labels():
    e = error_of(GOOD.replace("level: [1, 6]", "level: [1, 6, 1]"))
    assert e.line == 6 and "twice" in str(e)
    # 1 and 1.0 are different levels, not duplicates
    parse(GOOD.replace("level: [1, 6]", "level: [1, 1.0]"))


def test_placeholder_with_no_factor():
    e = error_of(GOOD.replace('"{level}"', '"{levl}"'))
    assert e.line == 3 and "{levl} names no factor" in str(e) and "'level'" in str(e)


def test_named_value_missing():
    e = error_of("""\
        experiment: x
        command: ["{build.bin}"]
        factors:
          build:
            old: {bin: ./v1}
            new: {path: ./v2}
        """)
    assert e.line == 2 and "no value named 'bin'" in str(e)


def test_unused_factor_is_a_warning():
    exp = parse(GOOD.replace("  level: [1, 6]", "  level: [1, 6]\n  corpus: [a, b]"))
    assert any("corpus" in w for w in exp.warnings)
    # the warning is located like an error: FILE:LINE:COL of the factor's key
    (w,) = [w for w in exp.warnings if "corpus" in w]
    line = GOOD.replace("  level: [1, 6]", "  level: [1, 6]\n  corpus: [a, b]").splitlines().index("  corpus: [a, b]") + 1
    assert f":{line}:3: factor 'corpus'" in w


def test_replicates_below_one():
    e = error_of(GOOD.replace("replicates: 3", "replicates: 0"))
    assert e.line == 7 and "at least 1" in str(e)


def test_bad_duration():
    e = error_of(GOOD + "timeout: soon\n")
    assert e.line == 8 and "not a duration" in str(e)
    assert parse(GOOD + "timeout: 90s\n").timeout_s == 90
    assert parse(GOOD + "timeout: 5m\n").timeout_s == 300
    assert parse(GOOD + "timeout: 250ms\n").timeout_s == 0.25
    # several units, largest first, each once (common practice for durations)
    assert parse(GOOD + "timeout: 1h30m\n").timeout_s == 5400
    assert parse(GOOD + "timeout: 2m 30s\n").timeout_s == 150
    assert parse(GOOD + "timeout: 1m0.5s\n").timeout_s == 60.5
    for bad in ("30m1h", "1m1m", "1h30", "h", "1 h x"):
        e = error_of(GOOD + f"timeout: {bad}\n")
        assert e.line == 8 and "not a duration" in str(e) and "1h30m" in str(e), bad


def test_empty_command():
    e = error_of(GOOD.replace('command: [python3, squeeze.py, --codec, "{codec}", --level, '
                              '"{level}"]', 'command: ""'))
    assert e.line == 3 and "empty" in str(e)
    e = error_of(GOOD.replace('command: [python3, squeeze.py, --codec, "{codec}", --level, '
                              '"{level}"]', 'command: []'))
    assert e.line == 3 and "empty" in str(e)


def test_reserved_factor_name():
    e = error_of(GOOD.replace("  level: [1, 6]", "  status: [1, 6]"))
    assert e.line == 6 and "column of runs.csv" in str(e)


def test_object_tags_rejected():
    e = error_of(GOOD + "about: !!python/object/apply:os.system [touch X]\n")
    assert "not allowed" in str(e)


def test_missing_required_key():
    e = error_of("experiment: x\nfactors: {a: [1]}\n")
    assert "'command'" in str(e)


def test_string_command_split_before_substitution():
    exp = parse("""\
        experiment: x
        command: ./app --name "{n}" --flag
        factors:
          n: ["a b", "$(touch X)"]
        """)
    argv, shell = exp.render_command(exp.command, {"n": "a b"})
    assert shell is None and argv == ("./app", "--name", "a b", "--flag")


def test_shell_true_quotes_values():
    exp = parse("""\
        experiment: x
        shell: true
        command: echo {n} | wc -c
        factors:
          n: ["; touch X", "$(touch X)"]
        """)
    argv, shell = exp.render_command(exp.command, {"n": "; touch X"})
    # the value is assigned, quoted, on a line of its own and referenced in the command
    assert argv is None and shell == "__bhv1='; touch X'\necho \"${__bhv1}\" | wc -c"
    argv, shell = exp.render_command(exp.command, {"n": "plain-1.5"})
    assert shell == "echo plain-1.5 | wc -c"  # nothing special in it: written in place


def test_load_missing_file(tmp_path):
    with pytest.raises(ExperimentError) as ei:
        load_experiment(tmp_path / "nope.yaml")
    assert "no such experiment file" in str(ei.value)


def test_cli_bad_file_exit_2_one_line(tmp_path, cli):
    p = tmp_path / "bad.yaml"
    p.write_text(GOOD + "replicate: 4\n")
    r = cli("plan", p)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and f"{p}:8:1: unknown key 'replicate'" in lines[0]
    assert "Traceback" not in r.stderr


def test_control_character_is_located():
    # a NUL or BEL byte in the file: one located line, not the YAML reader's two lines
    e = error_of("experiment: x\ncommand: [echo, \"a\x07b\"]\nfactors: {a: [1]}\n")
    assert (e.line, e.col) == (2, 19) and "U+0007" in str(e) and "\n" not in str(e)
