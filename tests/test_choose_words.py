"""What `choose` SAYS about the conditions a default must hold up across, and how it
counts the runs it did not use (docs/choose.md, "Words", "Runs used and left out").

Planted truths on small tables; the words are checked, not only the numbers.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from benchharness.choose import choose
from benchharness.choose.render import terminal_text


def _table(cond: str):
    # Planted: threads=8 is best where cond=a (1.0 vs 1.3), threads=16 where cond=b
    # (1.0 vs 1.2); 8 is both the safer (its worst loss 1.2x < 1.3x) and the better on
    # average (geometric means 1.10 vs 1.14).
    rng = np.random.default_rng(7)
    mu = {("8", "a"): 1.0, ("16", "a"): 1.3, ("8", "b"): 1.2, ("16", "b"): 1.0}
    return pd.DataFrame([dict(threads=t, **{cond: c}, status="ok",
                              wall_s=m * float(np.exp(rng.normal(0, 0.01))))
                         for (t, c), m in mu.items() for _ in range(4)])


@pytest.mark.parametrize("role,noun", [("workload", "workload"),
                                       ("environment", "environment")])
def test_the_conditions_are_named_by_their_declared_role(role, noun):
    other = {"workload": "environment", "environment": "workload"}[role]
    c = choose(_table("corpus"), factors=["threads", "corpus"], roles={role: ["corpus"]})
    assert c.across == ("corpus",) and c.best == {"threads": "8"}
    text = terminal_text(c)
    # the robust pick and the table say the role's word, never the other role's
    assert f"worse than the best of {'a' if noun == 'workload' else 'an'} {noun})" in text
    assert f"worst {noun}" in text and f"setting-by-{noun} model" in text
    assert other not in text.replace("--" + other, "")


def test_undeclared_conditions_are_conditions_not_environments():
    # --across on a factor with no declared role (a CSV): neither a workload nor an
    # environment is claimed
    c = choose(_table("disk"), factors=["threads", "disk"], across=["disk"])
    text = terminal_text(c)
    assert "worst condition" in text and "best of a condition" in text
    assert "environment)" not in text and "worst environment" not in text
    assert "setting-by-condition" in text


def test_left_out_counts_every_run_not_used_and_says_why(tmp_path):
    # Planted on the simulated system: 13 cells x 3 replicates = 39 runs; codec=none
    # fails every run (2 cells, 6 runs), and lzma/9 is excluded with rows=large, so its
    # 3 runs with rows=small cannot be used for a default across rows. 30 are used; the
    # footer must count the other 9, with both reasons.
    from test_space import SPACE, exp_of

    from benchharness.execute.runner import run_experiment
    from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel
    from benchharness.results.journal import load_results

    exp = exp_of(SPACE + "roles: {workload: [rows]}\nreplicates: 3\nseed: 2\n")
    truth = SimulatedModel(base_s=0.05, cv=0.03, effects={
        "codec": {"none": 1.0, "zlib": 0.9, "lzma": 0.7},
        "level": {"1": 1.0, "6": 1.1, "9": 0.5},
        "rows": {"small": 1.0, "large": 2.0}}, failure_prob={"codec": {"none": 1.0}})
    run_experiment(exp, out=tmp_path / "r", executor=SimulatedExecutor(truth, seed=4))
    res = load_results(tmp_path / "r")
    assert len(res.records) == 39
    c = choose(res)
    assert c.runs_used == 30 and c.runs_dropped == 9
    assert c.runs_left_out == {"failed": 6, "warmup": 0, "no_value": 0, "unavailable": 3}
    text = terminal_text(c)
    assert ("30 ok runs used, 9 left out: 6 failed or timed out (among them every run of "
            "codec=none, level=-, never successful), 3 of settings that could not be "
            "considered (codec=lzma, level=9, excluded with rows=large)") in text
    assert "cannot be the default across every workload" in text


def test_a_loss_on_the_original_scale_is_written_like_the_table_three_figures(tmp_path,
                                                                               main_cli):
    """Planted: a response with values around zero (so the original scale), s=a best where
    w=p and 0.3123456 ms behind s=b where w=q; s=b 0.4623 ms worse on average. The
    sentences give those differences as the table does, with three significant figures
    (docs/cli.md, "Numbers, units and verdict words"), never "0.3123 ms" beside "0.312 ms"."""
    jitter = [-0.002, -0.001, 0.0, 0.001, 0.002, 0.0]
    rows = ["s,w,delta_ms"] + [
        f"{s},{w},{off + x:.7f}"
        for s, offs in (("a", {"p": 0.0, "q": 0.3123456}), ("b", {"p": 1.234567, "q": 0.0}))
        for w, off in offs.items() for x in jitter]
    (tmp_path / "loss.csv").write_text("\n".join(rows) + "\n")
    r = main_cli("choose", tmp_path / "loss.csv", "--factors", "s,w", "--workload", "w",
                 "--response", "delta_ms")
    assert r.returncode == 0, r.stderr
    said = " ".join(r.stdout.split())
    assert "Recommended default: s=a" in said
    assert "never more than 0.312 ms worse than the best of a workload" in said
    assert "by at most 0.462 ms" in said and "0.3123" not in said and "0.4623" not in said
