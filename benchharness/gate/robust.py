"""Outlier-resistant location of the within-block log differences, and its standard error.

A CI host now and then makes one run much slower (another job, a page-cache
flush, a migrated process). Such a run puts a large value among the gate's
within-block log differences ``d_i``: the mean moves and, worse, the standard
deviation swells, so the sequential bounds widen and the gate needs many more
blocks. This module owns the estimate the gate uses instead of the mean, in
two steps:

1. **Start and scale**: Huber's "proposal 2" (Huber 1964; Huber 1981, sec.
   6.4), location and scale solved jointly with ``psi(u) = max(-c, min(c, u))``:
   ``sum psi(r_i / s) = 0`` and ``sum psi(r_i / s)^2 = (n - 1) gamma`` with
   ``gamma = E psi(Z)^2`` at the normal, ten iterations from the median and the
   normalized median absolute deviation. A slow run counts as only ``c`` scales
   in ``s``, so the scale stays near the noise of the ordinary runs. The gate
   uses ``c = 1.0`` rather than the usual 1.5: with 6-10 blocks and one or two
   slow runs among them, 1.5 let the scale grow enough for step 2 to keep the
   slow runs (chosen by simulation, ``experiments/bench/gate_validation.py``).
2. **Location**: the Tukey biweight M-estimate (Beaton & Tukey 1974) with the
   scale ``s`` held fixed (an MM-type estimate, Yohai 1987), tuning constant
   ``4.685`` (95% efficiency at the normal). A difference more than 4.685
   scales from the centre gets weight zero: a run 1.5x as slow as usual, at
   noise CV 3%, drops out entirely.

The standard error is the sandwich form (Huber 1967)::

    se^2 = s^2 * sum psi(u_i)^2 / (n - 1) / (mean psi'(u_i))^2 / n,   u_i = r_i / s

(``mean psi'`` kept at least ``1/n``, so the error is never understated).

The studentized statistic ``T = (mu_hat - mu) / se`` is location and scale
equivariant, so for normal ``d_i`` its joint law at the gate's looks is free of
``mu`` and ``sigma``: the gate finds its sequential boundaries by simulating
that law on seeded null paths, exactly as for the t statistic
(`benchharness.gate.sequential.SpendingTracker`). One function computes the
statistic for the data and for the null paths, so the two always agree. It
works on every row of a 2-D array at once (one row per path).
"""

from __future__ import annotations

import math

HUBER_C = 1.0                      # proposal 2 constant: a robust yardstick (see step 1)
BIWEIGHT_C = 4.685                 # 95% efficiency at the normal (Beaton & Tukey 1974)
_MAD_NORMAL = 1.482602218505602    # 1 / Phi^-1(3/4): MAD -> sigma at the normal


def _gamma(c: float) -> float:
    """E psi(Z)^2 for Huber's psi at the standard normal: (2 Phi(c) - 1) - 2 c phi(c) + 2 c^2 (1 - Phi(c))."""
    Phi = 0.5 * (1.0 + math.erf(c / math.sqrt(2.0)))
    phi = math.exp(-0.5 * c * c) / math.sqrt(2.0 * math.pi)
    return (2.0 * Phi - 1.0) - 2.0 * c * phi + 2.0 * c * c * (1.0 - Phi)


_GAMMA = _gamma(HUBER_C)
_MAX_ITER = 60
SCALE_ITERATIONS = 10


def huber_proposal2(x, iterations: int = SCALE_ITERATIONS, tol: float = 0.0):
    """Huber's proposal 2 location and scale of each row of ``x`` (step 1 above).

    The gate takes a fixed number of iterations from the median and the MAD:
    the scale only has to be a steady yardstick for step 2, and a fixed count
    keeps the statistic the same function for the data and the null paths.
    ``iterations`` large and ``tol`` > 0 solve the equations to convergence.

    Returns ``(mu, s, ok)``; ``ok`` is false for a row whose values mostly tie
    (zero median absolute deviation), which keeps its median and a scale of 1.
    """
    import numpy as np

    x = np.asarray(x, dtype=float)
    if x.ndim == 1:
        x = x[None, :]
    n = x.shape[-1]
    mu = np.median(x, axis=-1)
    s = _MAD_NORMAL * np.median(np.abs(x - mu[:, None]), axis=-1)
    ok = s > 0
    s = np.where(ok, s, 1.0)
    c = HUBER_C
    for _ in range(iterations):
        r = (x - mu[:, None]) / s[:, None]
        u = np.clip(r, -c, c)
        inside = np.maximum((np.abs(r) < c).mean(axis=-1), 1.0 / n)
        step = np.where(ok, s * u.mean(axis=-1) / inside, 0.0)
        new_s = s * np.sqrt((u * u).sum(axis=-1) / (max(n - 1, 1) * _GAMMA))
        new_s = np.where(ok & (new_s > 0), new_s, s)
        mu = mu + step
        done = np.all(np.abs(step) <= tol * s) and np.all(np.abs(new_s - s) <= tol * s)
        s = new_s
        if tol > 0 and done:
            break
    return mu, s, ok


def robust_location(x):
    """Location, standard error and scale of each row of ``x`` (see the module docstring).

    Returns three arrays ``(mu, se, scale)``. A row whose values mostly tie (a
    zero scale) gets its median, a zero standard error and a zero scale.
    """
    import numpy as np

    x = np.asarray(x, dtype=float)
    if x.ndim == 1:
        x = x[None, :]
    n = x.shape[-1]
    mu, s, ok = huber_proposal2(x)
    b = BIWEIGHT_C
    for _ in range(_MAX_ITER):          # biweight with the scale held fixed
        z = (x - mu[:, None]) / (b * s[:, None])
        w = np.where(np.abs(z) < 1.0, (1.0 - z * z) ** 2, 0.0)
        wsum = w.sum(axis=-1)
        new = np.where(wsum > 0, (w * x).sum(axis=-1) / np.where(wsum > 0, wsum, 1.0), mu)
        step = new - mu
        mu = new
        if np.all(np.abs(step) <= 1e-7 * s):
            break
    u = (x - mu[:, None]) / s[:, None]
    z = u / b
    inside = np.abs(z) < 1.0
    psi = np.where(inside, u * (1.0 - z * z) ** 2, 0.0)
    dpsi = np.where(inside, (1.0 - z * z) * (1.0 - 5.0 * z * z), 0.0)
    m = np.maximum(dpsi.mean(axis=-1), 1.0 / n)
    se = s * np.sqrt((psi * psi).sum(axis=-1) / max(n - 1, 1)) / m / math.sqrt(n)
    se = np.where(ok, se, 0.0)
    s = np.where(ok, s, 0.0)
    return mu, se, s


def robust_t(x):
    """Studentized statistic ``mu_hat / se`` of each row (the null value is 0)."""
    import numpy as np

    mu, se, _ = robust_location(x)
    return mu / np.maximum(se, 1e-300)


def robust_summary(diffs) -> tuple[float, float]:
    """(location, noise ``se * sqrt(n)`` in the units of one difference) of one workload."""
    mu, se, _ = robust_location(list(diffs))
    return float(mu[0]), float(se[0]) * math.sqrt(len(diffs))
