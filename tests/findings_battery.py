"""Planted-truth scenarios for the findings battery (tests/test_findings_battery.py).

Each scenario simulates a runs table whose truth is known by construction
(invented data, fixed seed), writes it as a CSV, runs ``benchharness analyze``
on it as a user would (the command-line entry point, ``--json``), and checks
what the command *says*: the significant findings must be exactly the planted
ones, each planted ratio must lie inside its stated interval, the best cell or
tied set must hold the true best, and the headline must carry (or must not
carry) given phrases.

Timings are lognormal with multiplicative effects (per-run timings are
right-skewed and effects act as ratios: common practice).
"""

from __future__ import annotations

import io
import itertools
import json
import math
from contextlib import redirect_stderr, redirect_stdout
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import pandas as pd


@dataclass
class Scenario:
    name: str
    make: Callable[[np.random.Generator], tuple[pd.DataFrame, list[str]]]
    active: set[str]                          # term labels that must be significant, only them
    ratios: dict = field(default_factory=dict)   # factor -> {level: planted multiplier}
    best: list[dict] | None = None            # the tied set must be exactly these cells
    best_in: dict | None = None               # this cell must be in the tied set
    not_best: tuple = ()                      # no tied cell may match one of these
    headline: tuple[str, ...] = ()            # phrases the headline must carry
    not_headline: tuple[str, ...] = ()        # phrases it must not carry
    cautions: tuple[str, ...] = ()            # caution checks that must be raised
    note: str = ""                            # a phrase the notes must carry
    seed: int = 1                             # the seed of the default test run


def _frame(factors: dict, reps, effect, rng, sigma=0.1, base=0.05, noise=None):
    """Full factorial table; ``effect(cell) -> multiplier``; ``reps`` int or callable."""
    rows = []
    names = list(factors)
    for combo in itertools.product(*factors.values()):
        cell = dict(zip(names, combo))
        n = reps(rng) if callable(reps) else reps
        for _ in range(n):
            e = noise(rng) if noise else rng.normal(0, sigma)
            rows.append({**cell, "wall_s": base * effect(cell) * math.exp(e)})
    df = pd.DataFrame(rows)
    return df.sample(frac=1.0, random_state=int(rng.integers(1 << 30))).reset_index(drop=True)


def _fraction(generator, names, reps, effect, rng, sigma=0.08):
    """Two-level fraction: the last factor's level is the product of ``generator``'s."""
    rows = []
    base = names[:-1]
    for combo in itertools.product((-1, 1), repeat=len(base)):
        signs = dict(zip(base, combo))
        signs[names[-1]] = int(np.prod([signs[g] for g in generator]))
        cell = {f: ("off" if s < 0 else "on") for f, s in signs.items()}
        for _ in range(reps):
            rows.append({**cell, "wall_s": 0.05 * effect(cell) * math.exp(rng.normal(0, sigma))})
    return pd.DataFrame(rows)


# ---- the scenarios ---------------------------------------------------------------------------

def _main_effects(rng):
    f = {"codec": ["zlib", "bz2", "lzma"], "level": ["1", "9"]}
    eff = lambda c: {"zlib": 1.0, "bz2": 1.8, "lzma": 3.0}[c["codec"]] * (
        1.3 if c["level"] == "9" else 1.0)
    return _frame(f, 4, eff, rng), ["--factors", "codec,level"]


def _crossover(rng):
    f = {"A": ["lo", "hi"], "B": ["off", "on"], "C": ["x", "y"]}
    eff = lambda c: (2.5 if c["B"] == "off" else 0.43) if c["A"] == "hi" else 1.0
    return _frame(f, 4, eff, rng), ["--factors", "A,B,C"]


def _ordinal(rng):
    f = {"pool": ["4", "16"], "cache": ["cold", "warm"]}
    eff = lambda c: (2.0 if c["cache"] == "cold" else 1.2) if c["pool"] == "16" else 1.0
    return _frame(f, 6, eff, rng, sigma=0.08), ["--factors", "pool,cache"]


def _res4(rng):
    names = ["threads", "batch", "cache", "pin"]
    eff = lambda c: ((0.7 if c["threads"] == "on" else 1.0)
                     * (1.5 if c["threads"] == c["batch"] else 1 / 1.5))   # A:B chain ×2.25
    return _fraction(("threads", "batch", "cache"), names, 3, eff, rng), \
        ["--factors", ",".join(names)]


def _res3(rng):
    names = ["codec", "level", "dict"]
    eff = lambda c: (1.6 if c["codec"] == "on" else 1.0) * (0.8 if c["dict"] == "on" else 1.0)
    return _fraction(("codec", "level"), names, 3, eff, rng, sigma=0.05), \
        ["--factors", ",".join(names)]


def _heavy_tails(rng):
    f = {"alloc": ["system", "arena"], "huge": ["no", "yes"]}
    eff = lambda c: 1.5 if c["alloc"] == "arena" else 1.0
    noise = lambda g: 0.05 * g.standard_t(3)
    return _frame(f, 8, eff, rng, noise=noise), ["--factors", "alloc,huge"]


