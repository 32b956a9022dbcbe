"""The second-order fit of a response-surface design, and what it says.

For the k coded settings x (design/surface.py) the analysed response z (log
scale by default, the scale the rest of the analysis uses) is fitted by least
squares to the full quadratic

    z = b0 + Σ b_i x_i + Σ b_ii x_i² + Σ_{i<j} b_ij x_i x_j

(Box & Wilson 1951). From the fit:

* **lack of fit**: the residual sum of squares splits into pure error (the
  spread of runs at the same settings: the centre runs, and every point when
  the design is replicated) and lack of fit; F = MS_lof / MS_pe (Montgomery,
  *Design and Analysis of Experiments*, ch. 11; Box & Draper 1987). A
  significant F means the quadratic does not describe the data: no value
  between the tested ones is proposed then.
* **the stationary point** x_s = −½ B⁻¹ b, where B holds b_ii on its diagonal
  and b_ij / 2 off it, and its kind from the eigenvalues of B (canonical
  analysis, Box & Wilson 1951): all positive a minimum, all negative a
  maximum, mixed signs a saddle. Each eigenvalue gets a delta-method interval
  (dλ = vᵀ dB v for its unit eigenvector v); when one covers zero the kind is
  not settled by the data.
* **its location's uncertainty**: a delta-method standard error per setting
  (x_s is a smooth function of the coefficients; dx_s = −½ B⁻¹ dg, where g(x)
  = b + 2Bx is the fitted gradient) and the exact joint confidence region of
  Box & Hunter (1954): the points x where the fitted gradient is consistent
  with zero, g(x)ᵀ Var(g(x))⁻¹ g(x) ≤ k F(1 − α; k, ν).
* **the best setting inside the explored region** (never outside it): the
  stationary point when it is the optimum (a minimum for a response where
  lower is better) and lies inside, otherwise the best point of the region's
  edge (the fitted surface minimised under the region's constraints from
  every design point, SLSQP), settings that take whole numbers rounded to
  the best whole-number point inside the region.

Everything returned is plain JSON-ready data (``analysis.json``'s ``surface``).
"""

from __future__ import annotations

import itertools
import math

import numpy as np

#: tolerance (coded units) for "inside the explored region"
INSIDE_TOL = 1e-6


def term_names(names) -> list[str]:
    """Names of the quadratic's terms in column order (``a^2`` a square, ``a:b`` a product)."""
    k = len(names)
    return (["Intercept"] + list(names) + [f"{n}^2" for n in names]
            + [f"{names[i]}:{names[j]}" for i, j in itertools.combinations(range(k), 2)])


def model_matrix(x: np.ndarray) -> np.ndarray:
    """Columns: 1, x_i, x_i², x_i x_j (i < j), in `term_names` order."""
    x = np.atleast_2d(np.asarray(x, dtype=float))
    k = x.shape[1]
    cols = [np.ones(len(x))] + [x[:, i] for i in range(k)] + [x[:, i] ** 2 for i in range(k)]
    cols += [x[:, i] * x[:, j] for i, j in itertools.combinations(range(k), 2)]
    return np.column_stack(cols)


