"""Residuals, fitted values and the Box-Cox profile that the report's figures need.

The analysis stage decides the model (which terms, which transform); this module
only re-derives, from the runs table and the analysis result, the per-run numbers
the diagnostic figures plot, when the `Analysis` object does not carry them
itself (e.g. a report built from a stored ``analysis.json``).

Fitted values are the least-squares projection of the transformed response onto
the span of the model's terms. Each term (``a``, ``a:b``, a block) spans the
indicator columns of its level combinations, so the projection onto the sum of
those spans is found by backfitting group means (alternating projections; von
Neumann 1950, as used for additive models by Buja, Hastie & Tibshirani 1989),
one O(N) pass per sweep and exact in one sweep for a full factorial. The Box-Cox
profile log-likelihood is that of Box & Cox (1964):
``l(λ) = -n/2 · log(RSS(λ)/n) + (λ - 1) · Σ log y``.
"""

from __future__ import annotations

from itertools import combinations

import numpy as np


def term_factors(term: str, names: list[str]) -> tuple[str, ...] | None:
    """Split an ANOVA term (``a:b``) into its columns without trusting ':' inside names."""
    if term in names:
        return (term,)
    for k in range(2, len(names) + 1):
        for combo in combinations(names, k):
            if ":".join(combo) == term:
                return combo
    return None


def model_terms(analysis: dict, factors: list[str], block: str | None) -> list[tuple[str, ...]]:
    """The model terms named by the ANOVA rows (without Residual)."""
    names = list(factors) + ([block] if block and block not in factors else [])
    terms = []
    for row in analysis.get("anova") or []:
        term = row.get("term")
        if not term or term == "Residual":
            continue
        parts = term_factors(term, names)
        if parts is not None:
            terms.append(parts)
    if not terms:
        terms = [(f,) for f in factors]
    return terms


def apply_transform(y: np.ndarray, name: str, lam: float | None) -> np.ndarray:
    """The analysis scale: identity, natural log, or Box-Cox with λ."""
    if name == "log" or (name == "boxcox" and lam is not None and abs(lam) < 1e-12):
        return np.log(y)
    if name == "boxcox":
        return (np.power(y, lam) - 1.0) / lam
    return y.astype(float)


def _maximal(terms: list[tuple[str, ...]]) -> list[tuple[str, ...]]:
    sets = [frozenset(t) for t in terms]
    keep = []
    for t, s in zip(terms, sets):
        if not any(s < other for other in sets) and t not in keep:
            keep.append(t)
    return keep


def _codes(frame, cols: tuple[str, ...]) -> np.ndarray:
    import pandas as pd

    if len(cols) == 1:
        return pd.factorize(frame[cols[0]].astype(str))[0]
    key = frame[list(cols)].astype(str).agg("\x1f".join, axis=1)
    return pd.factorize(key)[0]


class Projector:
    """Projects a response vector onto the span of the model's group indicators."""

    def __init__(self, groups: list[np.ndarray]):
        self.groups = groups
        self.counts = [np.bincount(g).astype(float) for g in groups]

    def _gmean(self, j: int, v: np.ndarray) -> np.ndarray:
        g = self.groups[j]
        return (np.bincount(g, weights=v, minlength=len(self.counts[j])) / self.counts[j])[g]

    def fit(self, y: np.ndarray) -> np.ndarray:
        mean = float(y.mean())
        yc = y - mean
        if not self.groups:
            return np.full_like(y, mean, dtype=float)
        if len(self.groups) == 1:
            return mean + self._gmean(0, yc)
        parts = [np.zeros_like(yc) for _ in self.groups]
        total = np.zeros_like(yc)
        scale = float(np.abs(yc).max()) or 1.0
        for _sweep in range(1000):
            change = 0.0
            for j in range(len(self.groups)):
                new = self._gmean(j, yc - (total - parts[j]))
                step = new - parts[j]
                total += step
                parts[j] = new
                change = max(change, float(np.abs(step).max()))
            if change <= 1e-11 * scale:
                break
        return mean + total


def prepare(runs, analysis: dict, factors: list[str], block: str | None = None):
    """Rows the analysis used, their positive response and a `Projector` for the model."""
    import pandas as pd

    response = analysis.get("response", "wall_s")
    frame = runs
    if "status" in frame.columns:
        frame = frame[frame["status"].astype(str) == "ok"]
    y = pd.to_numeric(frame[response], errors="coerce")
    name = (analysis.get("transform") or {}).get("name", "none")
    keep = y.notna() & np.isfinite(y)
    if name in ("log", "boxcox"):
        keep &= y > 0
    frame = frame[keep.to_numpy()]
    y = y[keep].to_numpy(dtype=float)
    terms = model_terms(analysis, factors, block)
    groups = [_codes(frame, t) for t in _maximal(terms)]
    return frame, y, Projector(groups)


def residual_table(runs, analysis: dict, factors: list[str], block: str | None = None):
    """DataFrame of run, position, factor levels, fitted and residual on the analysis scale."""
    import pandas as pd

    frame, y, proj = prepare(runs, analysis, factors, block)
    tr = analysis.get("transform") or {}
    z = apply_transform(y, tr.get("name", "none"), tr.get("lambda"))
    fitted = proj.fit(z)
    out = pd.DataFrame({
        "run": frame["run"].to_numpy() if "run" in frame else np.arange(len(frame)),
        "position": (frame["position"].to_numpy() if "position" in frame
                     else np.arange(len(frame))),
    })
    for f in factors:
        out[f] = frame[f].astype(str).to_numpy()
    out["fitted"] = fitted
    out["residual"] = z - fitted
    return out


def boxcox_profile(runs, analysis: dict, factors: list[str], block: str | None = None,
                   grid=None):
    """DataFrame (lambda, loglik) of the Box-Cox profile log-likelihood, or None.

    None when the response has a value that is not positive (Box-Cox undefined).
    """
    import pandas as pd

    frame, y, proj = prepare(runs, analysis, factors, block)
    if len(y) < 3 or (y <= 0).any():
        return None
    tr = analysis.get("transform") or {}
    if grid is None:
        lo, hi = -2.0, 2.0
        for v in [tr.get("lambda_hat"), tr.get("lambda"), *(tr.get("lambda_ci") or [])]:
            if v is not None and np.isfinite(v):
                lo, hi = min(lo, float(v) - 0.5), max(hi, float(v) + 0.5)
        grid = np.linspace(lo, hi, 81)
    logy = np.log(y)
    # Scale y by its geometric mean for numerical stability; the profile is unchanged
    # up to a constant in λ (Box & Cox 1964, the normalised transform).
    gm = float(np.exp(logy.mean()))
    ys = y / gm
    nu = float(tr.get("profile_df") or len(y))
    out = []
    for lam in grid:
        z = np.log(ys) if abs(lam) < 1e-12 else (np.power(ys, lam) - 1.0) / lam
        rss = float(((z - proj.fit(z)) ** 2).sum())
        if rss <= 0:
            out.append(np.nan)
            continue
        # The normalised transform z = (y^λ − 1)/(λ ġ^(λ−1)) has RSS_scaled · ġ²; the
        # profile uses the analysis's residual degrees of freedom ν (transform.py).
        ll = -0.5 * nu * np.log(rss * gm * gm / nu)
        out.append(ll)
    return pd.DataFrame({"lambda": np.asarray(grid, dtype=float), "loglik": out})