def _drift(rng):
    f = {"jit": ["off", "on"], "gc": ["a", "b"]}
    eff = lambda c: 0.7 if c["jit"] == "on" else 1.0
    df = _frame(f, 10, eff, rng, sigma=0.05)
    df["position"] = np.arange(len(df))
    df["wall_s"] *= np.exp(0.004 * df["position"])          # +0.4% per run
    return df, ["--factors", "jit,gc"]


def _one_replicate(rng):
    f = {"opt": ["O0", "O1", "O2"], "lto": ["off", "thin", "full"], "arch": ["x", "y"]}
    eff = lambda c: {"O0": 1.0, "O1": 0.6, "O2": 0.5}[c["opt"]] * (
        0.8 if c["lto"] == "full" else 1.0)
    return _frame(f, 1, eff, rng, sigma=0.04), ["--factors", "opt,lto,arch"]


def _null(rng):
    f = {"flag": ["a", "b", "c"], "mode": ["x", "y"]}
    return _frame(f, 4, lambda c: 1.0, rng), ["--factors", "flag,mode"]


def _unbalanced(rng):
    f = {"engine": ["v1", "v2", "v3"], "disk": ["ssd", "hdd"]}
    eff = lambda c: {"v1": 1.0, "v2": 1.0, "v3": 0.6}[c["engine"]]
    return _frame(f, lambda g: int(g.integers(2, 7)), eff, rng), ["--factors", "engine,disk"]


def _workload(rng):
    f = {"codec": ["zlib", "lzma"], "corpus": ["text", "binary"]}
    eff = lambda c: (1.5 if c["codec"] == "lzma" else 1.0) * (3.0 if c["corpus"] == "binary"
                                                               else 1.0)
    return _frame(f, 5, eff, rng), ["--factors", "codec,corpus"]


def _higher_better(rng):
    f = {"threads": ["1", "2", "4"], "pin": ["no", "yes"]}
    rows = []
    for t, p in itertools.product(*f.values()):
        for _ in range(4):
            rate = {"1": 100.0, "2": 180.0, "4": 300.0}[t] * math.exp(rng.normal(0, 0.06))
            rows.append({"threads": t, "pin": p, "rate_rps": rate})
    return pd.DataFrame(rows), ["--factors", "threads,pin", "--response", "rate_rps",
                                "--better", "higher"]


def _small_effect_three_factors(rng):
    f = {"a": ["p", "q"], "b": ["p", "q"], "c": ["p", "q"]}
    eff = lambda c: 1.15 if c["b"] == "q" else 1.0
    return _frame(f, 5, eff, rng, sigma=0.06), ["--factors", "a,b,c"]


SCENARIOS = [
    Scenario("multiplicative main effects", _main_effects, {"codec", "level"},
             ratios={"codec": {"zlib": 1.0, "bz2": 1.8, "lzma": 3.0},
                     "level": {"1": 1.0, "9": 1.3}},
             best_in={"codec": "zlib", "level": "1"},
             not_best=({"codec": "lzma"}, {"codec": "bz2"}),
             headline=("codec matters", "level matters"), not_headline=("interact",)),
    Scenario("crossover interaction", _crossover, {"A:B"},
             best_in={"A": "hi", "B": "on", "C": "x"},  # and C=y: C does nothing
             not_best=({"A": "lo"}, {"B": "off"}),
             headline=("A and B interact", "when B=off", "when B=on",
                       "C made no detectable difference"),
             not_headline=("A made no detectable difference", "B made no detectable")),
    Scenario("interaction of one direction, two sizes", _ordinal, {"pool:cache"},
             best_in={"pool": "4", "cache": "cold"},
             headline=("pool and cache interact", "when cache=cold"),
             not_headline=("no detectable difference",)),
    Scenario("resolution IV fraction, active two-factor chain", _res4,
             {"threads:batch (+ cache:pin)"},   # threads is stated per level of batch
             headline=("threads and batch interact", "cache:pin"),
             not_headline=("threads made no detectable", "batch made no detectable")),
    Scenario("resolution III fraction", _res3,
             {"codec (- level:dict)", "dict (- codec:level)"},
             ratios={"codec": {"off": 1.0, "on": 1.6}, "dict": {"off": 1.0, "on": 0.8}},
             best_in={"codec": "off", "level": "off", "dict": "on"},
             headline=("codec (- level:dict) matters", "dict (- codec:level) matters",
                       "level (- codec:dict) made no detectable difference")),
    Scenario("heavy-tailed noise", _heavy_tails, {"alloc"}, ratios={"alloc": {"system": 1.0, "arena": 1.5}},
             headline=("alloc matters", "huge made no detectable difference")),
    Scenario("drift over the run order", _drift, {"jit"}, ratios={"jit": {"off": 1.0, "on": 0.7}},
             cautions=("drift",), headline=("jit matters",)),
    Scenario("one replicate", _one_replicate, {"opt", "lto"},
             best_in={"opt": "O2", "lto": "full", "arch": "x"},
             headline=("opt matters", "lto matters", "arch made no detectable difference"),
             note="one run per cell"),
    Scenario("no effect at all", _null, set(),
             best_in={"flag": "a", "mode": "x"},
             headline=("None of the factors",), not_headline=("matters", "interact")),
    Scenario("unbalanced cells", _unbalanced, {"engine"}, ratios={"engine": {"v1": 1.0, "v2": 1.0, "v3": 0.6}},
             headline=("engine matters", "disk made no detectable difference")),
    Scenario("a workload factor", _workload, {"codec", "corpus"},
             ratios={"codec": {"zlib": 1.0, "lzma": 1.5},
                     "corpus": {"text": 1.0, "binary": 3.0}},
             best=[{"codec": "zlib"}], headline=("codec matters",)),
    Scenario("a metric where higher is better", _higher_better, {"threads"},
             ratios={"threads": {"1": 1.0, "2": 1.8, "4": 3.0}}, best=[{"threads": "4", "pin": "no"},
                                                   {"threads": "4", "pin": "yes"}],
             headline=("threads matters", "pin made no detectable difference")),
    Scenario("a small effect among three factors", _small_effect_three_factors, {"b"},
             ratios={"b": {"p": 1.0, "q": 1.15}},
             headline=("b matters", "made no detectable difference")),
]