class Quadratic:
    """A fitted (or stored) full quadratic: coefficients and their covariance."""

    def __init__(self, beta, cov, k: int, df: float):
        self.beta = np.asarray(beta, dtype=float)
        self.cov = np.asarray(cov, dtype=float)
        self.k = k
        self.df = df

    @property
    def linear(self) -> np.ndarray:
        return self.beta[1:1 + self.k]

    @property
    def B(self) -> np.ndarray:
        """The symmetric matrix of the quadratic part (b_ii diagonal, b_ij / 2 off it)."""
        k = self.k
        B = np.diag(self.beta[1 + k:1 + 2 * k])
        for n, (i, j) in enumerate(itertools.combinations(range(k), 2)):
            B[i, j] = B[j, i] = self.beta[1 + 2 * k + n] / 2
        return B

    def predict(self, x):
        """(value, standard error) of the fitted surface at coded points ``x``."""
        X = model_matrix(x)
        se = np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", X, self.cov, X), 0.0))
        return X @ self.beta, se

    def gradient_jacobian(self, x) -> np.ndarray:
        """d g(x) / d beta (k × p), g(x) = b + 2 B x the fitted gradient (linear in beta)."""
        k = self.k
        x = np.asarray(x, dtype=float)
        G = np.zeros((k, len(self.beta)))
        for i in range(k):
            G[i, 1 + i] = 1.0
            G[i, 1 + k + i] = 2 * x[i]
        for n, (i, j) in enumerate(itertools.combinations(range(k), 2)):
            G[i, 1 + 2 * k + n] = x[j]
            G[j, 1 + 2 * k + n] = x[i]
        return G

    def gradient(self, x) -> np.ndarray:
        return self.gradient_jacobian(x) @ self.beta

    def box_hunter(self, x) -> float:
        """Box & Hunter's (1954) statistic at x: g(x)ᵀ Var(g(x))⁻¹ g(x) / k (an F(k, ν)
        variable at the true stationary point)."""
        G = self.gradient_jacobian(x)
        g = G @ self.beta
        V = G @ self.cov @ G.T
        try:
            return float(g @ np.linalg.solve(V, g)) / self.k
        except np.linalg.LinAlgError:
            return math.inf

    def box_hunter_many(self, xs) -> np.ndarray:
        """`box_hunter` at every row of ``xs`` (inf where the gradient's variance is singular)."""
        xs = np.atleast_2d(np.asarray(xs, dtype=float))
        G = np.stack([self.gradient_jacobian(x) for x in xs])
        g = G @ self.beta
        V = G @ self.cov @ np.swapaxes(G, 1, 2)
        out = np.full(len(xs), np.inf)
        ok = np.abs(np.linalg.det(V)) > 0
        if ok.any():
            sol = np.linalg.solve(V[ok], g[ok][..., None])[..., 0]
            out[ok] = np.einsum("ij,ij->i", g[ok], sol) / self.k
        return out

    def stationary(self):
        """(x_s, its covariance by the delta method), or None when B is singular."""
        B = self.B
        if abs(np.linalg.det(B)) < 1e-12 * max(1.0, np.abs(B).max() ** self.k):
            return None
        xs = -0.5 * np.linalg.solve(B, self.linear)
        J = -0.5 * np.linalg.solve(B, self.gradient_jacobian(xs))
        return xs, J @ self.cov @ J.T

    def eigen(self):
        """Eigenvalues of B (ascending), their standard errors (delta method), eigenvectors."""
        w, V = np.linalg.eigh(self.B)
        k = self.k
        ses = []
        for j in range(k):
            v = V[:, j]
            g = np.zeros(len(self.beta))
            g[1 + k:1 + 2 * k] = v ** 2
            for n, (a, b) in enumerate(itertools.combinations(range(k), 2)):
                g[1 + 2 * k + n] = v[a] * v[b]
            ses.append(math.sqrt(max(float(g @ self.cov @ g), 0.0)))
        return w, np.array(ses), V


def fit_quadratic(x: np.ndarray, z: np.ndarray) -> tuple[Quadratic, dict]:
    """Least-squares fit of the full quadratic; (Quadratic, sums of squares)."""
    x = np.asarray(x, dtype=float)
    z = np.asarray(z, dtype=float)
    X = model_matrix(x)
    n, p = X.shape
    beta, *_ = np.linalg.lstsq(X, z, rcond=None)
    resid = z - X @ beta
    sse = float(resid @ resid)
    df = n - p
    s2 = sse / df if df > 0 else math.nan
    cov = s2 * np.linalg.pinv(X.T @ X)
    ss_total = float(((z - z.mean()) ** 2).sum())
    return Quadratic(beta, cov, x.shape[1], df), {"sse": sse, "df_resid": df, "n": n, "p": p,
                                                   "ss_total": ss_total, "resid": resid}


