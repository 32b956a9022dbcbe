"""The experiment file's `response:` is the default of every command that judges a response.

docs/cli.md ("Arguments"): without `--response`, a command uses the experiment file's
`response:` key, else `wall_s`. The planted truth: a workload that reports its own time as
the metric `render_s`, 1.3× (or 1.2×) larger for one setting, while the process around it
(`sh -c echo`) takes the same wall time whatever the setting. Judged on `wall_s`, the
commands would see no difference; judged on `render_s`, the planted ratio.
"""

from __future__ import annotations

import json

import pytest

# the metric's last digit follows the shell's process id: a few per cent of run-to-run
# noise without any randomness of our own
_COMMAND = 'command: [sh, -c, "echo render_s={base}$(( $$ % 7 ))"]'
_METRIC = ("metrics:\n  render_s: {pattern: 'render_s=([0-9.]+)', unit: s, better: lower}\n"
           "response: render_s\n")


def _experiment(path, base: str):
    path.write_text(f"experiment: render\n{_COMMAND.replace('{base}', base)}\n"
                    "factors:\n  filter: [box, tent]\nreplicates: 3\nseed: 4\n" + _METRIC)
    return path


@pytest.fixture(scope="module")
def folders(tmp_path_factory):
    """Two results folders of the same cells: B's render_s 1.3× A's (0.13x s vs 0.10x s)."""
    from conftest import run_main

    tmp = tmp_path_factory.mktemp("resp")
    out = {}
    for name, base in (("a", "0.10"), ("b", "0.13")):
        exp = _experiment(tmp / f"{name}.yaml", base)
        r = run_main("run", exp, "--out", tmp / name, "--no-analysis", cwd=tmp)
        assert r.returncode == 0, r.stderr
        out[name] = tmp / name
    return out


def test_compare_judges_the_files_response(main_cli, folders):
    r = main_cli("compare", folders["a"], folders["b"], "--json")
    assert r.returncode == 0, r.stderr
    data = json.loads(r.stdout)   # one JSON document, nothing else on stdout
    assert data["response"] == "render_s"
    assert "comparing render_s, the response the experiment file names" in r.stderr
    # the planted ratio 1.3 (0.130-0.136 over 0.100-0.106), beyond the 5% tolerance in
    # every cell; on wall_s (the same `sh -c echo` in both) no cell would be
    cells = data["cells"]
    assert len(cells) == 2 and all(c["verdict"] == "higher" for c in cells), cells
    assert all(c["estimate"] == pytest.approx(1.3, rel=0.05) for c in cells)
    # --response still chooses another column
    r = main_cli("compare", folders["a"], folders["b"], "--response", "wall_s", "--json")
    assert json.loads(r.stdout)["response"] == "wall_s"
    # a mistake is still one line on standard error (exit 2), without the note before it
    r = main_cli("compare", folders["a"], folders["a"].parent / "missing")
    assert r.returncode == 2 and len(r.stderr.splitlines()) == 1, r.stderr


def test_size_from_a_pilot_sizes_the_files_response(main_cli, folders):
    r = main_cli("size", "--pilot", folders["a"], "--detect", "5%", "--json")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["noise"].startswith("pilot: sd of ln(render_s)")


def test_gate_section_without_response_gates_the_files_response(main_cli, tmp_path):
    """A 1.2× slower `render_s` in the candidate, the same wall time: the gate says worse
    (exit 1, docs/cli.md "Exit codes") and names render_s; on wall_s it could not."""
    exp = tmp_path / "g.yaml"
    exp.write_text("experiment: render-gate\n"
                   'command: [sh, -c, "echo render_s={build.t}$(( $$ % 7 ))"]\n'
                   "factors:\n  build:\n    main: {t: '0.10'}\n    next: {t: '0.12'}\n"
                   + _METRIC +
                   "gate: {factor: build, baseline: main, tolerance: 5%, max_pairs: 8, "
                   "first_look_pairs: 4}\n")
    r = main_cli("gate", exp, "--out", tmp_path / "res", "--seed", "1", cwd=tmp_path)
    assert r.returncode == 1, r.stdout + r.stderr
    assert "render_s (lower is better)" in r.stdout
    assert "verdict: worse:" in r.stdout


def test_history_records_and_shows_the_files_response_beside_wall_s(main_cli, folders,
                                                                    tmp_path):
    db = tmp_path / "h.sqlite"
    r = main_cli("history", "add", folders["a"], "--commit", "c1", "--history-db", db)
    assert r.returncode == 0 and "4 cell rows added" in r.stdout, r.stdout + r.stderr
    r = main_cli("history", "show", "--history-db", db, "--json")
    cells = json.loads(r.stdout)["cells"]
    assert sorted({c["response"] for c in cells}) == ["render_s", "wall_s"]
    render = [c for c in cells if c["response"] == "render_s"]
    # the planted level: 0.100-0.106 s per run
    assert all(0.099 < c["points"][0]["center"] < 0.107 for c in render), render
