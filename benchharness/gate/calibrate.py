"""How much of the level the gate's bounds may spend: the rule's error on null paths with their own horizons.

The gate plans its horizon (the blocks at which the whole level is spent) from
the noise estimate, re-planned at every look. That estimate also studentizes
the statistic, so on a path where it comes out small the statistic is inflated
*and* the horizon is short: the spending runs ahead exactly when the statistic
is too large. This is the type I error inflation of re-estimating the sample
size from an internal pilot (Wittes & Brittain 1990). Its size depends on the
true noise relative to the design distance, which the gate does not know;
the remedy of Kieser & Friede (2000) is to spend a smaller nominal level, the
largest one whose error stays within the target in the worst case over the
noise.

This module measures that error for the gate's own rule. Each simulated path
(normal log differences, true log ratio exactly ``log(1 + tolerance)``, with
optional slow runs) carries its own resistant estimate (`benchharness.gate.robust`)
and therefore its own horizon, look by look, as a real gate does. Two
simulations:

* `boundary_false_fail`: the boundaries of a horizon fixed from the start, for
  the current horizon at each look (fast, fully vectorized; how the share of
  the level was chosen);
* `gate_rule_outcomes`: the gate's own horizon code and a real spending record
  (`benchharness.gate.sequential.SpendingTracker`) that counts what earlier
  looks of the path really spent, as the gate loop does; it gives the gate
  loop's verdicts on the same blocks (tests/test_gate_stats.py) and, with the
  statistic vectorized over paths, takes a fraction of its time.

The horizon is planned from the noise of ``settings.plan_noise``: by default
the spread about ``log(1 + tolerance)``, which at the boundary is independent
of the studentized statistic (Basu 1955; `benchharness.gate.decide`), so a
small estimate no longer shortens the horizon on the paths it inflates.
Everything is deterministic for a seed.
"""

from __future__ import annotations

import math

RULES = ("known", "no-pilot", "pilot")


def horizons(sd, settings, alpha: float):
    """`SequentialDesign.horizon` of an array of noise estimates (the same formula)."""
    import numpy as np
    from scipy.stats import norm

    za, zb = norm.isf(alpha), norm.isf(settings.beta)
    n = ((za + zb) * np.asarray(sd) / settings.design_delta) ** 2 + za * za / 2.0
    return np.minimum(settings.max_runs,
                      np.maximum(settings.min_runs, np.ceil(settings.horizon_factor * n))
                      ).astype(int)


def boundary_table(alpha: float, settings, paths: int = 20_000, seed: int = 19830101):
    """``table[N, n]``: boundary of the resistant statistic at look n for horizon N.

    Lan & DeMets (1983) O'Brien-Fleming-type spending over looks at every block
    from ``min_runs`` to N (the whole level at N), as empirical quantiles of the
    seeded null paths still inside (as `SpendingTracker` does); inf where a
    look spends nothing.
    """
    import numpy as np

    from benchharness.gate.sequential import null_robust_column, obf_spending

    top, first = settings.max_runs, settings.min_runs
    cols = {n: null_robust_column(paths, seed, n) for n in range(first, top + 1)}
    table = np.full((top + 1, top + 1), np.inf)
    for N in range(first, top + 1):
        alive = np.ones(paths, dtype=bool)
        spent = 0
        for n in range(first, N + 1):
            target = obf_spending(n / N, alpha) if n < N else alpha
            want = round(target * paths) - spent
            if want <= 0:
                continue
            t = cols[n]
            cand = t[alive]
            if want >= cand.size:
                table[N, n] = -np.inf
                break
            part = np.partition(cand, cand.size - want - 1)
            b = (float(part[cand.size - want:].min()) + float(part[cand.size - want - 1])) / 2
            table[N, n] = b
            crossed = alive & (t >= b)
            spent += int(crossed.sum())
            alive &= ~crossed
    return table


def null_paths_at_boundary(cv: float, settings, paths: int = 10_000, seed: int = 3,
                           outliers: float = 0.0, outlier_factor: float = 1.5):
    """Resistant location and standard error after every block, for paths at the boundary.

    Run times lognormal with coefficient of variation ``cv`` (each run of each
    build), true slowdown ratio exactly ``1 + tolerance``; with probability
    ``outliers`` a run takes ``outlier_factor`` times as long (as
    `SimulatedModel`). Returns ``(mu, se)``, arrays indexed ``[n, path]`` for n
    blocks.
    """
    import numpy as np

    from benchharness.gate.robust import robust_location

    top = settings.max_runs
    rng = np.random.default_rng(seed + round(cv * 10_000) + round(outliers * 1000))
    s = math.sqrt(math.log1p(cv * cv))
    slow = math.log(outlier_factor)

    def runs():
        x = rng.normal(0.0, s, (paths, top))
        return x + slow * (rng.random((paths, top)) < outliers) if outliers > 0 else x

    d = runs() - runs() + settings.threshold_log
    mu = np.zeros((top + 1, paths))
    se = np.ones((top + 1, paths))
    for n in range(max(2, settings.min_runs), top + 1):
        m, e, _ = robust_location(d[:, :n])
        mu[n], se[n] = m, np.maximum(e, 1e-300)
    return mu, se