# ---- running and judging ---------------------------------------------------------------------

def run_analyze(csv, args, json_path) -> tuple[int, str, dict]:
    """``benchharness analyze CSV ARGS --json FILE`` through the command-line entry point."""
    from benchharness.cli import main

    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        code = main(["analyze", str(csv), *args, "--json-out", str(json_path)])
    if code != 0:
        raise AssertionError(f"exit {code}: {err.getvalue()}")
    return code, out.getvalue(), json.loads(json_path.read_text())


def headline_of(stdout: str) -> str:
    """The first paragraph the command prints (the headline, however the console wrapped it)."""
    lines = []
    for line in stdout.splitlines():
        if not line.strip() or line.startswith("  "):
            break
        lines.append(line.strip())
    return " ".join(lines)


def judge(sc: Scenario, d: dict, headline: str) -> list[str]:
    """Every way the analysis' statement departs from the planted truth (empty: none)."""
    bad = []
    found = d["findings"]
    sig = {f["terms"][0] for f in found
           if f["kind"] in ("main", "interaction") and f["significant"]}
    if sig - sc.active:
        bad.append(f"false finding(s): {sorted(sig - sc.active)}")
    if sc.active - sig:
        bad.append(f"missed: {sorted(sc.active - sig)}")
    for term, mult in sc.ratios.items():
        f = next((f for f in found if f["kind"] == "main" and f["factors"] == [term]), None)
        if f is None:
            bad.append(f"no main finding for {term}")
            continue
        # the rows the finding states: Tukey pairs when made, else level against reference
        rows = [(c["a"], c["b"], c["lower"], c["upper"]) for c in d["comparisons"]
                if c["method"] == "tukey" and c["factor"] == term]
        rows = rows or [(e["level"], e["reference"], e.get("lower"), e.get("upper"))
                        for e in d["effects"] if e["factor"] == term]
        for a, b, lo, hi in rows:
            truth = mult[a] / mult[b]
            if lo is None or not (lo <= truth <= hi):
                bad.append(f"{term}={a} over {b}: planted ×{truth:.3g} outside [{lo}, {hi}]")
    best = next((f for f in found if f["kind"] == "best"), None)
    if best is None:
        bad.append("no best finding")
    else:
        if sc.best is not None and sorted(map(str, best["cells"])) != sorted(map(str, sc.best)):
            bad.append(f"tied set {best['cells']} is not {sc.best}")
        if sc.best_in is not None and sc.best_in not in best["cells"]:
            bad.append(f"true best {sc.best_in} not in the tied set {best['cells']}")
        for part in sc.not_best:
            if any(all(c.get(k) == v for k, v in part.items()) for c in best["cells"]):
                bad.append(f"a cell with {part} in the tied set {best['cells']}")
    checks = {f.get("check") for f in found if f["kind"] == "caution"}
    for c in sc.cautions:
        if c not in checks:
            bad.append(f"caution {c} not raised")
    low = headline.lower()
    for phrase in sc.headline:
        if phrase.lower() not in low:
            bad.append(f"headline lacks {phrase!r}")
    for phrase in sc.not_headline:
        if phrase.lower() in low:
            bad.append(f"headline says {phrase!r}")
    if sc.note and not any(sc.note in n for n in d["notes"]):
        bad.append(f"no note with {sc.note!r}")
    return bad


def run_scenario(sc: Scenario, seed: int, folder) -> list[str]:
    rng = np.random.default_rng(seed)
    df, args = sc.make(rng)
    csv = folder / f"{sc.name.replace(' ', '-')}-{seed}.csv"
    df.to_csv(csv, index=False)
    _, stdout, d = run_analyze(csv, args, csv.with_suffix(".json"))
    return judge(sc, d, headline_of(stdout))
