"""Response-surface designs (design/surface.py) against their published definitions,
and what `plan` says about them."""

from __future__ import annotations

import itertools
import json
import math
import textwrap

import numpy as np
import pytest

from benchharness.design import build_plan
from benchharness.design.fractional import DesignError
from benchharness.design.surface import build, number_label
from benchharness.errors import ExperimentError
from benchharness.experiment.file import parse_experiment


def _points(design):
    return np.array(design.coded_points())


@pytest.mark.parametrize("k", [2, 3, 4])
def test_rotatable_central_composite_matches_box_wilson(k):
    # Box & Wilson (1951): 2^k corners, 2k axial points at ±alpha, centre runs; the
    # rotatable alpha is F^(1/4) for F factorial points (Box & Hunter 1957).
    d = build([f"s{i}" for i in range(k)], [(10, 20)] * k)
    x = _points(d)
    assert d.alpha == pytest.approx((2 ** k) ** 0.25)
    assert {1.414: 2, 1.682: 3, 2.0: 4}[round(d.alpha, 3)] == k   # from memory
    corners = [p for p in x if np.all(np.abs(p) == 1)]
    axial = [p for p in x if np.count_nonzero(p) == 1]
    centre = [p for p in x if not np.any(p)]
    assert len(corners) == 2 ** k
    assert {tuple(c) for c in corners} == set(itertools.product((-1.0, 1.0), repeat=k))
    assert len(axial) == 2 * k and all(abs(np.abs(p).max() - d.alpha) < 1e-12 for p in axial)
    assert len(centre) == {2: 5, 3: 6, 4: 7}[k]     # uniform precision; from memory
    assert len(x) == 2 ** k + 2 * k + len(centre)
    # Rotatability (Box & Hunter 1957): odd moments vanish and the pure fourth moment is
    # three times the mixed one, sum x_i^4 = 3 sum x_i^2 x_j^2.
    assert np.allclose(x.sum(axis=0), 0)
    assert np.sum(x[:, 0] ** 4) == pytest.approx(3 * np.sum(x[:, 0] ** 2 * x[:, 1] ** 2))


def test_face_centred_central_composite_stays_in_the_box():
    d = build(["a", "b", "c"], [(1, 3)] * 3, axial="face", centre_runs=3)
    x = _points(d)
    assert d.alpha == 1.0
    assert set(np.unique(x)) == {-1.0, 0.0, 1.0}
    assert len(x) == 8 + 6 + 3
    assert d.region() == {"reach": 1.0, "radius": math.sqrt(3)}


@pytest.mark.parametrize("k,edges", [(3, 12), (4, 24)])
def test_box_behnken_matches_box_behnken_1960(k, edges):
    # Box & Behnken (1960): each pair of settings at (±1, ±1), the others at 0, plus
    # centre runs: 12 + 3 = 15 runs for three factors, 24 + 3 = 27 for four (from memory).
    d = build([f"s{i}" for i in range(k)], [(0.0, 1.0)] * k, points="box-behnken")
    x = _points(d)
    non_centre = [p for p in x if np.any(p)]
    assert len(non_centre) == edges and len(x) == edges + 3
    for p in non_centre:
        assert np.count_nonzero(p) == 2 and set(np.abs(p[p != 0])) == {1.0}
    pairs = {tuple(np.flatnonzero(p)) for p in non_centre}
    assert pairs == set(itertools.combinations(range(k), 2))
    assert set(np.unique(x)) == {-1.0, 0.0, 1.0}
    # The four-factor design is rotatable, the three-factor one is not (from memory):
    ratio = np.sum(x[:, 0] ** 4) / np.sum(x[:, 0] ** 2 * x[:, 1] ** 2)
    assert (ratio == pytest.approx(3.0)) == (k == 4)


def test_coding_log_scale_and_whole_numbers():
    d = build(["buf", "w"], [(16, 256), (2, 8)], log_scale=["buf"], whole=[True, True])
    buf, w = d.settings
    assert buf.centre == pytest.approx(64) and buf.exact(1) == pytest.approx(256)
    assert buf.exact(-d.alpha) == pytest.approx(64 / 4 ** math.sqrt(2))   # geometric spacing
    assert w.actual(-d.alpha) == 1.0 and w.exact(-d.alpha) == pytest.approx(5 - 3 * 2 ** .5)
    # the coded value of a rounded level is the value as run, not as designed
    assert d.coded_of_labels({"buf": "64", "w": "1"})[1] == pytest.approx(-4 / 3)
    assert number_label(0.7071067) == "0.7071" and number_label(1234.567) == "1235"
    assert number_label(2.5e-05) == "0.000025"