def lack_of_fit(x: np.ndarray, z: np.ndarray, sse: float, p: int, alpha: float) -> dict:
    """The lack-of-fit test against pure error (runs repeated at the same settings)."""
    from benchharness.analysis import dist as stats

    keys = [tuple(np.round(r, 9)) for r in np.asarray(x, dtype=float)]
    groups: dict = {}
    for key, v in zip(keys, z):
        groups.setdefault(key, []).append(float(v))
    ss_pe = sum(float(((np.array(g) - np.mean(g)) ** 2).sum()) for g in groups.values())
    n, m = len(z), len(groups)
    df_pe, df_lof = n - m, m - p
    ss_lof = max(sse - ss_pe, 0.0)
    out = {"points": m, "df_lack_of_fit": df_lof, "df_pure_error": df_pe,
           "ss_lack_of_fit": ss_lof, "ss_pure_error": ss_pe, "F": None, "p": None}
    if df_pe <= 0:
        out["verdict"] = "not tested"
        out["statement"] = ("The lack of fit could not be tested: no settings were run "
                            "more than once (add centre runs)")
        return out
    if df_lof <= 0:
        out["verdict"] = "not tested"
        out["statement"] = ("The lack of fit could not be tested: the design has no points "
                            "beyond those the quadratic needs")
        return out
    ms_pe = ss_pe / df_pe
    F = (ss_lof / df_lof) / ms_pe if ms_pe > 0 else (math.inf if ss_lof > 0 else 0.0)
    pv = float(stats.f.sf(F, df_lof, df_pe)) if math.isfinite(F) else 0.0
    out.update(F=F, p=pv)
    if pv < alpha:
        out["verdict"] = "does not fit"
        out["statement"] = (f"The second-order surface does not fit: it misses the data by "
                            f"more than the spread of repeated runs (lack of fit F = {F:.3g}, "
                            f"{p_words(pv)}); values between the tested ones are not proposed")
    else:
        out["verdict"] = "fits"
        out["statement"] = (f"The second-order surface fits: it misses the data by no more "
                            f"than the spread of repeated runs explains (lack of fit "
                            f"F = {F:.3g}, {p_words(pv)})")
    return out


def p_words(p: float) -> str:
    """A p-value in a sentence (``p = 0.013``, ``p < 0.001``: `numbers.fmt_p_said`)."""
    from benchharness.numbers import fmt_p_said

    return fmt_p_said(p)


# ---- the explored region and the best point in it --------------------------------------

def inside(x, region: dict) -> bool:
    x = np.asarray(x, dtype=float)
    return bool(np.all(np.abs(x) <= region["reach"] + INSIDE_TOL)
                and float(np.sqrt(x @ x)) <= region["radius"] + INSIDE_TOL)


def best_in_region(q: Quadratic, region: dict, sign: float, starts) -> np.ndarray:
    """The point of the explored region where ``sign · fitted`` is smallest (SLSQP from
    every start; the region's box as bounds, its sphere as a constraint)."""
    from scipy.optimize import minimize

    reach, radius = region["reach"], region["radius"]

    def f(x):
        return sign * float((model_matrix(x[None, :]) @ q.beta)[0])

    def grad(x):
        return sign * q.gradient(x)

    cons = [{"type": "ineq", "fun": lambda x: radius ** 2 - float(x @ x),
             "jac": lambda x: -2 * x}]
    best, best_val = None, math.inf
    for s in starts:
        s = np.clip(np.asarray(s, dtype=float), -reach, reach)
        norm = float(np.sqrt(s @ s))
        if norm > radius:
            s = s * radius / norm
        r = minimize(f, s, jac=grad, method="SLSQP", bounds=[(-reach, reach)] * q.k,
                     constraints=cons, options={"maxiter": 200, "ftol": 1e-12})
        x = r.x if inside(r.x, region) else s
        v = f(x)
        if v < best_val - 1e-12:
            best, best_val = x, v
    return best


def whole_number_point(q: Quadratic, x: np.ndarray, settings, region: dict, sign: float):
    """Round the settings that take whole numbers: the best whole-number neighbour of ``x``
    inside the region (coded values as run), or ``x`` when no setting is whole."""
    options = []
    for s, xi in zip(settings, x):
        if not s.whole:
            options.append([xi])
            continue
        v = s.exact(xi)
        cands = {math.floor(v), math.ceil(v)}
        options.append([s.coded(c) for c in sorted(cands) if c > 0 or s.low <= 0])
    best, best_val = None, math.inf
    for combo in itertools.product(*options):
        c = np.array(combo)
        if not inside(c, region):
            continue
        v = sign * float(q.predict(c[None, :])[0][0])
        if v < best_val:
            best, best_val = c, v
    return best


