"""Fault injection for execution: hostile level values in shell commands, processes that
are not ours at resume, a full disk, a kill in the first moments of `run`, a killed
launcher and a deleted lock.

Each test plants the fault and asserts what the tool says and does (exit code, message,
which processes live, what the folder holds); none signals a process it did not start.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from benchharness import templating as T
from benchharness.runner import run_experiment

PY = sys.executable

# Values that a shell would run, split, redirect or unquote if they reached it as code.
HOSTILE = ["$(touch F)", "`touch F`", "; touch F", "a | touch F", "a && touch F",
           "a\ntouch F", "> F", "it's", 'say "hi"', "a b", "'; touch F; '", '"; touch F; "',
           "*", "", "-n", "x=1", "back\\", "\\'", "$HOME ${HOME} $$"]

# (template, what printf must print for value V) in the three contexts, and nested ones.
CONTEXTS = [
    ("printf '[%s]' {v}", "[{}]"),                        # bare
    ("printf '[%s]' \"{v}\"", "[{}]"),                    # inside double quotes
    ("printf '[%s]' '{v}'", "[{}]"),                      # inside single quotes
    ("printf '[%s]' \"pre {v} post\"", "[pre {} post]"),
    ("printf '[%s]' 'pre {v} post'", "[pre {} post]"),
    ("printf '[%s]' \"$(printf %s {v})\"", "[{}]"),       # inside $( ) inside "..."
    ("f() {{ printf '[%s]' \"{v}\"; }}; f other", "[{}]"),  # inside a function body
    ("printf '[%s]' \"${{X:-{v}}}\"", "[{}]"),            # inside ${ }
    ("cat <<EOF\n[{v}]\nEOF", "[{}]\n"),                  # here-document
    ("true # {v}\nprintf '[%s]' ok", "[ok]"),             # a comment
]


def _shells():
    out = []
    for sh in ("/bin/sh", "dash", "bash"):
        path = shutil.which(sh)
        if path and os.path.realpath(path) not in [os.path.realpath(p) for p in out]:
            out.append(path)
    return out


@pytest.mark.parametrize("shell", _shells())
@pytest.mark.parametrize("template,expected", CONTEXTS)
def test_shell_values_arrive_exactly_in_every_context(tmp_path, shell, template, expected):
    # Planted truth: printf prints exactly the value it receives; no value may create F.
    for i, value in enumerate(HOSTILE):
        d = tmp_path / str(i)
        d.mkdir()
        cmd = T.render_shell(template, lambda f, n: value)
        r = subprocess.run([shell, "-c", cmd], cwd=d, capture_output=True, text=True,
                           timeout=10)
        assert not (d / "F").exists(), (shell, template, value, cmd)
        assert r.stdout == expected.format(value), (shell, template, value, cmd, r.stderr)


def test_plain_values_are_written_in_place():
    cmd = T.render_shell("./app --n={v} \"{v}\" '{v}'", lambda f, n: "fast-1.5")
    assert cmd == "./app --n=fast-1.5 \"fast-1.5\" 'fast-1.5'"


def _exp(tmp_path, body):
    text = textwrap.dedent(body).replace("PY", PY).replace("TMP", str(tmp_path))
    p = tmp_path / "exp.yaml"
    p.write_text(text)
    return p


@pytest.mark.parametrize("where", ["{v}", "\"{v}\"", "'{v}'"])
def test_shell_experiment_runs_hostile_levels_as_data(tmp_path, where):
    # Each run writes the value it received into a file of its own.
    levels = ["$(touch F)", "`touch F`", "a; touch F", "a | touch F", "a && touch F",
              "a\ntouch F", "> F", "it's", "a b", 'say "hi"']
    p = _exp(tmp_path, """\
        experiment: hostile
        shell: true
        command: printf '%s' WHERE > "$(mktemp got.XXXXXX)"
        workdir: TMP
        host_check: off
        factors:
          v: LEVELS
        """.replace("WHERE", where).replace("LEVELS", json.dumps(levels)))
    from benchharness.experiment import load_experiment

    out = run_experiment(load_experiment(p), out=tmp_path / "res")
    assert not (tmp_path / "F").exists()
    assert out.counts == {"ok": len(levels)}
    got = sorted(f.read_text() for f in tmp_path.glob("got.*"))
    assert got == sorted(levels)


def test_arithmetic_placeholder_takes_whole_numbers_only(tmp_path, cli):
    ok = _exp(tmp_path, """\
        experiment: arith
        shell: true
        command: echo $(( {n} * 2 ))
        factors:
          n: ["4", "-3"]
        """)
    assert cli("plan", ok).returncode == 0
    bad = tmp_path / "bad.yaml"
    bad.write_text(ok.read_text().replace('"-3"', '"a[$(touch F)]"'))
    r = cli("plan", bad, cwd=tmp_path)
    assert r.returncode == 2
    assert "only whole numbers" in r.stderr and "a[$(touch F)]" in r.stderr
    assert "Traceback" not in r.stderr
    assert not (tmp_path / "F").exists()


def test_placeholder_in_a_quoted_here_document_is_refused(tmp_path, cli):
    p = _exp(tmp_path, """\
        experiment: heredoc
        shell: true
        command: |
          cat <<'EOF'
          {v}
          EOF
        factors:
          v: [a, b]
        """)
    r = cli("plan", p)
    assert r.returncode == 2
    assert "quoted delimiter" in r.stderr and "exp.yaml:" in r.stderr
