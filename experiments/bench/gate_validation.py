"""Validation of the regression gate on a simulated system with a known truth.

Every figure comes from many simulated gate sessions run through the real gate
loop (`benchharness.gate.orchestrate.run_gate`) against `SimulatedExecutor`
(lognormal run times with a planted slowdown ratio, noise CV, optional linear
drift). Each rate is printed with its 95% Wilson interval (binomial
uncertainty). The fixed-size design it is compared with is the smallest number
of blocks for which a one-sided paired t-test at the same level has the same
design power (95%) at the design distance (1+tol vs 1+2*tol), computed from the
noncentral t distribution.

    python experiments/bench/gate_validation.py            # full figures (>= 2000 gates each)
    python experiments/bench/gate_validation.py --gates 300 # quicker look
    python experiments/bench/gate_validation.py --cvs 0.08 --sections rates   # one part

Sections: ``rates`` (noise CV x true ratio, clean and with 5% of runs 1.5x as
slow), ``rule`` (the same rule on vectorized simulated paths with the real
spending record: the gate's verdicts at a fraction of the cost), ``calibrate`` (the boundary false-fail rate of the decision rule on null
paths that each carry their own noise estimate and horizon, over noise CVs 2-12%:
how the share of the level was chosen), ``tails`` (one look, no gate: how often the resistant statistic passes
its clean-noise 1% and 0.5% points when 5% of runs are 1.5x as slow), ``drift``, ``workloads`` (three workloads at the boundary), ``failures``
(flaky builds: equal failure rates, candidate or baseline failing more often,
a build that never succeeds).

The simulated system draws times, it does not sleep; machine noise does not
enter these figures.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from benchharness.execute.base import RunSpec  # noqa: E402
from benchharness.execute.simulated import SimulatedExecutor, SimulatedModel  # noqa: E402
from benchharness.gate.decide import Block, GateSettings, judge  # noqa: E402
from benchharness.gate.orchestrate import run_gate  # noqa: E402
from benchharness.gate.sequential import fixed_pairs  # noqa: E402

LEVEL = {"baseline": "old", "candidate": "new"}


def wilson(k: int, n: int, z: float = 1.959964) -> tuple[float, float]:
    """Wilson (1927) score interval for a binomial proportion."""
    if n == 0:
        return (float("nan"), float("nan"))
    p = k / n
    den = 1 + z * z / n
    mid = (p + z * z / (2 * n)) / den
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / den
    return (max(0.0, mid - half), min(1.0, mid + half))


def simulate_gate(ratio: float, cv: float, seed: int, settings: GateSettings,
                  drift_per_run: float = 0.0, workloads: int = 1, outliers: float = 0.0,
                  failure_prob=None, outcome: bool = False):
    """One simulated gate session; returns the judgement of each workload (or the outcome)."""
    model = SimulatedModel(effects={"build": {"old": 1.0, "new": ratio}}, cv=cv,
                           drift_per_run=drift_per_run, outlier_prob=outliers,
                           failure_prob=failure_prob or {})
    ex = SimulatedExecutor(model, seed=seed)
    wl = {f"w{i}": {"w": str(i)} for i in range(workloads)}

    def spec(key, role, run_id, warm=False):
        return RunSpec(argv=("simulated",), run_id=run_id,
                       levels={**wl[key], "build": LEVEL[role]})

    out = run_gate(wl, spec, ex, settings, seed=seed + 10_000_019, warmup=1)
    return out if outcome else list(out.judgements.values())


def baseline_first(ratio: float, cv: float, seed: int, settings: GateSettings, n: int,
                   drift_per_run: float):
    """Fixed design with all baseline runs first, then all candidate runs (no interleaving)."""
    model = SimulatedModel(effects={"build": {"old": 1.0, "new": ratio}}, cv=cv,
                           drift_per_run=drift_per_run)
    ex = SimulatedExecutor(model, seed=seed)
    ex.execute(RunSpec(levels={"build": "old"}))   # warm-up of each build first
    ex.execute(RunSpec(levels={"build": "new"}))
    base = [ex.execute(RunSpec(levels={"build": "old"})) for _ in range(n)]
    cand = [ex.execute(RunSpec(levels={"build": "new"})) for _ in range(n)]
    blocks = [Block(b.wall_s, c.wall_s, b.status, c.status) for b, c in zip(base, cand)]
    from dataclasses import replace

    fixed = replace(settings, max_runs=n, min_runs=n)
    return judge(blocks, fixed, 1)


def scenario(name, ratio, cv, gates, settings, drift=0.0, workloads=1, seed0=0, outliers=0.0,
             progress=0):
    t0 = time.time()
    verdicts = {"regression": 0, "no_regression": 0, "improvement": 0, "inconclusive": 0,
                "never_ok": 0}
    runs = 0
    count = 0
    for g in range(gates):
        for j in simulate_gate(ratio, cv, seed0 + 7919 * g + 1, settings, drift, workloads,
                               outliers):
            verdicts[j.verdict] += 1
            runs += j.blocks
            count += 1
        if progress and (g + 1) % progress == 0 and g + 1 < gates:
            print(f"    ... {g + 1} gates: regression {verdicts['regression']}, pass "
                  f"{verdicts['no_regression'] + verdicts['improvement']}, undecided "
                  f"{verdicts['inconclusive']}, runs {runs}", flush=True)
    return {"name": name, "ratio": ratio, "cv": cv, "gates": count, "verdicts": verdicts,
            "mean_runs": runs / count, "seconds": time.time() - t0, "drift": drift}


def fmt_rate(k, n):
    lo, hi = wilson(k, n)
    return f"{100 * k / n:5.2f}% [{100 * lo:.2f}, {100 * hi:.2f}]"


def sigma_d(cv):
    return math.sqrt(2 * math.log1p(cv * cv))


def tails(tol: float, paths: int = 40_000, seed: int = 1) -> None:
    """Tail of the studentized resistant statistic at one look, with slow runs.

    The sequential boundaries are simulated for normal log differences; this
    checks whether slow runs (each run of either build 1.5x as slow with
    probability 0.05) push the statistic past its clean-noise upper 1% and
    0.5% points more often than that, at a fixed number of blocks and with no
    stopping, i.e. whether the standard error understates the spread.
    """
    import numpy as np

    from benchharness.gate.robust import robust_t

    rng = np.random.default_rng(seed)
    print(f"one look, no stopping, {paths} samples each: share of the resistant statistic above "
          "its clean-noise upper 1% / 0.5% points with 5% of runs 1.5x as slow")
    for n in (6, 10, 16, 27):
        q = np.quantile(robust_t(rng.standard_normal((paths, n))), [0.99, 0.995])
        cells = []
        for cv in (0.03, 0.05, 0.08):
            s = math.sqrt(math.log1p(cv * cv))
            d = (rng.normal(0, s, (paths, n)) + math.log(1.5) * (rng.random((paths, n)) < 0.05)
                 - rng.normal(0, s, (paths, n)) - math.log(1.5) * (rng.random((paths, n)) < 0.05))
            t = robust_t(d)
            cells.append(f"CV {cv:.0%}: {100 * np.mean(t > q[0]):.2f}% / "
                         f"{100 * np.mean(t > q[1]):.2f}%")
        print(f"  {n:>3} blocks  " + "   ".join(cells), flush=True)
    print()


def calibrate(settings: GateSettings, cvs, shares, paths: int = 10_000,
              null_paths: int = 20_000, outliers: float = 0.0) -> None:
    """Boundary false-fail rate of the rule on null paths with their own horizons.

    `benchharness.gate.calibrate`: for each share of the level, the horizon
    planned from the true noise ('known': the level spent is held), from the
    estimate with no floor ('no-pilot': the rule before the pilot) and the
    gate's rule ('pilot'). The largest share whose worst case over the CVs stays
    within the target is the worst-case adjusted level (Kieser & Friede 2000).
    """
    from benchharness.gate.calibrate import (
        RULES,
        boundary_false_fail,
        boundary_table,
        null_paths_at_boundary,
    )

    print(f"calibration: boundary false-fail of the rule on {paths} null paths per CV with "
          f"their own noise estimates and horizons (true ratio {1 + settings.tolerance:g}, "
          f"{outliers:.0%} of runs 1.5x as slow); "
          f"boundaries from {null_paths} null paths; for each share of the level: 'known' "
          "plans the horizon from the true noise, 'no-pilot' from the estimate with no "
          "floor (the rule before the pilot), 'pilot' is the gate's rule")
    tables = {c: boundary_table(c * (1 - settings.confidence), settings, null_paths)
              for c in shares}
    worst: dict[str, float] = {}
    for cv in cvs:
        mu, se = null_paths_at_boundary(cv, settings, paths, outliers=outliers)
        cells = []
        for c in shares:
            for rule in RULES:
                rate = boundary_false_fail(mu, se, cv, c, rule, settings, tables[c])
                label = f"{rule} {c:g}"
                worst[label] = max(worst.get(label, 0.0), rate)
                cells.append(f"{label} {100 * rate:.2f}%")
        print(f"  CV {cv:4.0%}  " + "  ".join(cells), flush=True)
    print("  worst case over the CVs: " +
          "  ".join(f"{k} {100 * v:.2f}%" for k, v in worst.items()))
    print()


def use_null_cache(path: str, top: int = 100) -> None:
    """Load (or compute and save) the gate's null robust statistics after 2..top blocks.

    The values are those `benchharness.gate.sequential.null_robust_column` computes
    (the same seeded paths); the gate's spending record then reads them from here.
    """
    import numpy as np

    from benchharness.gate import sequential as seq

    p = Path(path)
    paths, seed = 60_000, 19830101
    if p.exists():
        table = np.load(p)
    else:
        table = np.stack([seq.null_robust_column(paths, seed, n) for n in range(2, top + 1)])
        tmp = p.with_suffix(".part.npy")
        np.save(tmp, table)
        tmp.replace(p)
    original = seq.null_robust_column

    def column(p_, s_, n):
        if p_ == paths and s_ == seed and 2 <= n <= top:
            return table[n - 2]
        return original(p_, s_, n)

    seq.null_robust_column = column


def rule_rates(settings: GateSettings, cvs, outliers, ratios, paths: int, seed: int = 3) -> None:
    """The gate's decision rule on simulated paths, with its real spending record.

    `benchharness.gate.calibrate.gate_rule_outcomes`: the resistant statistic of
    every path after every block (vectorized), then each path judged look by look
    by the gate's own horizon code and a `SpendingTracker` per horizon history.
    It agrees with the gate loop verdict for verdict on the same blocks
    (tests/test_gate_stats.py) and takes a fraction of its time.
    """
    import numpy as np

    from benchharness.gate.calibrate import gate_rule_outcomes, null_paths_at_boundary

    print(f"decision rule on {paths} simulated paths per row (real spending record)")
    for cv in cvs:
        for o in outliers:
            mu, se = null_paths_at_boundary(cv, settings, paths, seed=seed, outliers=o)
            for ratio in ratios:
                t0 = time.time()
                v, n = gate_rule_outcomes(mu, se, settings,
                                          shift=math.log(ratio / (1 + settings.tolerance)))
                k = int(np.sum(v == "regression"))
                print(f"  CV {cv:4.0%}  slow runs {o:4.0%}  ratio {ratio:.2f}  fail "
                      f"{fmt_rate(k, paths)}  pass {100 * np.mean(v == 'pass'):6.2f}%  "
                      f"undecided {100 * np.mean(v == 'inconclusive'):6.2f}%  mean runs "
                      f"{n.mean():6.2f}   ({time.time() - t0:.0f} s)", flush=True)
    print()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--gates", type=int, default=2000)
    ap.add_argument("--first-gate", type=int, default=0,
                    help="number of the first simulated gate of the rates section (to split a "
                         "row into chunks: --gates 1000 then --first-gate 1000 --gates 1000 "
                         "are the 2,000 gates of --gates 2000)")
    ap.add_argument("--tolerance", type=float, default=0.05)
    ap.add_argument("--cvs", default="0.03,0.05,0.08", help="noise CVs of the rates section")
    ap.add_argument("--sections", default="rates,calibrate,tails,drift,workloads,failures")
    ap.add_argument("--ratios", default=None,
                    help="true ratios of the rates section (default: 1, 1+t, 1+2t, and "
                         "without outliers 1+4t, 1-2t)")
    ap.add_argument("--outliers", default="0,0.05",
                    help="shares of runs 1.5x as slow in the rates section")
    ap.add_argument("--estimator", default="robust", choices=("robust", "mean"))
    ap.add_argument("--calibrate-cvs", default="0.02,0.03,0.04,0.05,0.06,0.08,0.10,0.12",
                    help="noise CVs of the calibrate section")
    ap.add_argument("--calibrate-outliers", type=float, default=0.0,
                    help="share of runs 1.5x as slow in the calibrate section")
    ap.add_argument("--shares", default="0.5,0.6,0.7",
                    help="shares of the level tried by the calibrate section")
    ap.add_argument("--rule-paths", type=int, default=2000,
                    help="simulated paths per row of the rule section")
    ap.add_argument("--progress", type=int, default=0, metavar="N",
                    help="print the counts so far every N gates of a rates row")
    ap.add_argument("--null-cache", default=None, metavar="FILE",
                    help="keep the resistant statistic's seeded null paths (the gate's "
                         "boundaries, identical values) in this .npy file, so chunks run as "
                         "separate processes compute them once")
    ap.add_argument("--setting", action="append", default=[], metavar="NAME=VALUE",
                    help="override one GateSettings field (a number), e.g. "
                         "level_calibration=0.6")
    args = ap.parse_args(argv)
    if args.null_cache:
        use_null_cache(args.null_cache)
    tol = args.tolerance
    extra = {}
    for item in args.setting:
        key, _, value = item.partition("=")
        extra[key] = type(getattr(GateSettings, key))(value)
    st = GateSettings(tolerance=tol, estimator=args.estimator, **extra)
    alpha = 1 - st.confidence
    G = args.gates
    sections = set(args.sections.split(","))
    print(f"gate validation: tolerance {tol:.0%}, confidence {st.confidence}, min_runs "
          f"{st.min_runs}, max_runs {st.max_runs}, estimator {st.estimator}, {G} simulated "
          f"gates per row{', ' + ', '.join(args.setting) if args.setting else ''}")
    print("rates with 95% Wilson intervals; runs = runs of each build per workload\n")

    if "rates" in sections:
        for cv in (float(c) for c in args.cvs.split(",")):
            nfix = fixed_pairs(alpha, st.beta, st.design_delta / sigma_d(cv))
            print(f"noise CV {cv:.0%}: fixed-size design with the same error rates "
                  f"(one-sided paired t-test, level {alpha:g}, power {1 - st.beta:g} at "
                  f"{1 + 2 * tol:g}x): {nfix} runs of each build")
            print(f"  {'outliers':>8}  {'true ratio':>10}  {'fail (regression)':>26}  "
                  f"{'pass':>8}  {'undecided':>9}  {'mean runs':>9}  {'vs fixed':>8}")
            for outliers in (float(o) for o in args.outliers.split(",")):
                ratios = (1.0, 1 + tol, 1 + 2 * tol) if outliers else \
                    (1.0, 1 + tol, 1 + 2 * tol, 1 + 4 * tol, 1 - 2 * tol)
                if args.ratios:
                    ratios = tuple(float(r) for r in args.ratios.split(","))
                for ratio in ratios:
                    r = scenario(f"cv{cv}", ratio, cv, G, st, outliers=outliers,
                                 seed0=7919 * args.first_gate, progress=args.progress)
                    v, n = r["verdicts"], r["gates"]
                    passed = v["no_regression"] + v["improvement"]
                    print(f"  {outliers:>8.0%}  {ratio:>10.2f}  "
                          f"{fmt_rate(v['regression'], n):>26}  "
                          f"{100 * passed / n:7.2f}%  {100 * v['inconclusive'] / n:8.2f}%  "
                          f"{r['mean_runs']:9.2f}  {r['mean_runs'] / nfix:8.0%}   "
                          f"({r['seconds']:.0f} s)", flush=True)
            print()

    if "rule" in sections:
        rule_rates(st, [float(c) for c in args.cvs.split(",")],
                   [float(o) for o in args.outliers.split(",")],
                   [float(r) for r in (args.ratios or f"{1 + tol}").split(",")],
                   args.rule_paths)

    if "calibrate" in sections:
        calibrate(st, [float(c) for c in args.calibrate_cvs.split(",")],
                  [float(c) for c in args.shares.split(",")],
                  outliers=args.calibrate_outliers)

    if "tails" in sections:
        tails(args.tolerance)

    if "drift" in sections:
        # Drift as large as the effect: over the n runs of a fixed design the machine
        # slows by the design effect log(1 + 2 tol).
        cv = 0.03
        nfix = fixed_pairs(alpha, st.beta, st.design_delta / sigma_d(cv))
        drift = math.log1p(2 * tol) / nfix
        print(f"drift: log-time rises {drift:.4f} per run (over {nfix} runs as much as a "
              f"{2 * tol:.0%} slowdown), true ratio 1.00, CV {cv:.0%}")
        r = scenario("drift", 1.0, cv, G, st, drift=drift)
        v, n = r["verdicts"], r["gates"]
        print(f"  interleaved gate:        false fail {fmt_rate(v['regression'], n)}, "
              f"undecided {100 * v['inconclusive'] / n:.2f}%, mean runs {r['mean_runs']:.2f}")
        r = scenario("drift-boundary", 1 + tol, cv, G, st, drift=drift)
        v, n = r["verdicts"], r["gates"]
        print(f"  interleaved gate at the boundary ratio {1 + tol:.2f}: fail "
              f"{fmt_rate(v['regression'], n)}, undecided {100 * v['inconclusive'] / n:.2f}%")
        k = 0
        for g in range(G):
            j = baseline_first(1.0, cv, 7919 * g + 3, st, nfix, drift)
            k += j.verdict == "regression"
        print(f"  all baseline runs first: false fail {fmt_rate(k, G)} (fixed design, {nfix} "
              "runs of each build)")
        print(flush=True)

    if "workloads" in sections:
        # Several workloads: Bonferroni alpha/m, "no regression anywhere" needs no more.
        m = 3
        fails = 0
        for g in range(G // 2):
            js = simulate_gate(1 + tol, 0.03, 104729 * g + 5, st, workloads=m)
            fails += any(j.verdict == "regression" for j in js)
        print(f"{m} workloads, each at true ratio {1 + tol:.2f} (the boundary), alpha/{m} each: "
              f"gates failing anywhere {fmt_rate(fails, G // 2)}")
        print(flush=True)

    if "failures" in sections:
        print("failures (true ratio 1.00, CV 3%): failure probability of each run per build")
        cases = [("equal, 10% each", {"old": 0.1, "new": 0.1}),
                 ("equal, 30% each", {"old": 0.3, "new": 0.3}),
                 ("candidate 30%, baseline 0%", {"new": 0.3}),
                 ("candidate 20%, baseline 5%", {"old": 0.05, "new": 0.2}),
                 ("baseline 30%, candidate 0%", {"old": 0.3}),
                 ("candidate 100% (never succeeds)", {"new": 1.0}),
                 ("baseline 100% (never succeeds)", {"old": 1.0})]
        for label, fp in cases:
            t0 = time.time()
            counts = {"regression": 0, "no_regression": 0, "improvement": 0,
                      "inconclusive": 0, "never_ok": 0}
            runs = 0
            for g in range(G):
                out = simulate_gate(1.0, 0.03, 31337 * g + 11, st, failure_prob={"build": fp},
                                    outcome=True)
                counts[out.verdict] += 1
                runs += out.runs / 2
            passed = counts["no_regression"] + counts["improvement"]
            print(f"  {label:<32} regression {fmt_rate(counts['regression'], G)}  pass "
                  f"{100 * passed / G:6.2f}%  undecided {100 * counts['inconclusive'] / G:6.2f}%"
                  f"  never ok {100 * counts['never_ok'] / G:6.2f}%  mean runs {runs / G:6.2f}"
                  f"   ({time.time() - t0:.0f} s)", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
