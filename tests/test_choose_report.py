"""The choice in the report: the trade-off figure, and a table that fits a 1280 px page.

No browser is installed here, so the table is measured the way a browser lays it out:
headers do not wrap (report.css: ``thead th { white-space: nowrap }``), cells wrap at
spaces; text widths come from the DejaVu Sans outlines matplotlib ships (wider than
most system fonts, so the check errs on the safe side) at the table's 0.9rem = 14.4 px,
plus 2 x 0.6rem of cell padding. A 1280 px window gives the page's main column its
full 66rem = 1056 px, less 2 x 1.1rem of padding: 1020 px for the table.
"""

from __future__ import annotations

from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

from benchharness.choose import choose
from benchharness.choose.render import section_dict
from benchharness.execute.base import Measurement

PAGE_PX = 1020.0
FONT_PX, PAD_PX = 14.4, 2 * 0.6 * 16


def _text_px(text: str, bold: bool = False) -> float:
    from matplotlib.font_manager import FontProperties
    from matplotlib.textpath import TextPath

    if not text.strip():
        return 0.0
    prop = FontProperties(family="DejaVu Sans", weight="bold" if bold else "normal")
    return TextPath((0, 0), text, size=FONT_PX, prop=prop).get_extents().width


def table_px(columns, rows) -> tuple[float, float]:
    """(narrowest, unwrapped) width in px of a table with nowrap headers."""
    narrow = [_text_px(c, True) for c in columns]
    wide = list(narrow)
    for r in rows:
        for j, cell in enumerate(r):
            wide[j] = max(wide[j], _text_px(cell))
            narrow[j] = max(narrow[j], max(_text_px(w) for w in cell.split() or [""]))
    return sum(narrow) + PAD_PX * len(columns), sum(wide) + PAD_PX * len(columns)


class _ChooseTable(HTMLParser):
    """Header and body cells of the table inside <section id="choose">."""

    def __init__(self):
        super().__init__()
        self.section = None
        self.cells: list[tuple[str, str]] | None = None
        self.rows: list[list[tuple[str, str]]] = []
        self.figures: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "section":
            self.section = a.get("id")
        if self.section != "choose":
            return
        if tag == "figure":
            self.figures.append(a.get("id", ""))
        if tag == "tr":
            self.rows.append([])
        if tag in ("th", "td"):
            self.cells = [tag, ""]

    def handle_endtag(self, tag):
        if tag in ("th", "td") and self.cells is not None:
            self.rows[-1].append(tuple(self.cells))
            self.cells = None

    def handle_data(self, data):
        if self.cells is not None:
            self.cells[1] += data


EXPERIMENT = """\
experiment: pool-size
about: Which thread pool size should the image service ship with?
command: [serve-bench, --threads, "{threads}", --disk, "{disk}"]
factors:
  threads: [4, 8, 16]
  disk: [ssd, nvme, hdd]
replicates: 4
seed: 3
roles:
  environment: [disk]
choose:
  also: [max_rss_kib]
  limits: ["max_rss_kib within 80%"]
"""
WALL = {("4", "ssd"): 1.30, ("4", "nvme"): 1.20, ("4", "hdd"): 1.40,
        ("8", "ssd"): 0.84, ("8", "nvme"): 0.70, ("8", "hdd"): 1.00,
        ("16", "ssd"): 0.60, ("16", "nvme"): 0.50, ("16", "hdd"): 1.60}
RSS = {"4": 40_000, "8": 70_000, "16": 130_000}


class Planted:
    def __init__(self, seed=0):
        self.rng = np.random.default_rng(seed)

    def execute(self, spec, on_start=None):
        t, d = spec.levels["threads"], spec.levels["disk"]
        wall = WALL[(t, d)] * float(np.exp(self.rng.normal(0, 0.03)))
        rss = int(RSS[t] * float(np.exp(self.rng.normal(0, 0.02))))
        return Measurement(status="ok", exit_code=0, wall_s=wall, user_s=wall, sys_s=0.01,
                           max_rss_kib=rss, started_at="2026-01-01T00:00:00.000000+00:00")

    def close(self):
        pass


