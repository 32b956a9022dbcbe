"""Zero variance is a finding of its own, never an F test on round-off (invented data)."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze
from analysis_refs import ours_table, sm_anova
from conftest import run_main


def layout(reps=3):
    rows = [(a, b) for a in "xyz" for b in "pq" for _ in range(reps)]
    return pd.DataFrame(rows, columns=["A", "B"])


def no_tests(an):
    return all(r["F"] is None and r["p"] is None for r in an.anova_rows)


def test_constant_response_with_round_off_is_one_finding_and_no_test(tmp_path):
    d = layout()
    # the same value reached two ways: 0.1 + 0.2 and 0.3 differ in the last bit, which
    # used to give A a "significant" F test of round-off against a zero residual
    d["wall_s"] = np.where(d["A"] == "x", 0.1 + 0.2, 0.3)
    an = analyze(d, factors=["A", "B"])
    assert no_tests(an)
    assert all(r["sum_sq"] == 0.0 for r in an.anova_rows)
    assert [f["check"] for f in an.findings] == ["no_variation"]
    assert an.findings[0]["statement"].startswith("Every run gave the same wall_s (0.3)")
    assert an.best is None
    csv = tmp_path / "runs.csv"
    d.to_csv(csv, index=False)
    out = tmp_path / "a.json"
    res = run_main("analyze", csv, "--factors", "A,B", "--json-out", out)
    assert res.returncode == 0, res.stderr
    assert "Every run gave the same wall_s" in res.stdout
    assert "checks could not be made" in res.stdout
    assert "raise no concern" not in res.stdout
    js = json.loads(out.read_text())
    assert all(r["p"] is None for r in js["anova"])
    assert js["model"]["no_variation"]["kind"] == "constant"


def test_constant_within_cells_shows_sums_of_squares_without_tests():
    # source for the sums of squares: statsmodels ols + anova_lm(typ=2) on log(y)
    d = layout()
    d["wall_s"] = (np.where(d["A"] == "x", 0.3, np.where(d["A"] == "y", 0.5, 0.4))
                   * np.where(d["B"] == "p", 1.0, 1.7))
    an = analyze(d, factors=["A", "B"], transform="log")
    assert no_tests(an)
    said = [f for f in an.findings if f.get("check") == "no_variation"]
    assert len(said) == 1 and said[0]["statement"].startswith(
        "Every run in a cell gave the same wall_s")
    assert not any(f.get("significant") for f in an.findings)
    ref, _ = sm_anova(d, "wall_s", ["A", "B"], typ=2, transform=np.log)
    t = ours_table(an)
    for term in ("A", "B"):
        assert t[term]["sum_sq"] == pytest.approx(ref[term]["sum_sq"], rel=1e-9)
    # multiplicative effects do not interact on the log scale: exactly no A:B
    assert t["A:B"]["sum_sq"] == 0.0 and t["Residual"]["sum_sq"] == 0.0


def test_tiny_but_real_noise_is_still_tested():
    # control: a spread of one part in 10^9 is measurement, not round-off
    rng = np.random.default_rng(5)
    d = layout(reps=4)
    d["wall_s"] = 1.0 + 5e-9 * (d["A"] == "z") + 1e-9 * rng.standard_normal(len(d))
    an = analyze(d, factors=["A", "B"], transform="none")
    t = ours_table(an)
    assert an.model["no_variation"] is None
    assert t["A"]["p"] is not None and t["A"]["p"] < 1e-3
    assert t["B"]["p"] > 0.01


def test_cells_exactly_equal_without_error_are_tied_not_ranked(tmp_path):
    # planted: A=p is twice as fast as A=q; B does nothing; every run in a cell is equal,
    # so there is no error estimate and B=u and B=v are exactly tied within A=p
    d = layout()
    d = d.assign(A=np.where(d["A"] == "x", "p", "q"), B=np.where(d["B"] == "p", "u", "v"))
    d = d[d["A"].isin(["p", "q"])]
    d["wall_s"] = np.where(d["A"] == "p", 1.0, 2.0)
    csv = tmp_path / "runs.csv"
    d.to_csv(csv, index=False)
    res = run_main("analyze", csv, "--factors", "A,B")
    assert res.returncode == 0, res.stderr
    out = " ".join(res.stdout.split())
    assert "exactly equal to it: A=p, B=" in out
    rec = [ln for ln in res.stdout.splitlines() if "Recommended" in ln]
    assert rec and "cannot be told apart from it" in " ".join(rec), res.stdout