def boundary_false_fail(mu, se, cv: float, share: float, rule: str, settings,
                        table=None) -> float:
    """Share of the paths ``(mu, se)`` the rule calls a regression (true ratio 1 + tolerance).

    ``rule``: "pilot" (the gate's: horizon from the noise of ``settings.plan_noise``,
    at least ``ratchet_from`` blocks, from there the largest such noise), "no-pilot"
    (the same without the floor) or "known" (the horizon from the true noise: the
    level spent is then held). ``share`` is the share of ``1 - confidence`` spent.
    The rule before 2026-12-05 is "pilot" with ``plan_noise="estimate"`` and
    ``horizon_factor=1.0``.
    """
    import numpy as np

    if rule not in RULES:
        raise ValueError(f"rule must be one of {RULES}")
    alpha = share * (1.0 - settings.confidence)
    if table is None:
        table = boundary_table(alpha, settings)
    top, first, rf = settings.max_runs, settings.min_runs, settings.ratchet_from
    thr = settings.threshold_log
    paths = mu.shape[1]
    alive = np.ones(paths, dtype=bool)
    fail = np.zeros(paths, dtype=bool)
    most = np.zeros(paths)
    true_sd = math.sqrt(2.0 * math.log1p(cv * cv))
    for n in range(first, top + 1):
        sd = planning_noise(mu[n], se[n], n, settings)
        if rule == "known":
            plan = np.full(paths, true_sd)
        elif n < rf:
            plan = sd
        else:
            most = np.maximum(most, sd)
            plan = most
        horizon = horizons(plan, settings, alpha)
        if rule == "pilot":
            horizon = np.maximum(horizon, min(rf, top))
        b = table[np.maximum(horizon, n), n]
        t = (mu[n] - thr) / se[n]
        f = alive & (t >= b)
        p = alive & (-t >= b) & ~f
        fail |= f
        alive &= ~(f | p | (n >= horizon))
        if not alive.any():
            break
    return float(fail.mean())


def planning_noise(mu, se, n: int, settings):
    """`benchharness.gate.decide`'s planning noise for arrays of locations and errors."""
    import numpy as np

    sd = se * math.sqrt(n)
    if settings.plan_noise == "estimate":
        return sd
    from benchharness.gate.decide import PLAN_DISTANCE_SE

    off = np.minimum(np.abs(mu - settings.threshold_log), PLAN_DISTANCE_SE * se)
    return np.sqrt(sd * sd * (n - 1) / n + off * off)


def gate_rule_outcomes(mu, se, settings, shift: float = 0.0):
    """What the gate's own decision rule says on each path, with its real spending record.

    The paths ``(mu, se)`` are the resistant location and standard error after
    every block (`null_paths_at_boundary`); ``shift`` moves the true log ratio
    (0: at the boundary). Unlike `boundary_false_fail` (boundaries of a horizon
    fixed from the start), each path is judged look by look with the gate's
    horizon code (`benchharness.gate.decide.planned_horizon`) and a
    `SpendingTracker` that counts what earlier looks of that path really
    spent; paths whose horizons agree so far share one record. Returns
    ``(verdicts, stopped_at)``: arrays of "regression", "pass" or
    "inconclusive" and of the block count at the decision.
    """
    import numpy as np

    from benchharness.gate import decide

    thr = settings.threshold_log
    paths = mu.shape[1]
    mu = mu + shift
    verdict = np.full(paths, "", dtype=object)
    stopped = np.zeros(paths, dtype=int)
    states = [_PathState() for _ in range(paths)]
    groups = {(): (settings.tracker(1), list(range(paths)))}
    for n in range(max(2, settings.min_runs), settings.max_runs + 1):
        sd = np.maximum(se[n] * math.sqrt(n), 1e-9)
        nxt = {}
        for key, (tracker, ids) in groups.items():
            by_horizon: dict[tuple[int, bool], list[int]] = {}
            for i in ids:
                horizon = decide.planned_horizon(float(mu[n, i]), float(sd[i]), n, settings,
                                                 states[i])
                final = n >= settings.max_runs or n >= horizon
                by_horizon.setdefault((horizon, final), []).append(i)
            for (horizon, final), members in by_horizon.items():
                record = tracker.fork()
                ct = record.boundary(n, horizon, final)
                rest = []
                for i in members:
                    half = ct * sd[i] / math.sqrt(n) if math.isfinite(ct) else math.inf
                    if mu[n, i] - half > thr:
                        verdict[i] = "regression"
                    elif mu[n, i] + half < thr:
                        verdict[i] = "pass"
                    elif final:
                        verdict[i] = "inconclusive"
                    else:
                        rest.append(i)
                        continue
                    stopped[i] = n
                if rest:
                    nxt[key + ((horizon, final),)] = (record, rest)
        groups = nxt
        if not groups:
            break
    return verdict, stopped


class _PathState:
    """The per-workload state the gate keeps on a tracker between looks (the ratchet)."""

    plan_sd = 0.0