# ---- the whole analysis of a surface ----------------------------------------------------

def analyse(design, x: np.ndarray, z: np.ndarray, choice, alpha: float = 0.05,
            better: str = "lower", response: str = "wall_s") -> dict:
    """The ``surface`` entry of analysis.json from coded settings ``x`` (one row per run,
    values as run) and the analysed response ``z`` on the scale ``choice``."""
    from benchharness.analysis import dist as stats

    names = list(design.names)
    k = len(names)
    q, ss = fit_quadratic(x, z)
    df = ss["df_resid"]
    if df <= 0:
        return {"fitted": False, "settings": names,
                "statement": f"The second-order surface needs more than {ss['p']} runs "
                             f"({ss['n']} analysed); no surface was fitted"}
    tq = float(stats.t.ppf(1 - alpha / 2, df))
    se = np.sqrt(np.maximum(np.diag(q.cov), 0.0))
    terms = []
    for name, b, s in zip(term_names(names), q.beta, se):
        t = b / s if s > 0 else math.nan
        p = float(2 * stats.t.sf(abs(t), df)) if math.isfinite(t) else None
        terms.append({"term": name, "coef": float(b), "se": float(s), "t": t, "p": p,
                      "ci_low": float(b - tq * s), "ci_high": float(b + tq * s)})
    ss_model = ss["ss_total"] - ss["sse"]
    df_model = ss["p"] - 1
    F_model = (ss_model / df_model) / (ss["sse"] / df) if ss["sse"] > 0 else math.inf
    p_model = float(stats.f.sf(F_model, df_model, df)) if math.isfinite(F_model) else 0.0
    lof = lack_of_fit(x, z, ss["sse"], ss["p"], alpha)
    sign = 1.0 if better == "lower" else -1.0
    region = design.region()
    out = {
        "fitted": True, "settings": names, "scale": choice.name, "alpha": alpha,
        "better": better, "response": response,
        "coding": [s.to_json_dict() | {"centre": s.centre, "half_range": s.half}
                   for s in design.settings],
        "region": region, "terms": terms,
        "covariance": q.cov.tolist(), "df_resid": df,
        "residual_sd": math.sqrt(ss["sse"] / df),
        "r_squared": 1 - ss["sse"] / ss["ss_total"] if ss["ss_total"] > 0 else None,
        "model_F": F_model, "model_p": p_model, "lack_of_fit": lof,
        "tested_points": np.unique(np.round(x, 9), axis=0).tolist(),
    }
    out["stationary_point"] = _stationary(q, design, region, alpha, df, tq, sign, choice)
    out["canonical"] = _canonical(q, tq, names)
    out["proposal"] = _proposal(q, design, x, z, region, sign, choice, alpha, tq, out)
    return out


def _actual(design, xc) -> dict:
    return {s.name: s.exact(float(v)) for s, v in zip(design.settings, xc)}


def _stationary(q: Quadratic, design, region, alpha, df, tq, sign, choice) -> dict | None:
    from scipy.special import fdtri

    st = q.stationary()
    if st is None:
        return None
    xs, cov = st
    se = np.sqrt(np.maximum(np.diag(cov), 0.0))
    w, wse, _vectors = q.eigen()
    kind = "minimum" if np.all(w > 0) else "maximum" if np.all(w < 0) else "saddle"
    value, vse = q.predict(xs[None, :])
    intervals = {}
    for s, c, e in zip(design.settings, xs, se):
        lo, hi = c - tq * e, c + tq * e
        intervals[s.name] = [_exact_or_none(s, lo), _exact_or_none(s, hi)]
    crit = float(fdtri(q.k, df, 1 - alpha))
    region_hits_edge = _region_reaches_edge(q, region, crit)
    return {
        "coded": xs.tolist(), "se_coded": se.tolist(),
        "coded_intervals": [[float(c - tq * e), float(c + tq * e)] for c, e in zip(xs, se)],
        "actual": _actual(design, xs), "actual_intervals": intervals,
        "kind": kind, "kind_settled": bool(np.all(np.abs(w) > tq * wse)),
        "inside_region": inside(xs, region),
        "optimum": kind == ("minimum" if sign > 0 else "maximum"),
        "predicted": float(_back(value[0], choice)),
        "predicted_interval": [float(_back(value[0] - tq * vse[0], choice)),
                               float(_back(value[0] + tq * vse[0], choice))],
        "confidence_region": {"method": "Box & Hunter (1954)", "critical_F": crit,
                              "reaches_region_edge": region_hits_edge},
    }