def test_report_shows_the_trade_off_figure_and_a_table_that_fits(main_cli, tmp_path):
    from benchharness.experiment.file import Experiment
    from benchharness.execute.runner import run_experiment

    exp = Experiment.from_text(EXPERIMENT, path=str(tmp_path / "pool.yaml"))
    folder = run_experiment(exp, out=tmp_path / "results", executor=Planted(1)).folder
    r = main_cli("report", folder)
    assert r.returncode == 0, r.stderr
    html = (folder / "report.html").read_text()
    p = _ChooseTable()
    p.feed(html)
    assert p.figures == ["fig-choose-tradeoff"]
    assert (folder / "figures" / "choose-tradeoff.png").stat().st_size > 1000
    md = (folder / "report.md").read_text()
    assert "](figures/choose-tradeoff.png)" in md
    # planted: 16 threads fastest, lean 4 threads; the 80 % memory limit leaves out 16
    head = [c for _t, c in p.rows[0]]
    body = [[c for _t, c in r] for r in p.rows[1:]]
    assert head[:4] == ["setting", "wall_s", "runs", "verdict"]
    verdict = {r[0]: r[3] for r in body}
    assert verdict["threads=16"] == "outside limits" and verdict["threads=8"] == "recommended"
    narrow, wide = table_px(head, body)
    assert wide <= PAGE_PX, (wide, head)


def test_a_wide_choice_still_fits_when_its_cells_wrap():
    # three settings factors with long names, two conditions, a front and a limit
    rng = np.random.default_rng(2)
    rows = []
    for alloc in ["glibc-malloc", "jemalloc"]:
        for pool in ["4", "16"]:
            for sched in ["work-stealing", "fifo"]:
                for m in ["arm64-graviton", "x86-64-epyc"]:
                    for inp in ["small", "large"]:
                        mu = 1.0 + 0.2 * (pool == "4") + 0.1 * (sched == "fifo")
                        rows += [dict(alloc=alloc, pool=pool, sched=sched, machine=m,
                                      input=inp, status="ok",
                                      wall_s=mu * float(np.exp(rng.normal(0, 0.03))),
                                      max_rss_kib=50_000 * (1.5 if alloc == "jemalloc" else 1)
                                      * float(np.exp(rng.normal(0, 0.01))))
                                 for _ in range(2)]
    c = choose(pd.DataFrame(rows), factors=["alloc", "pool", "sched", "machine", "input"],
               roles={"environment": ["machine"], "workload": ["input"]},
               also=["max_rss_kib"], limits=["max_rss_kib within 20%"])
    s = section_dict(c)
    narrow, wide = table_px(s["columns"], s["rows"])
    assert narrow <= PAGE_PX, (narrow, s["columns"])
    # the measure is not blind: the same rows under the old, long headers would not fit
    old = ["setting", "geometric mean wall_s", "runs", "verdict",
           "loss vs best, at most (ratio)", "ratio in worst environment", "average ratio",
           "trade-off front"]
    assert table_px(old, s["rows"])[0] > PAGE_PX


def test_trade_off_figure_from_the_choice_alone():
    from benchharness.report.tradeoff import tradeoff_figure

    rng = np.random.default_rng(3)
    speed = {b: 1.0 + 0.003 * i for i, b in enumerate("abcdefg")} | {"h": 12.9}
    df = pd.DataFrame([dict(build=b, status="ok",
                            wall_s=mu * float(np.exp(rng.normal(0, 0.03))),
                            max_rss_kib=int(80_000 * float(np.exp(rng.normal(0, 0.003)))))
                       for b, mu in speed.items() for _ in range(4)])
    fig = tradeoff_figure(section_dict(choose(df, factors=["build"], also=["max_rss_kib"])))
    assert fig is not None and fig.section == "choose"
    assert "7 of 8 settings on the front" in fig.svg
    assert fig.png[:8] == b"\x89PNG\r\n\x1a\n"
    assert tradeoff_figure(section_dict(choose(df, factors=["build"]))) is None
