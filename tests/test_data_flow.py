"""Data flows once: a results folder is read once per command, the analysis is made
once, and the reports render it (no second model in the report).

The commands run in this process (`benchharness.cli.main`), with the folder
reader, the analysis and the least-squares fit wrapped to count their calls.
Planted truth: runs of `sleep` that take about 1 ms at ``wait=short`` and 150 ms
at ``wait=long`` (far beyond what a busy machine adds); every report must say that
``wait`` matters.
"""

from __future__ import annotations

import json
import textwrap

import pytest

EXPERIMENT = """\
    experiment: flow
    about: Does the wait matter?
    command: [sleep, "{wait.s}"]
    factors:
      wait: {short: {s: "0.001"}, long: {s: "0.15"}}
      tag: [a, b]
    replicates: 3
    warmup: 1
    seed: 5
    """


class Counter:
    """Wraps ``name`` in each of ``modules`` and counts the calls of all of them."""

    def __init__(self, monkeypatch, name, *modules):
        self.calls = 0
        for module in modules:
            monkeypatch.setattr(module, name, self._wrap(getattr(module, name)))

    def _wrap(self, inner):
        def wrapped(*args, **kwargs):
            self.calls += 1
            return inner(*args, **kwargs)

        return wrapped


def counters(monkeypatch):
    from benchharness.analysis import art, model, steps
    from benchharness.results import journal, source

    # art binds fit_model when imported: its name is wrapped too
    return {"read": Counter(monkeypatch, "load_results", journal),
            "read_csv": Counter(monkeypatch, "load_table", source),
            "analyse": Counter(monkeypatch, "run_analysis", steps),
            "fit": Counter(monkeypatch, "fit_model", model, art)}


@pytest.fixture(scope="module")
def ran(tmp_path_factory):
    """A real `run` (analysis and reports included), in this process."""
    from benchharness.cli import main

    tmp = tmp_path_factory.mktemp("flow")
    exp = tmp / "flow.yaml"
    exp.write_text(textwrap.dedent(EXPERIMENT))
    mp = pytest.MonkeyPatch()
    try:
        c = counters(mp)
        code = main(["run", str(exp), "--out", str(tmp / "res")])
    finally:
        mp.undo()
    return tmp / "res", code, {k: v.calls for k, v in c.items()}


def baseline_fits(folder) -> int:
    """Fits made by one analysis of the folder (the analysis' own work)."""
    from benchharness.analysis import analyze

    mp = pytest.MonkeyPatch()
    try:
        c = counters(mp)
        analyze(folder)
    finally:
        mp.undo()
    assert c["analyse"].calls == 1
    return c["fit"].calls


def test_run_reads_the_folder_once_and_analyses_once(ran):
    folder, code, calls = ran
    assert code == 0
    assert (folder / "report.html").exists() and (folder / "analysis.json").exists()
    assert calls["read"] == 1          # the run command's own read, shared by every step
    assert calls["analyse"] == 1
    assert calls["fit"] == baseline_fits(folder)   # no fit beyond the analysis' own
    # what the reports say: the planted wait effect
    md = (folder / "report.md").read_text()
    assert "wait" in md
    stored = json.loads((folder / "analysis.json").read_text())
    # wait matters: as a main effect, or (when a chance wait:tag interaction is
    # flagged on a busy machine, where 1 ms runs are noisy) through the
    # interaction's per-level findings, which then stand for it
    about_wait = [f for f in stored["findings"]
                  if f["kind"] in ("main", "interaction", "simple effect")
                  and "wait" in f["factors"] and f["significant"] is True]
    assert about_wait, stored["findings"]


def test_report_of_a_folder_reads_once_and_fits_no_more_than_one_analysis(ran, monkeypatch,
                                                                         capsys):
    from benchharness.cli import main

    folder = ran[0]
    fits = baseline_fits(folder)
    c = counters(monkeypatch)
    assert main(["report", str(folder)]) == 0
    assert c["read"].calls == 1
    assert c["analyse"].calls == 1     # residuals of the stored analysis.json's model
    assert 0 < c["fit"].calls <= fits
    assert "wait" in capsys.readouterr().out


def test_report_renders_the_stored_tables_with_the_analysis_residuals(ran):
    # source: the residuals of one analysis of the same folder (statsmodels checks of
    # those residuals are in test_report.py)
    import numpy as np

    from benchharness.analysis import analyze
    from benchharness.report.data import collect

    folder = ran[0]
    d = collect(folder)
    assert d.analysis == json.loads((folder / "analysis.json").read_text())
    an = analyze(folder)
    np.testing.assert_allclose(d.residuals["residual"].to_numpy(), an.residuals, atol=1e-12)
    np.testing.assert_allclose(d.residuals["fitted"].to_numpy(), an.fitted, atol=1e-12)
    # each residual sits beside its own run's levels (warm-up rows are in the table read)
    assert (d.runs["status"] == "warmup").sum() == 4
    by_run = d.runs.drop_duplicates("run").set_index("run")
    assert list(d.residuals["wait"]) == [by_run.loc[r, "wait"] for r in d.residuals["run"]]
    lam, ll = an.profile_curve()
    np.testing.assert_allclose(d.profile["loglik"].to_numpy(), ll, equal_nan=True)


def test_report_of_a_csv_reads_it_once_and_analyses_once(ran, tmp_path, monkeypatch, capsys):
    from benchharness.cli import main

    csv = tmp_path / "runs.csv"
    csv.write_bytes((ran[0] / "runs.csv").read_bytes())
    c = counters(monkeypatch)
    assert main(["report", str(csv), "--factors", "wait,tag"]) == 0
    assert c["read_csv"].calls == 1 and c["read"].calls == 0
    assert c["analyse"].calls == 1
    assert "wait" in capsys.readouterr().out


def test_analyze_of_a_folder_reads_it_once(ran, monkeypatch, capsys):
    from benchharness.cli import main

    c = counters(monkeypatch)
    assert main(["analyze", str(ran[0]), "--plain"]) == 0
    assert c["read"].calls == 1 and c["analyse"].calls == 1
    assert "wait" in capsys.readouterr().out


def test_the_report_has_no_model_of_its_own():
    import importlib

    with pytest.raises(ImportError):
        importlib.import_module("benchharness.report.model")


def test_a_stale_analysis_json_keeps_its_tables_and_says_why_residual_figures_are_missing(
        ran, tmp_path):
    import shutil

    from benchharness.report.data import collect

    folder = tmp_path / "stale"
    shutil.copytree(ran[0], folder)
    stored = json.loads((folder / "analysis.json").read_text())
    stored["model"]["terms"] = ["wait", "tag"]      # a model these runs were not fitted with
    (folder / "analysis.json").write_text(json.dumps(stored))
    d = collect(folder)
    assert d.analysis["model"]["terms"] == ["wait", "tag"]
    assert d.residuals is None
    assert any("residual figures are left out" in n for n in d.extra_notes)


def test_a_run_with_a_choose_section_still_reads_the_folder_once(tmp_path, monkeypatch):
    # the report's "Choosing a default" section is chosen from the folder already read
    from benchharness.cli import main

    exp = tmp_path / "flow.yaml"
    exp.write_text(textwrap.dedent(EXPERIMENT) + "choose: {}\n")
    c = counters(monkeypatch)
    assert main(["run", str(exp), "--out", str(tmp_path / "res")]) == 0
    assert c["read"].calls == 1        # (choose takes the table from the folder read)
    assert c["analyse"].calls == 1
    html = (tmp_path / "res" / "report.html").read_text()
    assert 'id="choose"' in html and "wait=short" in html   # the planted faster level