def _exact_or_none(s, coded: float):
    try:
        v = s.exact(coded)
    except (ValueError, OverflowError):
        return None
    return v if math.isfinite(v) else None


def _back(zv, choice):
    from benchharness.analysis.transform import inverse

    return float(inverse(np.array([zv]), choice)[0])


def _region_reaches_edge(q: Quadratic, region: dict, crit: float, n: int = 1500) -> bool:
    """Whether the Box-Hunter confidence region touches the explored region's edge (fixed
    sample of edge points: the sphere's surface clipped to the box, and the box's faces)."""
    rng = np.random.default_rng(12345)
    d = rng.normal(size=(n, q.k))
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    pts = np.clip(d * region["radius"], -region["reach"], region["reach"])
    return bool(np.any(q.box_hunter_many(pts) <= crit))


def _canonical(q: Quadratic, tq: float, names) -> list[dict]:
    w, wse, V = q.eigen()
    out = []
    for j in range(len(w)):
        out.append({"eigenvalue": float(w[j]), "se": float(wse[j]),
                    "ci_low": float(w[j] - tq * wse[j]), "ci_high": float(w[j] + tq * wse[j]),
                    "direction": {n: float(v) for n, v in zip(names, V[:, j])}})
    return out


def _proposal(q, design, x, z, region, sign, choice, alpha, tq, fit: dict) -> dict:
    """The best setting inside the explored region, or why none is proposed."""
    lof, st = fit["lack_of_fit"], fit.get("stationary_point")
    tested = _best_tested(design, x, z, sign)
    out: dict = {"tested_best": tested}
    if lof["verdict"] == "does not fit":
        out.update(supported=False, reason="lack_of_fit")
        return out
    if fit["model_p"] >= alpha:
        out.update(supported=False, reason="flat")
        return out
    starts = [tuple(r) for r in np.unique(np.round(x, 9), axis=0)]
    if st is not None and st["optimum"] and st["inside_region"]:
        xc, where = np.array(st["coded"]), "stationary point"
    else:
        if st is not None:
            starts.append(tuple(st["coded"]))
        xc, where = best_in_region(q, region, sign, starts), "edge of the explored region"
        if st is not None and st["optimum"] and not st["inside_region"]:
            where = "edge of the explored region (the fitted optimum lies outside it)"
    xr = whole_number_point(q, xc, design.settings, region, sign)
    if xr is None:
        out.update(supported=False, reason="no_whole_number_point")
        return out
    rival = _tested_predicted_better(q, design, x, xr, sign)
    if rival is not None:
        # a setting already run (an axial point rounded beyond the region's edge, or the
        # rounded point itself) is predicted at least as good: a value between the tested
        # levels is proposed only when the fit predicts it better than every tested one
        out.update(supported=False, reason="tested_better", tested_predicted_best=rival)
        return out
    value, vse = q.predict(xr[None, :])
    out.update(supported=True, where=where, coded=xr.tolist(),
               actual={s.name: (round(s.exact(float(v))) if s.whole else s.exact(float(v)))
                       for s, v in zip(design.settings, xr)},
               rounded=[s.name for s in design.settings if s.whole],
               predicted=_back(value[0], choice),
               predicted_interval=[_back(value[0] - tq * vse[0], choice),
                                   _back(value[0] + tq * vse[0], choice)])
    # against the best tested point, on the analysis scale (a ratio on the log scale)
    xt = np.array(tested["coded"])
    L = model_matrix(xr[None, :])[0] - model_matrix(xt[None, :])[0]
    diff = float(L @ q.beta)
    dse = math.sqrt(max(float(L @ q.cov @ L), 0.0))
    if choice.name == "log":
        out["against_tested_best"] = {"ratio": math.exp(diff),
                                      "ratio_low": math.exp(diff - tq * dse),
                                      "ratio_high": math.exp(diff + tq * dse)}
    else:
        out["against_tested_best"] = {"difference": diff, "low": diff - tq * dse,
                                      "high": diff + tq * dse}
    return out