@pytest.mark.parametrize("kwargs,msg", [
    (dict(names=["a"], lows_highs=[(1, 2)]), "2 to 4 numeric settings, not 1; add a second"),
    (dict(names=list("abcde"), lows_highs=[(1, 2)] * 5), "not 5; fix the others at one"),
    (dict(names=["a", "b"], lows_highs=[(1, 2)] * 2, points="box-behnken"), "3 or 4"),
    (dict(names=["a", "b"], lows_highs=[(1, 9), (1, 2)]), "not a positive value"),
    (dict(names=["a", "b"], lows_highs=[(4, 2), (1, 2)]), "low value first"),
    (dict(names=["a", "b"], lows_highs=[(10, 12), (10, 20)], whole=[True, True]),
     "both round to"),
    (dict(names=["a", "b"], lows_highs=[(10, 20)] * 2, centre_runs=1), "at least 2"),
])
def test_designs_that_cannot_run_are_refused(kwargs, msg):
    with pytest.raises(DesignError, match=msg):
        build(**kwargs)


EXP = textwrap.dedent("""\
    experiment: pool
    command: [./serve, --buffer-kib, "{buffer_kib}", --workers, "{workers}"]
    factors:
      buffer_kib: [16, 256]
      workers: [2, 8]
    design:
      type: response-surface
      log_scale: [buffer_kib]
    replicates: 2
    seed: 5
    """)


def test_experiment_levels_and_plan_of_a_central_composite():
    exp = parse_experiment(EXP, "pool.yaml")
    # the loaded factors hold every value the design runs, in coded order
    assert exp.levels_of("buffer_kib") == ("9", "16", "64", "256", "455")
    assert exp.levels_of("workers") == ("1", "2", "5", "8", "9")
    plan = build_plan(exp)
    assert plan.timed_runs == 2 * 13
    centre = [r for r in plan.runs if dict(r.levels) == {"buffer_kib": "64", "workers": "5"}]
    assert len(centre) == 2 * 5
    d = plan.info["design"]
    assert d["type"] == "response-surface" and d["point_counts"] == {
        "corner": 4, "axial": 4, "centre": 5}
    json.dumps(plan.to_json_dict())


@pytest.mark.parametrize("edit,where,msg", [
    ("  workers: [2, 8]\n", "  workers: [2, 4, 8]\n", r"pool.yaml:5:\d+: factor 'workers' of a "
                                                       "response surface lists its low and high"),
    ("  workers: [2, 8]\n", "  workers: [few, many]\n", "pool.yaml:5:.*must be numeric"),
    ("  log_scale: [buffer_kib]\n", "  log_scale: [buffers]\n", "pool.yaml:8:.*buffers"),
    ("  type: response-surface\n", "  type: response-surface\n  points: box-behnken\n",
     "pool.yaml:8:.*Box-Behnken design needs 3 or 4"),
    ("  type: response-surface\n", "  type: response-surface\n  generators: [C = AB]\n",
     "pool.yaml:8:.*generators"),
])
def test_bad_surface_sections_are_located(edit, where, msg):
    with pytest.raises(ExperimentError, match=msg):
        parse_experiment(EXP.replace(edit, where), "pool.yaml")


def test_plan_says_coded_and_actual_values_and_rounding(main_cli, tmp_path):
    f = tmp_path / "pool.yaml"
    f.write_text(EXP)
    r = main_cli("plan", str(f))
    assert r.returncode == 0, r.stderr
    out = r.stdout
    assert "response surface, central composite (rotatable, axial points at ±1.414)" in out
    assert "4 corner + 4 axial points + 5 centre runs = 13 runs per replicate" in out
    assert "buffer_kib (log scale): -1.414 -> 9, -1 -> 16, 0 -> 64, +1 -> 256, +1.414 -> 455" \
        in out
    assert "workers (linear): -1.414 -> 1, -1 -> 2, 0 -> 5, +1 -> 8, +1.414 -> 9" in out
    assert "rounded to whole numbers" in out and "workers 0.7574 -> 1" in out
    assert "timed runs  26" in out
    bad = tmp_path / "bad.yaml"
    bad.write_text(EXP.replace("  workers: [2, 8]\n", "  workers: [2, 8]\n  codec: [a, b]\n"))
    r = main_cli("plan", str(bad))
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1 and "must be numeric" in r.stderr
