"""Figures of `history show`'s step detection, by simulation (docs/history.md).

    python experiments/bench/history_steps.py [--series 2000]

Invented series with planted answers: each commit is the mean of 5 runs with
run-to-run noise 2 % (SD of ln), plus session-to-session noise ``tau``.
Prints, for flat series at their newest look, the share showing a false step
(whole-series and newest-commits tests together; level 0.05) and the share
with a "not yet confirmed" newest commit; then, for steps planted at the
newest commits, how often each is a step, and how often not yet confirmed.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from benchharness.history import changepoint as cp  # noqa: E402


def simulate(rng, N, step_at=None, step=0.0, noise=0.02, n=5, tau=0.0):
    lm = np.zeros(N)
    if step_at is not None:
        lm[step_at:] = np.log(1 + step)
    y = rng.normal(lm[:, None] + rng.normal(0, tau, (N, 1)), noise, (N, n))
    return y.mean(axis=1), y.std(axis=1, ddof=1), np.full(N, n)


def rates(series, N, tau, seed, step_at=None, step=0.0, near=None):
    rng = np.random.default_rng(seed)
    steps = pending = 0
    for _ in range(series):
        x, s, n = simulate(rng, N, step_at, step, tau=tau)
        det = cp.detect_steps(x, s, n, alpha=0.05)
        if near is None:
            steps += bool(det.steps)
        else:
            steps += any(abs(st.index - near) <= 1 for st in det.steps)
        pending += bool(det.unconfirmed)
    return steps / series, pending / series


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--series", type=int, default=2000)
    ap.add_argument("--part", choices=("all", "flat", "newest", "middle"), default="all")
    args = ap.parse_args()
    R = args.series
    t0 = time.time()
    if args.part in ("all", "flat"):
        flat(R)
    if args.part in ("all", "newest"):
        newest(R)
    if args.part in ("all", "middle"):
        middle(R)
    print(f"({time.time() - t0:.0f} s)")


def flat(R: int) -> None:
    print(f"flat series, {R} each: commits, tau, false-step rate, not-yet-confirmed rate")
    for N, tau in ((5, 0.0), (8, 0.0), (20, 0.005), (30, 0.0), (30, 0.01), (60, 0.02)):
        st, pe = rates(R, N, tau, seed=N)
        print(f"  {N:3d}  {tau * 100:.1f}%  {st:.4f}  {pe:.4f}", flush=True)


def newest(R: int) -> None:
    print(f"steps at the newest commits, {R // 4} series each: before + after commits, "
          "step, tau, share found as a step (within one commit), share not yet confirmed")
    for before, after, step, tau in ((3, 1, 1.3, 0.0), (3, 2, 1.3, 0.0), (3, 3, 1.3, 0.0),
                                     (20, 1, 0.05, 0.005), (20, 2, 0.05, 0.005),
                                     (20, 3, 0.05, 0.005), (20, 2, 0.10, 0.005),
                                     (20, 2, 0.03, 0.005)):
        st, pe = rates(R // 4, before + after, tau, seed=before * 100 + after,
                       step_at=before, step=step, near=before)
        print(f"  {before:2d}+{after}  {step * 100:5.0f}%  {tau * 100:.1f}%  {st:.3f}  {pe:.3f}",
              flush=True)


def middle(R: int) -> None:
    print(f"a step in the middle, {R // 4} series each: 30 commits, step at commit 17 "
          "(0-based), session noise 0.5 %: step, share found within one commit, exactly")
    for step in (0.05, 0.03, 0.02):
        rng = np.random.default_rng(int(step * 1000))
        near = exact = 0
        for _ in range(R // 4):
            x, s, n = simulate(rng, 30, 17, step, tau=0.005)
            idx = [st.index for st in cp.detect_steps(x, s, n, alpha=0.05).steps]
            near += any(abs(i - 17) <= 1 for i in idx)
            exact += 17 in idx
        print(f"  {step * 100:.0f}%  {near / (R // 4):.3f}  {exact / (R // 4):.3f}", flush=True)


if __name__ == "__main__":
    main()