def _tested_predicted_better(q: Quadratic, design, x, xr, sign) -> dict | None:
    """The tested setting (as run) the fit predicts best, when it is predicted at least as
    good as the proposal ``xr`` (so also when ``xr`` is itself a tested setting: rounding
    can land on one); else None."""
    pts = np.unique(np.round(np.asarray(x, dtype=float), 9), axis=0)
    bad = sign * q.predict(pts)[0]
    j = int(np.argmin(bad))
    if bad[j] > sign * float(q.predict(np.asarray(xr)[None, :])[0][0]) + 1e-12:
        return None
    return {"coded": pts[j].tolist(), "actual": _actual(design, pts[j])}


def _best_tested(design, x, z, sign) -> dict:
    """The tested setting with the best mean analysed response."""
    keys = [tuple(np.round(r, 9)) for r in np.asarray(x, dtype=float)]
    means: dict = {}
    for key, v in zip(keys, z):
        means.setdefault(key, []).append(float(v))
    key = min(means, key=lambda kk: sign * float(np.mean(means[kk])))
    return {"coded": list(key), "actual": _actual(design, key), "runs": len(means[key])}


# ---- the hook in `analyze` and the findings ---------------------------------------------

def from_analysis(prep, fnames, flevels, codes, z, choice, alpha: float, better: str):
    """The ``surface`` entry for an analysis whose experiment has a response-surface design
    (None otherwise, or when the analysed factors are not its settings)."""
    exp = prep.experiment
    if exp is None:
        return None
    from benchharness.design.spec import design_of

    design = design_of(exp).surface
    if design is None or any(n not in fnames for n in design.names):
        return None
    cols = []
    for s in design.settings:
        i = list(fnames).index(s.name)
        try:
            coded = np.array([s.coded(float(v)) for v in flevels[i]])
        except ValueError:
            return None
        cols.append(coded[np.asarray(codes[i])])
    out = analyse(design, np.column_stack(cols), np.asarray(z, dtype=float), choice, alpha,
                  better, prep.response)
    out["findings"] = findings(out, design)
    return out


def _setting_text(design, values: dict, intervals: dict | None = None) -> str:
    from benchharness.design.surface import number_label

    parts = []
    for s in design.settings:
        v = values[s.name]
        text = f"{s.name}={number_label(v, s.whole and float(v).is_integer())}"
        if intervals and intervals.get(s.name) and None not in intervals[s.name]:
            lo, hi = intervals[s.name]
            text += f" [{number_label(lo)} to {number_label(hi)}]"
        parts.append(text)
    return ", ".join(parts)


def _finding(part: str, statement: str, settings, **extra) -> dict:
    return {"kind": "surface", "part": part, "terms": [], "factors": list(settings),
            "significant": extra.pop("significant", None), "ratio": extra.pop("ratio", None),
            "lower": extra.pop("lower", None), "upper": extra.pop("upper", None),
            "p": extra.pop("p", None), "statement": statement, **extra}


def findings(fit: dict, design) -> list[dict]:
    """Plain-words findings of a surface: the stationary point, the fit, the proposal."""
    from benchharness.analysis.findings import fmt_interval, fmt_ratio, fmt_value

    names = fit["settings"]
    if not fit.get("fitted"):
        return [_finding("fit", fit["statement"], names)]
    conf = f"{round((1 - fit['alpha']) * 100):g}%"
    resp = fit["response"]
    out = [_finding("stationary", _stationary_text(fit, design, conf), names)]
    lof = fit["lack_of_fit"]
    out.append(_finding("fit", lof["statement"], names, p=lof.get("p"),
                        significant=lof["verdict"] == "does not fit"))
    pr = fit["proposal"]
    tested = _setting_text(design, pr["tested_best"]["actual"])
    if not pr["supported"]:
        why = {"lack_of_fit": "the surface does not fit",
               "flat": ("the settings make no detectable difference within the explored "
                        f"region (the surface's F test, {p_words(fit['model_p'])})"),
               "no_whole_number_point": "no whole-number setting lies inside the region",
               "tested_better": tested_better_words(pr, design)}
        out.append(_finding("proposal", f"No setting between the tested values is proposed "
                                        f"because {why[pr['reason']]}; the best tested "
                                        f"setting is {tested}", names, supported=False))
        return out
    out.append(_finding("proposal", _proposal_text(fit, design, tested, conf), names,
                        supported=True, **_against(pr)))
    return out


