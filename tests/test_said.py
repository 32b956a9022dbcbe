"""What analyze, report and choose SAY on ordinary data (each test plants a truth).

Each test builds a small fixed-seed table whose truth is known by construction and
asserts the words the user reads, not only the numbers: a statement the data do not
support is a defect even when every number is right.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from benchharness.analysis import analyze
from benchharness.report.story import headline


def _pool(seed=3, serial=None, reps=3):
    """A thread pool whose serial share shrinks as the input grows (Amdahl 1967:
    T = W(n)·(s + (1 − s)/p)): the speed-up of 8 threads differs with the records."""
    rng = np.random.default_rng(seed)
    serial = serial or {100000: 0.40, 200000: 0.15, 400000: 0.03}
    rows = []
    for p in (1, 2, 4, 8):
        for n, s in serial.items():
            w = 0.1 * (n / 1e5) ** 1.25
            for _ in range(reps):
                rows.append({"threads": str(p), "records": str(n),
                             "work_s": w * (s + (1 - s) / p) * np.exp(rng.normal(0, 0.04))})
    return pd.DataFrame(rows)


def test_a_speedup_that_differs_with_the_input_is_not_headlined_as_one_ratio():
    df = _pool()
    an = analyze(df, response="work_s", factors=["threads", "records"])
    head = headline(list(an.findings))
    (sc,) = [f for f in an.findings if f["kind"] == "scaling"]
    # planted: 8 threads give 1/(0.4 + 0.6/8) = 2.1x at 100000 records and
    # 1/(0.03 + 0.97/8) = 6.6x at 400000 (Amdahl's formula, from memory)
    assert sc["depends_on"] == "records"
    assert "the speed-up of threads=8 over threads=1 depends on records: from 2." in head
    assert "at records=100000 to 6." in head and "at records=400000" in head
    # the overall ratio is said as the average it is, never as a speed-up that holds
    assert "threads=8 is 3." not in head
    assert "on average over records" in head
    # each level's speed-up is the ratio of the cells' geometric means (common practice)
    z = np.log(df["work_s"])
    for n in ("100000", "400000"):
        g1 = z[(df.threads == "1") & (df.records == n)].mean()
        g8 = z[(df.threads == "8") & (df.records == n)].mean()
        assert f"{np.exp(g1 - g8):.2f}×" in sc["statement"]
    # the interval is the interaction's own simple effect, and says it is adjusted
    assert "Bonferroni-adjusted" in head
    assert "(Bonferroni-adjusted intervals)" in sc["statement"]
    # said once: the interaction's clause does not repeat the per-level ratios
    assert head.count("records=100000") == 1


def test_a_speedup_that_holds_at_every_input_is_still_said_as_one_ratio():
    an = analyze(_pool(seed=4, serial={100000: 0.1, 200000: 0.1, 400000: 0.1}),
                 response="work_s", factors=["threads", "records"])
    (sc,) = [f for f in an.findings if f["kind"] == "scaling"]
    assert sc["depends_on"] is None
    assert sc["short"].startswith("threads=8 is ")
    assert "depends on" not in headline(list(an.findings))


def test_an_interaction_elsewhere_leaves_a_speedup_that_holds_everywhere_one_ratio():
    # planted: the same serial share at every size, so 8 threads give one speed-up;
    # an interaction carried by the other thread counts (2 threads pay a fixed cost on
    # the small input only) must not split the 8-thread speed-up by size
    df = _pool(seed=5, serial={100000: 0.1, 200000: 0.1, 400000: 0.1})
    two_small = (df.threads == "2") & (df.records == "100000")
    df.loc[two_small, "work_s"] *= 1.5
    an = analyze(df, response="work_s", factors=["threads", "records"])
    assert any(f["kind"] == "interaction" and f["significant"] for f in an.findings)
    (sc,) = [f for f in an.findings if f["kind"] == "scaling"]
    assert sc["depends_on"] is None and sc["short"].startswith("threads=8 is ")
