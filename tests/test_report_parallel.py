"""The report's figures drawn by two forked processes are the figures drawn one by one.

Each figure is a job with its own random stream (`report.figures._figure_jobs`), so the
order in which processes finish cannot change a pixel. Planted data (invented): a
2×3 experiment whose level ``b=slow`` takes twice as long; the figures must come back
in the report's order, byte for byte, with the same notes, and the PNGs keep an
exactly white background after the palette is built.
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest


@pytest.fixture(scope="module")
def data():
    from benchharness import analyze
    from benchharness.report.data import collect

    rng = np.random.default_rng(8)
    rows = []
    for rep in range(6):
        for a in ("x", "y"):
            for b in ("fast", "mid", "slow"):
                mult = {"fast": 1.0, "mid": 1.3, "slow": 2.0}[b]
                rows.append({"a": a, "b": b, "status": "ok", "run": len(rows),
                             "position": len(rows),
                             "wall_s": 0.01 * mult * float(np.exp(rng.normal(0, 0.05)))})
    df = pd.DataFrame(rows)
    an = analyze(df, factors=["a", "b"])
    return collect(df, analysis=an, factors=["a", "b"])


def test_two_processes_draw_the_same_figures_in_the_same_order(data, monkeypatch):
    import multiprocessing

    from benchharness.report.figures import make_figures

    one = make_figures(data, workers=1, max_points=5)
    contexts = []
    real = multiprocessing.get_context
    monkeypatch.setattr(multiprocessing, "get_context",
                        lambda method=None: contexts.append(method) or real(method))
    two = make_figures(data, workers=2, max_points=5)
    assert contexts == ["fork"]          # the second drawing did start its processes
    assert [f.name for f in two.figures] == [f.name for f in one.figures]
    assert len(one.figures) >= 6
    assert all(x.png == y.png and x.svg == y.svg for x, y in zip(one.figures, two.figures))
    assert two.notes == one.notes and any("random 5 of the runs" in n for n in one.notes)
    # what the report draws from: the planted factor b is the one that matters
    significant = {r["term"] for r in data.analysis["anova"]
                   if r.get("p_holm") is not None and r["p_holm"] < 0.05}
    assert significant == {"b"}


def test_small_reports_are_drawn_in_this_process_and_large_ones_by_two(data, monkeypatch):
    from benchharness.report import figures

    assert figures._default_workers(data) == 1          # 36 runs: forking costs more
    monkeypatch.setattr(figures, "PARALLEL_MIN_RUNS", 10)
    monkeypatch.setattr("os.sched_getaffinity", lambda _pid: {0, 1, 2})
    assert figures._default_workers(data) == 2


def test_png_background_stays_exactly_white(data):
    from PIL import Image

    from benchharness.report.figures import make_figures

    for fig in make_figures(data, workers=1).figures:
        img = Image.open(io.BytesIO(fig.png)).convert("RGB")
        assert img.getpixel((1, 1)) == (255, 255, 255), fig.name