def tested_better_words(pr: dict, design) -> str:
    """Why no value between the tested levels is proposed when a tested setting is predicted
    better than all of them, in words."""
    rival = pr.get("tested_predicted_best")
    if not rival:
        return ""
    same = np.allclose(rival["coded"], pr["tested_best"]["coded"])
    who = ("the best tested setting" if same else "the tested setting "
           + _setting_text(design, rival["actual"]))
    return ("the fitted surface predicts no untested setting inside the explored region "
            f"better than {who}")


def _against(pr: dict) -> dict:
    a = pr.get("against_tested_best") or {}
    if "ratio" not in a:
        return {}
    return {"ratio": a["ratio"], "lower": a["ratio_low"], "upper": a["ratio_high"]}


def _proposal_text(fit: dict, design, tested: str, conf: str) -> str:
    """The proposal in words: where, why it is supported, what it is predicted to give,
    how it compares with the best tested setting, and how sure its location is."""
    from benchharness.analysis.findings import fmt_interval, fmt_ratio, fmt_value

    pr, lof, st = fit["proposal"], fit["lack_of_fit"], fit.get("stationary_point") or {}
    resp = fit["response"]
    where = ("the fitted surface's " + st["kind"] if pr["where"] == "stationary point"
             else "the best point on the " + pr["where"])
    rounded = "; whole numbers rounded" if pr["rounded"] else ""
    fits = ("the second-order surface fits (lack of fit " + p_words(lof["p"]) + ")"
            if lof.get("p") is not None else "the lack of fit could not be tested")
    lo, hi = pr["predicted_interval"]
    text = (f"Proposed setting: {_setting_text(design, pr['actual'])} ({where}{rounded}), a "
            f"value between the tested levels supported by the fitted surface: {fits}; "
            f"predicted {resp} {fmt_value(pr['predicted'], resp)} "
            f"[{fmt_value(lo, resp)} to {fmt_value(hi, resp)}]")
    a = _against(pr)
    if a:
        text += (f", {fmt_ratio(a['ratio'])} {fmt_interval(a['lower'], a['upper'])} the best "
                 f"tested setting ({tested})")
        if a["lower"] <= 1 <= a["upper"]:
            text += ", so not shown better than it"
    text += f" ({conf} intervals)"
    if pr["where"] == "stationary point" and (
            not st.get("kind_settled") or st["confidence_region"]["reaches_region_edge"]):
        text += ("; where the optimum lies is uncertain (see the stationary point): more "
                 "runs, or a design centred on the proposal, would pin it down")
    return text


def _stationary_text(fit: dict, design, conf: str) -> str:
    st = fit.get("stationary_point")
    if fit["model_p"] >= fit["alpha"]:
        return (f"The settings make no detectable difference within the explored region "
                f"(the second-order fit's F test, {p_words(fit['model_p'])}): the fitted "
                "surface's shape and its stationary point are noise")
    if st is None:
        return ("The fitted surface has no single stationary point (its curvature vanishes "
                "along some direction: a ridge); the best setting lies on the region's edge")
    where = ("inside the explored region" if st["inside_region"] else
             "outside the explored region, where the surface was not measured")
    text = (f"The fitted surface has a {st['kind']} at "
            f"{_setting_text(design, st['actual'], st['actual_intervals'])} "
            f"({conf} intervals), {where}")
    if not st["kind_settled"]:
        text += ("; the data do not settle whether it is a minimum, maximum or saddle "
                 "(the interval of a curvature includes zero)")
    if st["confidence_region"]["reaches_region_edge"]:
        text += (f"; its {conf} confidence region (Box & Hunter 1954) reaches the edge of "
                 "the explored region, so its location is not pinned down")
    return text
