"""Noise controls from the experiment file, end to end through the launcher."""

from __future__ import annotations

import os
import sys
import textwrap

import pytest

from benchharness.errors import ExperimentError
from benchharness.experiment.file import load_experiment
from benchharness.execute.runner import run_experiment

PY = sys.executable


def write(tmp_path, body):
    p = tmp_path / "exp.yaml"
    p.write_text(textwrap.dedent(body).replace("PY", PY).replace("TMP", str(tmp_path)))
    return p


def test_pinned_runs_use_the_requested_cpus(tmp_path):
    p = write(tmp_path, """\
        experiment: pin
        pin: "{cpu}"
        command: [PY, -c, "import os,sys; open(sys.argv[2] + '/cpus-' + sys.argv[1], 'w').write(open('/proc/self/status').read())", "{cpu}", TMP]
        factors:
          cpu: ["0", "1"]
        """)
    if len(os.sched_getaffinity(0)) < 2:
        pytest.skip("needs two CPUs")
    run_experiment(load_experiment(p), out=tmp_path / "res")
    for cpu in ("0", "1"):
        status = (tmp_path / f"cpus-{cpu}").read_text()
        line = [x for x in status.splitlines() if x.startswith("Cpus_allowed_list")][0]
        assert line.split(":")[1].strip() == cpu


def test_cpu_that_does_not_exist_is_a_clear_error(tmp_path, cli):
    p = write(tmp_path, """\
        experiment: pin-bad
        pin: "4096"
        command: [PY, -c, "pass"]
        factors: {a: [x]}
        """)
    with pytest.raises(ExperimentError, match="does not exist"):
        run_experiment(load_experiment(p), out=tmp_path / "res")
    assert not (tmp_path / "res").exists()
    r = cli("run", p, "--out", tmp_path / "res2")
    assert r.returncode == 2 and f"{p}:2:" in r.stderr and "Traceback" not in r.stderr


def test_padded_environment_recorded_and_varies(tmp_path):
    p = write(tmp_path, """\
        experiment: pad
        pad_env: true
        command: [PY, -c, "import os; print('pad', len(os.environ.get('BENCHHARNESS_PAD', '')))"]
        factors: {a: [x, y]}
        replicates: 6
        seed: 1
        metrics:
          seen_bytes: {pattern: 'pad ([0-9]+)', unit: bytes, better: lower}
        """)
    df = run_experiment(load_experiment(p), out=tmp_path / "res").runs
    assert "pad_env_bytes" in df.columns
    sizes = df["pad_env_bytes"].astype(int)
    assert sizes.between(0, 4096).all() and sizes.nunique() > 3
    # the recorded length is the one the child saw
    assert (df["seen_bytes"].astype(int) == sizes).all()


def test_clean_env_is_minimal(tmp_path):
    p = write(tmp_path, """\
        experiment: clean
        clean_env: true
        env: {KEEP_ME: "{a}"}
        command: [PY, -c, "import os,sys; open(sys.argv[1], 'w').write(' '.join(sorted(os.environ)))", TMP/env.txt]
        factors: {a: [x]}
        """)
    os.environ["BH_SHOULD_NOT_LEAK"] = "1"
    try:
        run_experiment(load_experiment(p), out=tmp_path / "res")
    finally:
        del os.environ["BH_SHOULD_NOT_LEAK"]
    names = (tmp_path / "env.txt").read_text().split()
    assert "KEEP_ME" in names and "PATH" in names and "BH_SHOULD_NOT_LEAK" not in names


def test_aslr_off_is_recorded(tmp_path):
    p = write(tmp_path, """\
        experiment: aslr
        aslr: off
        command: [PY, -c, "print('persona', int(open('/proc/self/personality').read(), 16))"]
        factors: {a: [x]}
        metrics:
          persona: {pattern: 'persona ([0-9]+)', unit: flags, better: lower}
        """)
    df = run_experiment(load_experiment(p), out=tmp_path / "res").runs
    if df["status"].iloc[0] != "ok":
        # the kernel refused personality(ADDR_NO_RANDOMIZE): the run says so
        assert "personality" in df["message"].iloc[0] or "ASLR" in df["message"].iloc[0]
        pytest.skip(f"kernel refuses ADDR_NO_RANDOMIZE: {df['message'].iloc[0]}")
    assert df["aslr"].iloc[0] == "off"
    # ADDR_NO_RANDOMIZE = 0x0040000 (linux/personality.h), set in the child's personality
    assert int(df["persona"].iloc[0]) & 0x0040000
