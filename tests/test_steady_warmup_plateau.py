"""Warm-ups of a few equally slow first iterations (a plateau) are warm-up, not spikes.

Planted truths: a steady state of 10.2 ms (1 % noise) after a head of slow
iterations whose length we choose. Before the fix, a plateau of 3 or 4 high
iterations (30, 31, 32 ms) had all but the first taken for spikes: `steady`
said warm-up 2 and a steady time 3-7 % high; a single slow first iteration came
out as a warm-up of 2. Each case asserts what `steady` says: the class, the
warm-up length and the steady time within 1 % of 10.2 ms.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from benchharness.measure.steady.warmup import classify

STEADY_MS = 10.2


def _planted(head_ms, n=60, seed=7, cv=0.01):
    rng = np.random.default_rng(seed)
    y = STEADY_MS * 1e-3 * np.exp(rng.normal(0, cv, n))
    y[:len(head_ms)] = np.asarray(head_ms, dtype=float) * 1e-3
    return y


# (name, head of slow iterations in ms, warm-up lengths that are right)
SHAPES = [
    ("plateau of 1", [30], {1}),
    ("plateau of 3", [30, 31, 32], {3}),
    ("plateau of 4", [30, 31, 32, 31], {4}),
    ("plateau of 5", [30, 31, 32, 31, 30], {5}),
    # longer plateaus: the rolling median passes the plateau's level before its
    # end, so its last iterations were flagged and hidden as spikes (steady from
    # 6 of 8, the steady time 7 % high) until a spike had to stand apart from the
    # iterations on both sides of it
    ("plateau of 8", [30, 31, 32, 31, 30, 31, 32, 31], {8}),
    ("plateau of 10", [30, 31, 32, 31, 30, 31, 32, 31, 30, 31], {10}),
    # a gradual warm-up: the last head iterations are within 4 % of the steady
    # time, so the steady state may start one or two early
    ("gradual", [30, 24, 19, 15, 12.5, 11.2, 10.6], {5, 6, 7}),
]


@pytest.mark.parametrize("name,head,right", SHAPES, ids=[s[0] for s in SHAPES])
@pytest.mark.parametrize("seed", [7, 8, 9])
def test_warmup_head_is_warmup(name, head, right, seed):
    res = classify(_planted(head, seed=seed))
    assert res.shape == "steady after speeding up", res
    assert res.steady_from in right, (name, res.steady_from)
    assert res.steady_s == pytest.approx(STEADY_MS * 1e-3, rel=0.01)
    # the planted truth: the plain mean of the iterations after the head
    y = _planted(head, seed=seed)
    assert res.steady_s == pytest.approx(y[res.steady_from:].mean(), rel=1e-12)
    assert res.spikes == 0     # nothing in the planted series is a spike


@pytest.mark.parametrize("seed", [7, 8, 9])
def test_no_warmup_is_steady_from_the_start(seed):
    res = classify(_planted([], seed=seed))
    assert res.shape == "steady from the start" and res.steady_from == 0
    assert res.steady_s == pytest.approx(STEADY_MS * 1e-3, rel=0.01)


def test_spikes_after_an_ordinary_first_iteration_are_still_spikes():
    # Planted: iteration 0 is ordinary, iterations 1-3 and 30 are interrupts.
    # An outlying run with an ordinary iteration before it stays a spike.
    y = _planted([])
    y[[1, 2, 3, 30]] = 31e-3
    res = classify(y)
    assert res.shape == "steady from the start" and res.steady_from == 0
    assert res.spikes == 4
    assert res.steady_s == pytest.approx(y.mean(), rel=1e-12)   # spikes are a real cost


def test_steady_command_on_a_three_iteration_plateau(tmp_path, cli, main_cli):
    """Through `run` and `benchharness steady`: each run prints 30, 31, 32 ms then a
    10.2 ms steady state; the folder's runs say warm-up 3, no spikes and 10.2 ms, and `steady`
    says the cell sped up and settled at 10.2 ms an iteration (within 1 %)."""
    import csv
    import sys
    import textwrap

    prog = ("import random; r = random.Random(1); "
            "[print(v) for v in [0.030, 0.031, 0.032]]; "
            "[print(0.0102 * (1 + r.gauss(0, 0.01))) for i in range(57)]")
    p = tmp_path / "exp.yaml"
    p.write_text(textwrap.dedent(f"""\
        experiment: plateau
        command: [{sys.executable}, -c, "{prog}"]
        factors: {{a: [1]}}
        replicates: 3
        samples: {{format: lines}}
        """))
    folder = tmp_path / "res"
    ran = main_cli("run", p, "--out", folder)   # `steady` below: in a new process
    assert ran.returncode == 0, ran.stderr
    with open(folder / "runs.csv") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 3
    for r in rows:
        assert r["steady_state"] == "steady after speeding up"
        assert float(r["steady_s"]) == pytest.approx(0.0102, rel=0.01)
    analyses = [json.loads(line)["analysis"]
                for line in (folder / "samples.jsonl").read_text().splitlines() if line.strip()]
    assert [a["steady_from"] for a in analyses] == [3, 3, 3]
    assert [a["spikes"] for a in analyses] == [0, 0, 0]
    res = cli("steady", folder, "--json")
    assert res.returncode == 0, res.stderr
    (cell,) = json.loads(res.stdout)["cells"]
    assert cell["cell_shape"] == "steady after speeding up"
    assert cell["runs_with_steady_state"] == 3
    assert cell["cost_iteration_s"] == pytest.approx(0.0102, rel=0.01)
