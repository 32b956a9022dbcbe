"""Choosing the analysis scale: Box-Cox profile likelihood and the log / none rule.

Owns: the profile log-likelihood of the Box-Cox power transform for the fitted
model (Box & Cox 1964, *J. Royal Statistical Society B* 26:211), its maximum
λ̂ and the likelihood-ratio interval {λ : ℓ(λ) ≥ ℓ(λ̂) − χ²₁(1−α)/2}, the
rule that turns them into the scale the analysis uses, and the forward and
inverse transforms.

For each λ the residual sum of squares of the model on the transformed scale
is needed. It is computed exactly with one vectorised pass over the rows per
λ: with ``m_c`` the cell mean of log y and ``d = log y − m_c``,
``y^λ = e^{λ m_c} (1 + expm1(λ d))``, so the per-cell sums of ``expm1(λ d)``
and its square give the within-cell sum of squares without cancellation; the
between-cell part comes from projecting the transformed cell means on the
model's (precomputed) cell-level basis. The Jacobian enters through the
geometric mean ġ of y: the profile uses z = (y^λ − 1)/(λ ġ^{λ−1}).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from benchharness.errors import DataError, UsageError

TRANSFORMS = ("auto", "none", "log", "boxcox")


@dataclass(frozen=True)
class Profile:
    lam_hat: float
    ci: tuple[float, float]
    ci_open: tuple[bool, bool]      # True where the interval reached the search edge
    grid: tuple[float, ...]         # every λ evaluated, sorted (coarse grid + refinement)
    loglik: tuple[float, ...]       # profile log-likelihood at those λ
    loglik_max: float


class BoxCoxProfile:
    """Profile log-likelihood of λ for a model given by its cell-level basis."""

    def __init__(self, y, row_cell, n, basis=None):
        if not np.all(y > 0):
            raise DataError("Box-Cox and log transforms need positive responses")
        self.N = len(y)
        self.row_cell = row_cell
        self.C = len(n)
        self.n = n
        self.w = np.sqrt(n)
        logy = np.log(y)
        self.log_gm = float(logy.mean())
        m1 = np.bincount(row_cell, weights=logy, minlength=self.C) / n
        d = logy - m1[row_cell]
        corr = np.bincount(row_cell, weights=d, minlength=self.C) / n
        self.m = m1 + corr
        d -= corr[row_cell]
        self.d = d
        self._buf = np.empty_like(d)
        self.ss_log = float(np.bincount(row_cell, weights=d * d, minlength=self.C).sum())
        self.basis = basis  # None when the model reproduces every cell mean

    def rss(self, lam: float) -> float:
        """Residual sum of squares of the model for (y^λ − 1)/λ (log y at λ = 0)."""
        if abs(lam) < 1e-12:
            within, cm = self.ss_log, self.m
        else:
            e = self._buf
            np.multiply(self.d, lam, out=e)
            np.expm1(e, out=e)
            s1 = np.bincount(self.row_cell, weights=e, minlength=self.C)
            np.multiply(e, e, out=e)
            s2 = np.bincount(self.row_cell, weights=e, minlength=self.C)
            a = np.exp(lam * self.m)
            within = float((a * a * np.maximum(s2 - s1 * s1 / self.n, 0.0)).sum()) / lam**2
            cm = (np.expm1(lam * self.m) + a * s1 / self.n) / lam
        if self.basis is None:
            return within
        v = cm * self.w
        r = v - self.basis @ (self.basis.T @ v)
        return within + float(r @ r)

    def loglik(self, lam: float) -> float:
        rss_z = self.rss(lam) * math.exp(2.0 * (1.0 - lam) * self.log_gm)
        if rss_z <= 0:
            return float("inf")
        return -0.5 * self.N * math.log(rss_z / self.N)

    def profile(self, alpha: float = 0.05, lo: float = -2.0, hi: float = 2.0,
                step: float = 0.5, limit: float = 5.0) -> Profile:
        """λ̂ and its interval; the search widens past [lo, hi] up to ±limit when needed.

        A coarse grid locates the maximum; local quadratic (Newton) steps refine it,
        falling back to bounded Brent; the interval ends are roots found by Brent's
        method inside the grid bracket. Every λ is evaluated at most once.
        """
        from scipy import optimize, stats

        memo: dict[float, float] = {}

        def L(t):
            t = float(t)
            if t not in memo:
                memo[t] = self.loglik(t)
            return memo[t]

        grid = list(np.round(np.arange(lo, hi + step / 2, step), 10))
        ll = [L(g) for g in grid]
        cut_half = 0.5 * stats.chi2.ppf(1 - alpha, 1)
        # widen the grid while the maximum or the interval reaches an edge
        while grid[0] > -limit and (int(np.argmax(ll)) == 0 or ll[0] > max(ll) - cut_half):
            grid.insert(0, round(grid[0] - step * 2, 10))
            ll.insert(0, L(grid[0]))
        while grid[-1] < limit and (int(np.argmax(ll)) == len(ll) - 1
                                    or ll[-1] > max(ll) - cut_half):
            grid.append(round(grid[-1] + step * 2, 10))
            ll.append(L(grid[-1]))
        grid, ll = np.array(grid), np.array(ll)
        lo, hi = float(grid[0]), float(grid[-1])
        i = int(np.argmax(ll))
        a, b = float(grid[max(i - 1, 0)]), float(grid[min(i + 1, len(grid) - 1)])
        lam_hat = self._refine(L, float(grid[i]), a, b)
        if lam_hat is None:
            res = optimize.minimize_scalar(lambda t: -L(t), bounds=(a, b), method="bounded",
                                           options={"xatol": 2e-4})
            lam_hat = float(res.x)
        lmax = L(lam_hat)
        if ll[i] > lmax:
            lam_hat, lmax = float(grid[i]), float(ll[i])
        cut = lmax - cut_half

        ends, open_ = [], []
        for side, edge in ((grid < lam_hat, lo), (grid > lam_hat, hi)):
            idx = np.flatnonzero(side & (ll < cut))
            if len(idx) == 0:
                ends.append(float(edge))
                open_.append(True)
                continue
            t_out = float(grid[idx[-1]] if edge == lo else grid[idx[0]])
            # the nearest grid point still inside the interval narrows the bracket
            inner = np.flatnonzero(side & (ll >= cut))
            t_in = lam_hat
            if len(inner):
                cand = float(grid[inner[0]] if edge == lo else grid[inner[-1]])
                if (edge == lo and t_out < cand < lam_hat) or (edge == hi and lam_hat < cand < t_out):
                    t_in = cand
            root = optimize.brentq(lambda t: L(t) - cut, min(t_out, t_in), max(t_out, t_in),
                                   xtol=5e-4)
            ends.append(float(root))
            open_.append(False)
        pts = sorted((t, v) for t, v in memo.items() if math.isfinite(v))
        return Profile(lam_hat=lam_hat, ci=(ends[0], ends[1]), ci_open=(open_[0], open_[1]),
                       grid=tuple(t for t, _ in pts), loglik=tuple(v for _, v in pts),
                       loglik_max=lmax)

    @staticmethod
    def _refine(L, start, a, b, h=0.02, tol=2e-4, steps=6):
        """Newton steps on a local quadratic; None when the quadratic misbehaves."""
        x = start
        for _ in range(steps):
            f0, fm, fp = L(x), L(x - h), L(x + h)
            curv = fp - 2 * f0 + fm
            if not curv < 0:
                return None
            new = x - h * (fp - fm) / (2 * curv)
            if not a - h <= new <= b + h:
                return None
            if abs(new - x) < tol:
                return float(new)
            x = float(np.round(new, 6))
        return None


@dataclass(frozen=True)
class Choice:
    name: str              # none | log | boxcox
    lam: float             # λ applied: 0 for log, 1 for none
    reason: str


def choose(mode: str, profile: Profile | None, positive: bool, why_no_profile: str = "") -> Choice:
    """Apply the selection rule (see docs/analysis.md) for ``mode``."""
    if mode not in TRANSFORMS:
        raise UsageError(f"transform {mode!r} is not one of {', '.join(TRANSFORMS)}")
    if mode == "none":
        return Choice("none", 1.0, "no transform requested")
    if not positive:
        if mode == "auto":
            return Choice("none", 1.0, "responses are not all positive, so no power transform "
                                       "applies; analysed on the original scale")
        raise DataError(f"the {mode} transform needs positive responses; some are zero or "
                        "negative (use --transform none)")
    if mode == "log":
        return Choice("log", 0.0, "log transform requested")
    if profile is None:
        if mode == "boxcox":
            raise DataError(f"cannot estimate the Box-Cox λ: {why_no_profile}")
        return Choice("log", 0.0, f"λ cannot be estimated ({why_no_profile}); the log scale is "
                                  "the usual one for positive, ratio-scaled responses such as times and "
                                  "rates (common practice)")
    lo, hi = profile.ci
    lh = profile.lam_hat
    interval = f"λ̂ = {lh:.2f}, 95% interval [{lo:.2f}, {hi:.2f}]"
    if mode == "boxcox":
        return Choice("boxcox", lh, f"Box-Cox requested; {interval}")
    has0, has1 = lo <= 0 <= hi, lo <= 1 <= hi
    if has0 and has1:
        return Choice("log", 0.0, f"{interval} contains both 0 and 1; the response is positive and "
                                  "ratio-scaled (like times and rates), so the log scale is used "
                                  "(common practice)")
    if has0:
        return Choice("log", 0.0, f"{interval} contains 0 (log)")
    if has1:
        return Choice("none", 1.0, f"{interval} contains 1 (no transform) but not 0")
    half = round(lh * 2) / 2
    cands = [half + k * 0.5 for k in (0, -1, 1)]
    inside = [c for c in cands if lo <= c <= hi]
    if inside:
        lam = min(inside, key=lambda c: abs(c - lh))
        why = f"{interval} excludes 0 and 1; nearest multiple of 0.5 inside it"
    else:
        lam = round(lh, 1)
        why = f"{interval} excludes 0 and 1 and every multiple of 0.5; λ̂ rounded to 0.1"
    if lam == 0:
        return Choice("log", 0.0, why)
    if lam == 1:
        return Choice("none", 1.0, why)
    return Choice("boxcox", float(lam), why)


def forward(y: np.ndarray, choice: Choice) -> np.ndarray:
    if choice.name == "none":
        return np.asarray(y, dtype=float)
    if choice.name == "log":
        return np.log(y)
    lam = choice.lam
    return np.expm1(lam * np.log(y)) / lam


def inverse(z, choice: Choice):
    """Back to the original units (NaN where the transformed value has no preimage)."""
    z = np.asarray(z, dtype=float)
    if choice.name == "none":
        return z
    if choice.name == "log":
        return np.exp(z)
    lam = choice.lam
    with np.errstate(invalid="ignore", divide="ignore"):
        base = 1.0 + lam * z
        out = np.where(base > 0, np.exp(np.log1p(lam * z) / lam), np.nan)
    return out


def derivative_inverse(z, choice: Choice):
    """d y / d z of the inverse transform (for delta-method intervals)."""
    z = np.asarray(z, dtype=float)
    if choice.name == "none":
        return np.ones_like(z)
    if choice.name == "log":
        return np.exp(z)
    lam = choice.lam
    with np.errstate(invalid="ignore", divide="ignore"):
        base = 1.0 + lam * z
        return np.where(base > 0, np.exp((1.0 / lam - 1.0) * np.log(np.abs(base))), np.nan)
