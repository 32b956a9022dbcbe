"""Choosing the analysis scale: one scale per response, with the Box-Cox profile as evidence.

Owns: which responses are ratio-scaled (`ratio_scaled`), the profile
log-likelihood of the Box-Cox power transform for the fitted model (Box & Cox
1964, *J. Royal Statistical Society B* 26:211), its maximum λ̂ and the
likelihood-ratio intervals {λ : ℓ(λ) ≥ ℓ(λ̂) − χ²₁(1−α)/2} at 95% and 99%, the
plain sentence that states what the profile says, the rule that turns all of
it into the scale the analysis uses (`choose`), and the forward and inverse
transforms.

**The profile uses the residual degrees of freedom.** With z_λ = (y^λ − 1) /
(λ ġ^{λ−1}) the normalised transform (ġ the geometric mean of y, so the
Jacobian of the transform is inside z) and RSS(λ) the residual sum of squares
of the model fitted to z_λ, the maximum-likelihood profile is
ℓ_N(λ) = −(N/2)·log(RSS(λ)/N). Its likelihood-ratio statistic
2(ℓ_N(λ̂) − ℓ_N(λ₀)) = N·log(RSS(λ₀)/RSS(λ̂)) is χ²₁ only as N grows; in
factorial experiments, where the model spends many of the N runs on cell means,
it is too large and the 95% interval covers λ₀ in only 84–90% of experiments
(3×2×4 to 3×3×3×3 designs, 2–3 runs per cell). Box & Cox (1964, §4) give, for
the same model, the marginal posterior of λ as proportional to
RSS(λ)^{−ν/2} with ν = N − rank(X) the residual degrees of freedom (their
prior makes the Jacobian enter through the same z_λ). We therefore use

    ℓ(λ) = −(ν/2)·log(RSS(λ)/ν),

which has the same maximum λ̂ and scales the likelihood-ratio statistic by ν/N,
a correction of the kind Bartlett (1937, *Proc. Royal Society A* 160:268)
introduced for the same N-versus-ν bias in variance tests. By simulation its 95%
interval covers λ₀ = 0 in 95.4–95.8% of lognormal experiments on those designs
(docs/analysis.md gives the command).

For each λ the residual sum of squares of the model on the transformed scale
is needed. It is computed exactly with one vectorised pass over the rows per
λ: with ``m_c`` the cell mean of log y and ``d = log y − m_c``,
``y^λ = e^{λ m_c} (1 + expm1(λ d))``, so the per-cell sums of ``expm1(λ d)``
and its square give the within-cell sum of squares without cancellation; the
between-cell part comes from projecting the transformed cell means on the
model's (precomputed) cell-level basis. The Jacobian enters through the
geometric mean ġ of y: the profile uses z = (y^λ − 1)/(λ ġ^{λ−1}).

**The scale rule.** A positive, ratio-scaled response (times, memory, counts,
rates: any unit that is not a difference) is analysed on the log scale, where
effects are exact ratios. ``auto`` leaves the log scale only when the evidence
against it is strong — λ = 0 outside the 99% interval — *and* the residuals on
the log scale fail the normality or equal-variance checks; it then says why in
one sentence. A response whose unit is a difference (a temperature, a change, a
level in dB) or that is not all positive stays on the original scale.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from benchharness.errors import DataError, UsageError

TRANSFORMS = ("auto", "none", "log", "boxcox")

#: unit words that mark a difference or interval scale, where ratios mean nothing (our list:
#: an explicit change or offset, temperatures in °C/°F, levels already on a log scale).
DIFFERENCE_UNIT_WORDS = ("diff", "delta", "change", "offset", "°c", "°f", "degc", "degf",
                         "celsius", "fahrenheit", "db", "log", "score", "z")

#: the stronger level at which ``auto`` may leave the log scale: λ = 0 outside this interval.
LEAVE_LOG_ALPHA = 0.01


def ratio_scaled(unit: str | None) -> tuple[bool, str]:
    """Is a response with this unit ratio-scaled? Returns (answer, reason in a few words).

    Times, memory, counts and rates have a true zero, so "twice as long" means
    something and the log scale turns effects into ratios. A unit that names a
    difference or an interval scale (``°C``, ``delta ms``, ``dB``) does not.
    """
    u = (unit or "").strip().lower()
    if not u:
        return True, "a positive measurement such as a time, a size or a count"
    words = [w for w in "".join(c if (c.isalnum() or c == "°") else " " for c in u).split()]
    for w in words:
        if any(w == k or (len(k) > 3 and w.startswith(k)) for k in DIFFERENCE_UNIT_WORDS):
            return False, f"its unit {unit!r} is a difference or an interval scale"
    return True, f"its unit {unit!r} has a true zero (ratios are meaningful)"


def unit_of_response(response: str, experiment=None, folder=None) -> str | None:
    """The declared unit of a custom metric (metrics.json or the experiment's ``metrics:``)."""
    import os

    if folder is None and experiment is not None and getattr(experiment, "path", None):
        folder = os.path.dirname(str(experiment.path))
    if folder is not None:
        from benchharness.measure.metrics import read_manifest

        entry = read_manifest(folder).get(response)
        if isinstance(entry, dict) and entry.get("unit") is not None:
            return str(entry.get("unit"))
    sections = getattr(experiment, "sections", None) or {}
    node = sections.get("metrics") if hasattr(sections, "get") else None
    if node is not None:
        from benchharness.errors import BenchharnessError
        from benchharness.measure.metrics import parse_metrics

        try:
            metrics = parse_metrics(node, tuple(getattr(experiment, "factor_names", ()) or ())
                                    ).metrics
        except BenchharnessError:  # an invalid section was reported when it was loaded
            return None
        for m in metrics:
            if m.name == response:
                return m.unit
    return None


@dataclass(frozen=True)
class Profile:
    lam_hat: float
    ci: tuple[float, float]
    ci_open: tuple[bool, bool]      # True where the interval reached the search edge
    grid: tuple[float, ...]         # every λ evaluated, sorted (coarse grid + refinement)
    loglik: tuple[float, ...]       # profile log-likelihood at those λ
    loglik_max: float
    ci99: tuple[float, float] | None = None   # the 99% interval (None: not computed)
    df: float | None = None                   # ν, the degrees of freedom in the profile

    def sentence(self) -> str:
        """What the profile says about the log scale, in plain words."""
        lh, (lo, hi) = self.lam_hat, self.ci
        lo_t = _num(lo) + (" or lower" if self.ci_open[0] else "")
        hi_t = _num(hi) + (" or higher" if self.ci_open[1] else "")
        iv = f"λ̂ = {_num(lh)}, 95% interval {lo_t} to {hi_t}"
        if lo <= 0 <= hi:
            tail = ", and also with no transform (λ = 1)" if lo <= 1 <= hi else ""
            return f"the data are consistent with the log scale ({iv}){tail}"
        if self.ci99 is not None and self.ci99[0] <= 0 <= self.ci99[1]:
            return (f"the data lean away from the log scale, but not strongly ({iv}; λ = 0 is "
                    f"inside the 99% interval {_num(self.ci99[0])} to {_num(self.ci99[1])})")
        i99 = (f"; 99% interval {_num(self.ci99[0])} to {_num(self.ci99[1])}"
               if self.ci99 is not None else "")
        tail = ("; they are consistent with no transform (λ = 1)" if lo <= 1 <= hi else "")
        return f"the data are not consistent with the log scale ({iv}{i99}){tail}"


def _num(x: float) -> str:
    return f"{x:.2f}".replace("-", "−")


class BoxCoxProfile:
    """Profile log-likelihood of λ for a model given by its cell-level basis."""

    def __init__(self, y, row_cell, n, basis=None, df=None):
        """``df``: ν, the residual degrees of freedom of the model (default N, the plain MLE)."""
        if not np.all(y > 0):
            raise DataError("Box-Cox and log transforms need positive responses")
        self.N = len(y)
        self.df = float(self.N if df is None else df)
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
        """−(ν/2)·log(RSS(z_λ)/ν): Box & Cox (1964, §4) with the residual degrees of freedom."""
        rss_z = self.rss(lam) * math.exp(2.0 * (1.0 - lam) * self.log_gm)
        if rss_z <= 0:
            return float("inf")
        return -0.5 * self.df * math.log(rss_z / self.df)

    def profile(self, alpha: float = 0.05, lo: float = -2.0, hi: float = 2.0,
                step: float = 0.5, limit: float = 5.0, alpha2: float | None = LEAVE_LOG_ALPHA
                ) -> Profile:
        """λ̂ and its interval; the search widens past [lo, hi] up to ±limit when needed.

        ``alpha2`` (default 0.01) adds a second, wider interval (``ci99``) found on
        the same evaluations, which the scale rule uses as its stronger evidence.

        A coarse grid locates the maximum; local quadratic (Newton) steps refine it,
        falling back to bounded Brent; the interval ends are roots found by Brent's
        method inside the grid bracket. Every λ is evaluated at most once.
        """
        from benchharness.analysis import dist as stats
        from benchharness.analysis import roots as optimize

        memo: dict[float, float] = {}

        def L(t):
            t = float(t)
            if t not in memo:
                memo[t] = self.loglik(t)
            return memo[t]

        grid = list(np.round(np.arange(lo, hi + step / 2, step), 10))
        ll = [L(g) for g in grid]
        levels = [alpha] + ([alpha2] if alpha2 is not None and alpha2 < alpha else [])
        cut_half = 0.5 * stats.chi2.ppf(1 - min(levels), 1)
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
        intervals = [self._interval(L, grid, ll, lam_hat, lmax - 0.5 * stats.chi2.ppf(1 - a, 1),
                                    lo, hi) for a in levels]
        (ci, open_), ci99 = intervals[0], (intervals[1][0] if len(intervals) > 1 else None)
        pts = sorted((t, v) for t, v in memo.items() if math.isfinite(v))
        return Profile(lam_hat=lam_hat, ci=ci, ci_open=open_,
                       grid=tuple(t for t, _ in pts), loglik=tuple(v for _, v in pts),
                       loglik_max=lmax, ci99=ci99, df=self.df)

    @staticmethod
    def _interval(L, grid, ll, lam_hat, cut, lo, hi):
        """Ends of {λ : ℓ(λ) ≥ cut} around λ̂ (Brent roots inside the grid brackets)."""
        from benchharness.analysis import roots as optimize

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
        return (ends[0], ends[1]), (open_[0], open_[1])

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
    reason: str            # one sentence: the scale used and why


SCALE_WORDS = {"log": "the log scale", "none": "the original scale"}


def scale_words(name: str, lam: float | None = None) -> str:
    """"the log scale", "the original scale" or "a Box-Cox scale (λ = 0.5)"."""
    if name in SCALE_WORDS:
        return SCALE_WORDS[name]
    return f"a Box-Cox scale (λ = {lam:g})" if lam is not None else "a Box-Cox scale"


def choose(mode: str, profile: Profile | None, positive: bool, why_no_profile: str = "",
           ratio: tuple[bool, str] = (True, ""), log_check=None) -> Choice:
    """Apply the scale rule (module docstring; docs/analysis.md) for ``mode``.

    ``ratio`` is `ratio_scaled`'s answer for the response. ``log_check`` is
    called only when ``auto`` might leave the log scale (λ = 0 outside the 99%
    interval); it returns ``None`` when the residuals on the log scale pass the
    normality and equal-variance checks, else the failing check in a few words.
    """
    if mode not in TRANSFORMS:
        raise UsageError(f"transform {mode!r} is not one of {', '.join(TRANSFORMS)}")
    if mode == "none":
        return Choice("none", 1.0, "the original scale, as requested (--transform none)")
    if not positive:
        if mode == "auto":
            return Choice("none", 1.0, "the original scale: some responses are zero or "
                                       "negative, so no log or power transform applies")
        raise DataError(f"the {mode} transform needs positive responses; some are zero or "
                        "negative (use --transform none)")
    if mode == "log":
        return Choice("log", 0.0, "the log scale, as requested (--transform log); effects are "
                                  "exact ratios")
    if mode == "boxcox":
        if profile is None:
            raise DataError(f"cannot estimate the Box-Cox λ: {why_no_profile}")
        lh = profile.lam_hat
        return Choice("boxcox", lh, f"a Box-Cox scale with λ = {lh:.2f}, as requested "
                                    "(--transform boxcox); ratios are approximate")
    is_ratio, why_ratio = ratio
    if not is_ratio:
        return Choice("none", 1.0, f"the original scale: {why_ratio}, so differences, not "
                                   "ratios, are what its effects mean")
    default = ("the log scale, the default for a positive, ratio-scaled response (effects are "
               "exact ratios)")
    if profile is None:
        return Choice("log", 0.0, f"{default}; λ cannot be estimated ({why_no_profile})")
    lo99, hi99 = profile.ci99 if profile.ci99 is not None else profile.ci
    strong = not (lo99 <= 0 <= hi99)
    if not strong:
        return Choice("log", 0.0, default)
    failing = log_check() if log_check is not None else None
    if not failing:
        return Choice("log", 0.0, f"{default}; the Box-Cox profile leans away from log (λ̂ = "
                                  f"{_num(profile.lam_hat)}, 99% interval {_num(lo99)} to "
                                  f"{_num(hi99)}), but the residuals on the log scale pass "
                                  "the normality and equal-variance checks, so log is kept")
    lam = _power_from_interval(profile)
    name = "log" if lam == 0 else "none" if lam == 1 else "boxcox"
    return Choice(name, float(lam),
                  f"{scale_words(name, lam)} instead of the log scale: λ = 0 lies outside the "
                  f"99% interval for λ ({_num(lo99)} to {_num(hi99)}, λ̂ = "
                  f"{_num(profile.lam_hat)}) and on the log scale {failing}")


def describe(choice: Choice, profile: Profile | None, requested: str, unit: str | None) -> dict:
    """The ``transform`` entry of analysis.json: the scale used, why, and the profile's evidence."""
    is_ratio, _ = ratio_scaled(unit)
    evidence = profile.sentence() if profile else None
    summary = f"Analysed on {choice.reason}."
    if evidence:
        summary += f" Box-Cox profile: {evidence}."
    return {
        "name": choice.name, "lambda": choice.lam, "requested": requested,
        "scale": scale_words(choice.name, choice.lam),
        "reason": choice.reason,
        "ratio_scaled": is_ratio, "unit": unit,
        "lambda_hat": profile.lam_hat if profile else None,
        "lambda_ci": list(profile.ci) if profile else None,
        "lambda_ci_open": list(profile.ci_open) if profile else None,
        "lambda_ci99": list(profile.ci99) if profile and profile.ci99 else None,
        "profile_df": profile.df if profile else None,
        "evidence": evidence,
        "summary": summary,
        "ratios": "exact (log scale)" if choice.name == "log" else
                  "approximate (delta method on back-transformed means)",
        "profile": ({"lambda": list(profile.grid), "loglik": list(profile.loglik)}
                    if profile else None),
    }


def profile_curve(boxcox: BoxCoxProfile | None, transform: dict | None, points: int = 81):
    """(λ grid, log-likelihood) of ``boxcox`` for the report's figure, or None.

    The grid spans [−2, 2], widened to half a unit past λ̂, the chosen λ and the
    ends of its interval (``transform`` is analysis.json's entry); λ where the
    model fits exactly give NaN (the likelihood is unbounded there).
    """
    if boxcox is None:
        return None
    tr = transform or {}
    lo, hi = -2.0, 2.0
    for v in [tr.get("lambda_hat"), tr.get("lambda"), *(tr.get("lambda_ci") or [])]:
        if v is not None and np.isfinite(v):
            lo, hi = min(lo, float(v) - 0.5), max(hi, float(v) + 0.5)
    grid = np.linspace(lo, hi, points)
    ll = np.array([boxcox.loglik(float(lam)) for lam in grid])
    ll[~np.isfinite(ll)] = np.nan
    return grid, ll


def _power_from_interval(profile: Profile) -> float:
    """1 when the 95% interval holds it; else the multiple of 0.5 nearest λ̂ inside, else λ̂ to 0.1."""
    lo, hi = profile.ci
    lh = profile.lam_hat
    if lo <= 1 <= hi:
        return 1.0
    half = round(lh * 2) / 2
    inside = [c for c in (half + k * 0.5 for k in (0, -1, 1)) if lo <= c <= hi]
    if inside:
        return float(min(inside, key=lambda c: abs(c - lh)))
    return float(round(lh, 1))


def recorded_transform(folder, response: str) -> dict | None:
    """The ``transform`` that a results folder's analysis.json records for ``response``."""
    import json
    from pathlib import Path

    if folder is None:
        return None
    try:
        data = json.loads((Path(folder) / "analysis.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(data, dict) or data.get("response") != response:
        return None
    tr = data.get("transform")
    return tr if isinstance(tr, dict) and tr.get("name") in ("log", "none", "boxcox") else None


def scale_for(response: str, values, folder=None, experiment=None) -> tuple[str, float, str]:
    """The scale a command that judges ``response`` uses: (name, λ, reason in a few words).

    The scale analysis.json records for that response when the folder has one
    (the analysis chose it with the full rule, Box-Cox evidence included);
    otherwise the same rule's default: the log scale for a positive,
    ratio-scaled response, else the original scale.
    """
    rec = recorded_transform(folder, response)
    if rec is not None:
        lam = float(rec.get("lambda", 0.0 if rec["name"] == "log" else 1.0))
        return rec["name"], lam, (f"{scale_words(rec['name'], lam)}, the scale analysis.json "
                                  f"records for {response}")
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if len(v) and not np.all(v > 0):
        return "none", 1.0, "the original scale: some values are zero or negative"
    is_ratio, why = ratio_scaled(unit_of_response(response, experiment, folder))
    if not is_ratio:
        return "none", 1.0, f"the original scale: {why}"
    return "log", 0.0, "the log scale, the default for a positive, ratio-scaled response"


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
