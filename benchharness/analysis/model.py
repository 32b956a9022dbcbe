"""The fixed-effects linear model of a factorial experiment, fitted from cell statistics.

Owns: the list of model terms (grand mean, main effects, interactions up to a
chosen order, an additive block term), the design matrix over observed cells
with sum-to-zero ("effect") coding built directly with numpy (never from a
formula string), and the ANOVA sums of squares:

* Type II: each term adjusted for every term that does not contain it
  (Yates 1934; Langsrud 2003, *Statistics and Computing* 13:163).
* Type III: each term adjusted for every other term, with sum-to-zero coding,
  i.e. the hypotheses on unweighted marginal means (Searle, *Linear Models for
  Unbalanced Data*, 1987, ch. 4).

The weighted least-squares problem on cell means with weights = cell counts
gives exactly the row-level fit; each sum of squares is the squared length of
the projection of the weighted cell means on the part of a term's column space
orthogonal to the terms it is adjusted for, computed from orthonormal bases
(SVD) so that no large numbers are subtracted. Empty cells make some columns
linearly dependent; the rank drop tells which effects lose degrees of freedom
(inestimable effects), and Type III, which is then not uniquely defined, falls
back to Type II with a note.

Cost. The cell design has one row per *observed* cell and one column per
parameter, never a row per run nor a row per possible cell. It is factored
once (pivoted QR), and every later projection works on the small triangular
factor instead of the design (an orthogonal change of basis keeps every sum of
squares). A term contained in no other term is tested from the full fit by
the Wald form b' V⁻¹ b when the fit has full rank (equal to the extra sum of
squares; Searle 1971, ch. 5). `limit_terms` keeps the requested term set only
while it has no more parameters than runs and stays under
`MAX_PARAMETERS` and `MAX_WORK`; otherwise the highest-order interactions are
left out and the caller says so.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from itertools import combinations

import numpy as np

from benchharness.errors import UsageError
from benchharness.analysis.cells import Cells, Moments


@dataclass(frozen=True)
class Term:
    factors: tuple[int, ...]   # indices into the layout's factor list
    name: str
    is_block: bool = False
    #: the factor products whose columns make up the term (default: ``factors`` alone); a
    #: nested term ``b within a`` is made of ``b`` and ``a:b`` (`analysis.incomplete`)
    parts: tuple[tuple[int, ...], ...] | None = None

    @property
    def products(self) -> tuple[tuple[int, ...], ...]:
        return self.parts if self.parts is not None else (self.factors,)


def model_terms(names, model="full", block_index=None) -> list[Term]:
    """Terms of the model ``full`` | ``main`` | N (interactions up to order N).

    ``names`` are the layout's factor names (the block, if any, at
    ``block_index``). The block enters additively, first; factor terms follow
    by order, then in the listed factor order.
    """
    factor_idx = [i for i in range(len(names)) if i != block_index]
    k = len(factor_idx)
    if isinstance(model, str):
        spec = model.strip().lower()
        if spec == "full":
            order = k
        elif spec == "main":
            order = 1
        elif spec.isdigit():
            order = int(spec)
        else:
            raise UsageError(f"model {model!r} is not understood; use full, main or a number "
                             "(interactions up to that order)")
    elif isinstance(model, (int, np.integer)) and not isinstance(model, bool):
        order = int(model)
    else:
        raise UsageError(f"model {model!r} is not understood; use full, main or a number")
    if order < 1:
        raise UsageError("the model order must be at least 1 (main effects)")
    order = min(order, k)
    terms = []
    if block_index is not None:
        terms.append(Term((block_index,), names[block_index], is_block=True))
    for r in range(1, order + 1):
        for combo in combinations(factor_idx, r):
            terms.append(Term(combo, ":".join(names[i] for i in combo)))
    return terms


#: relative spread below which a response counts as having no variation at all: the
#: residual root mean square under this fraction of the root mean square value is
#: round-off of equal values (double precision keeps about 16 digits).
ZERO_SPREAD = 1e-12

#: the largest number of parameters (columns of the cell design) a model may have.
MAX_PARAMETERS = 2000
#: the largest estimated work of one fit, in floating-point operations (about 10 s on one
#: busy core of the development machine at the top; see `fit_work`).
MAX_WORK = 2.0e9


def parameter_count(terms, sizes) -> int:
    """Columns of the cell design of ``terms``: 1 + the product of (levels - 1) per term."""
    p = 1
    for t in terms:
        for part in t.products:
            d = 1
            for f in part:
                d *= max(int(sizes[f]) - 1, 0)
            p += d
    return p


def fit_work(terms, sizes, n_cells: int) -> float:
    """Estimated floating-point operations of `fit_model`.

    One QR of the (cells × p) design; a term contained in no other is tested
    from the full fit (cheap), each other term needs a QR of the p-column
    triangular factor.
    """
    terms = list(terms)
    p = parameter_count(terms, sizes)
    c = max(int(n_cells), 1)
    inner = sum(1 for t in terms
                if any(o is not t and set(o.factors) > set(t.factors) for o in terms))
    return 2.0 * c * p * p + 2.0 * inner * float(p) ** 3


@dataclass(frozen=True)
class TermLimit:
    """What `limit_terms` kept: the terms, their order and why (None when all were kept)."""

    terms: list
    order: int | None           # highest interaction order kept (None: unchanged)
    requested: int              # parameters of the requested term set
    fitted: int                 # parameters of the kept term set
    reason: str | None          # "rows", "parameters" or "work"
    message: str | None         # one line for the user


def _refusal(ts, sizes, n_cells: int, n_rows: int):
    """Why the term set ``ts`` cannot be fitted ("rows", "parameters", "work"), or None."""
    p = parameter_count(ts, sizes)
    if p > max(int(n_rows), 1):
        return "rows"
    if p > MAX_PARAMETERS:
        return "parameters"
    if fit_work(ts, sizes, n_cells) > MAX_WORK:
        return "work"
    return None


def _main_effects_too_large(kept, sizes, why, n_cells: int, n_rows: int) -> UsageError:
    """The error when even the main effects (and block) cannot be fitted: names the largest
    factor."""
    big = max((t for t in kept if not t.is_block), key=lambda t: sizes[t.factors[0]],
              default=None)
    what = (f"the main effects need {parameter_count(kept, sizes):,} parameters"
            + (f" ({big.name} alone has {sizes[big.factors[0]]:,} levels)" if big else ""))
    return UsageError(
        f"cannot analyse: {what}, {_limit_text(why, n_cells, n_rows)}; analyse "
        "fewer levels (a subset of the runs, or levels grouped into a coarser factor)")


def _limit_message(terms, top, order, p_req, p_fit, why, last, n_cells, n_rows) -> str:
    """One line for the user: what was requested, why it was refused, what was fitted."""
    n_main = sum(1 for t in terms if not t.is_block and len(t.factors) == 1)
    req = "the full model" if top == n_main else f"the model with interactions up to order {top}"
    fitted = "main effects only" if order == 1 else f"interactions up to order {order}"
    msg = (f"{req} has {p_req:,} parameters, {_limit_text(why, n_cells, n_rows)}; "
           f"fitted {fitted} ({p_fit:,} parameters) instead")
    if last[0] != top:
        msg += (f" (interactions up to order {last[0]} would need {last[1]:,} parameters, "
                f"{_limit_text(last[2], n_cells, n_rows)})")
    return msg


def limit_terms(terms, sizes, n_cells: int, n_rows: int) -> TermLimit:
    """Leave out the highest-order interactions until the model can be fitted.

    A model cannot estimate more parameters than it has runs; beyond that,
    and beyond `MAX_PARAMETERS` or `MAX_WORK`, interactions are dropped from the
    top order down (the block and main effects always stay). When even the
    main effects do not fit, `UsageError` says which factor is too large.
    """
    terms = list(terms)
    p_req = parameter_count(terms, sizes)

    def fits(ts):
        return _refusal(ts, sizes, n_cells, n_rows)

    why = fits(terms)
    if why is None:
        return TermLimit(terms, None, p_req, p_req, None, None)
    top = max((len(t.factors) for t in terms if not t.is_block), default=1)
    kept, order, last = terms, top, (top, p_req, why)   # last: the smallest order refused
    while order > 1:
        order -= 1
        kept = [t for t in terms if t.is_block or len(t.factors) <= order]
        w = fits(kept)
        if w is None:
            break
        last = (order, parameter_count(kept, sizes), w)
    else:
        kept = [t for t in terms if t.is_block or len(t.factors) <= 1]
        if fits(kept) is not None:
            raise _main_effects_too_large(kept, sizes, fits(kept), n_cells, n_rows)
    p_fit = parameter_count(kept, sizes)
    msg = _limit_message(terms, top, order, p_req, p_fit, why, last, n_cells, n_rows)
    return TermLimit(kept, order, p_req, p_fit, why, msg)


def _limit_text(why, n_cells, n_rows) -> str:
    if why == "rows":
        return (f"more than {n_rows:,} runs ({n_cells:,} distinct cells) can estimate")
    if why == "parameters":
        return f"above the analysis limit of {MAX_PARAMETERS:,} parameters"
    return "too much work for one analysis (above the analysis limit of %.0e operations)" \
        % MAX_WORK


def sum_contrasts(k: int) -> np.ndarray:
    """(k, k-1) sum-to-zero coding: level j < k-1 -> unit vector j, last level -> all -1."""
    c = np.zeros((k, max(k - 1, 0)))
    if k > 1:
        c[: k - 1] = np.eye(k - 1)
        c[k - 1] = -1.0
    return c


def term_matrix(levels: np.ndarray, term: Term, sizes) -> np.ndarray:
    """Columns of ``term`` for cells whose level codes are the rows of ``levels``."""
    out = []
    for part in term.products:
        m = np.ones((levels.shape[0], 1))
        for f in part:
            c = sum_contrasts(sizes[f])[levels[:, f]]
            m = (m[:, :, None] * c[:, None, :]).reshape(levels.shape[0], -1)
        out.append(m)
    return out[0] if len(out) == 1 else np.hstack(out)


def design(levels, terms, sizes):
    """Intercept plus every term's columns; returns (X, {term name: slice})."""
    blocks = [np.ones((levels.shape[0], 1))]
    slices, start = {}, 1
    for t in terms:
        m = term_matrix(levels, t, sizes)
        blocks.append(m)
        slices[t.name] = slice(start, start + m.shape[1])
        start += m.shape[1]
    return np.hstack(blocks), slices


def term_basis(a: np.ndarray, scale: float | None = None):
    """Orthonormal basis of the column space of ``a``.

    Rank-revealing QR with column pivoting (Businger & Golub 1965); a column
    counts when its pivot exceeds a relative tolerance of ``scale`` (default:
    the largest pivot).
    """
    from scipy.linalg import qr

    if a.shape[1] == 0 or a.shape[0] == 0:
        return np.zeros((a.shape[0], 0))
    q, r, _ = qr(a, mode="economic", pivoting=True, check_finite=False)
    d = np.abs(np.diag(r))
    ref = scale if scale is not None else (d[0] if d.size else 0.0)
    if ref <= 0:
        return np.zeros((a.shape[0], 0))
    rank = int(np.count_nonzero(d > ref * 1e-10 * max(a.shape)))
    return q[:, :rank]


def _norm2(a):
    return float(np.linalg.norm(a, 2)) if a.size else 0.0


@dataclass(frozen=True)
class TermSS:
    term: str
    df: int
    df_full: int          # degrees of freedom with every cell present
    sum_sq: float
    is_block: bool = False
    note: str | None = None
    aliases: tuple[str, ...] = ()   # left-out terms confounded with this one


@dataclass(frozen=True)
class Fit:
    terms: tuple[Term, ...]
    sizes: tuple[int, ...]
    cells: Cells
    moments: Moments
    X: np.ndarray               # (C, p) cell design, sum-to-zero coding
    slices: dict
    beta: np.ndarray            # minimum-norm solution
    cov_unscaled: np.ndarray    # (X'WX)^+
    rowspace: np.ndarray        # (r, p) orthonormal basis of the estimable directions
    basis: np.ndarray           # (C, r) orthonormal basis of sqrt(W) X
    rank: int
    n_obs: int
    df_resid: int
    ss_within: float
    rss: float
    fitted: np.ndarray          # (C,) fitted cell means
    leverage: np.ndarray        # (C,) leverage of one row in each cell
    table: tuple[TermSS, ...]
    ss_type: int                # the type actually reported
    notes: tuple[str, ...] = field(default=())
    left_out: tuple[str, ...] = field(default=())   # terms confounded with earlier ones
    #: no residual variation (round-off only): nothing can be tested against the error
    exact: bool = False
    #: the cells that exist, when some are missing by design: margins average over them
    #: (`benchharness.analysis.incomplete.Support`); None: over every level combination
    support: object = None

    @property
    def mse(self) -> float:
        if self.exact:
            return float("nan")
        return self.rss / self.df_resid if self.df_resid > 0 else float("nan")

    def estimable(self, L: np.ndarray) -> np.ndarray:
        """Which rows of ``L`` (k, p) are estimable linear functions of the parameters."""
        L = np.atleast_2d(L)
        proj = (L @ self.rowspace.T) @ self.rowspace
        scale = np.maximum(np.abs(L).max(axis=1), 1.0)
        return np.abs(L - proj).max(axis=1) <= 1e-8 * scale


def _sequential_df(Xw, slices, terms):
    """Rank added by each term after the intercept and every earlier term."""
    basis = term_basis(Xw[:, :1])
    out = {}
    for t in terms:
        xt = Xw[:, slices[t.name]]
        r = xt - basis @ (basis.T @ xt)
        b2 = term_basis(r, scale=_norm2(xt))
        out[t.name] = int(b2.shape[1])
        basis = np.hstack([basis, b2])
    return out


def _confounded_with(Xw, slices, t, earlier):
    """Earlier terms whose columns share directions with ``t`` (after the intercept)."""
    one = term_basis(Xw[:, :1])

    def centred(a):
        return a - one @ (one.T @ a)

    xt = centred(Xw[:, slices[t.name]])
    scale = _norm2(xt)
    out = []
    for s in earlier:
        bs = term_basis(centred(Xw[:, slices[s.name]]))
        if bs.shape[1] and _norm2(bs.T @ xt) > 1e-8 * max(scale, 1e-300):
            out.append(s.name)
    return out


def _factor(Xw: np.ndarray):
    """Pivoted QR of the weighted design: (Q (C, r), R (r, p) in the original column order)."""
    from scipy.linalg import qr

    if Xw.shape[1] == 0 or Xw.shape[0] == 0:
        return np.zeros((Xw.shape[0], 0)), np.zeros((0, Xw.shape[1]))
    q, r, piv = qr(Xw, mode="economic", pivoting=True, check_finite=False)
    d = np.abs(np.diag(r))
    rank = int(np.count_nonzero(d > (d[0] if d.size else 0.0) * 1e-10 * max(Xw.shape)))
    R = np.empty((rank, Xw.shape[1]))
    R[:, piv] = r[:rank]
    return q[:, :rank], R


def _factored(cells: Cells, n, terms, cache):
    """(X, slices, Q, R) of ``terms`` on these cells and weights, from ``cache`` if there."""
    key = tuple(t.name for t in terms)
    if cache is not None and key in cache:
        return cache[key]
    X, slices = design(cells.levels, terms, cells.sizes)
    Q, R = _factor(X * np.sqrt(n)[:, None])
    if cache is not None:
        cache[key] = (X, slices, Q, R)
    return X, slices, Q, R


def fit_model(cells: Cells, mom: Moments, terms, ss_type: int = 2, only=None,
              cache: dict | None = None) -> Fit:
    """Fit the model and compute Type II or III sums of squares for every term.

    A term whose columns are entirely explained by earlier terms (aliasing in a
    fractional factorial, or factors whose levels always move together) is left
    out of the fitted model and reported with df 0; its effect, if any, is
    carried by the earlier terms it is confounded with (they list it in
    ``aliases``). Terms that only lose part of their degrees of freedom (empty
    cells) stay in, and what needs the missing cells is not estimable.

    ``only``: names of the terms whose sums of squares are wanted (default
    all); the others get NaN (the rank-based cross-check needs one per fit).
    ``cache``: a dict kept by a caller that fits many responses on the same
    cells and counts (the cross-check's ranks): the design is factored once.
    """
    terms = tuple(terms)
    X, slices, Q, R = _factored(cells, mom.n, terms, cache)
    if R.shape[0] >= X.shape[1]:
        return _fit(cells, mom, terms, ss_type, only, pre=(X, slices, Q, R))
    dropped = _dropped_terms(R, slices, terms, cells.sizes, cache)
    if not dropped:
        return _fit(cells, mom, terms, ss_type, only, pre=(X, slices, Q, R))
    kept = tuple(t for t in terms if t not in dropped)
    fit = _fit(cells, mom, kept, ss_type, only, pre=_factored(cells, mom.n, kept, cache))
    partners, carried = _confounding(R, slices, terms, kept, dropped)
    table = _table_with_dropped(terms, dropped, fit.table, partners, carried, cells.sizes)
    from dataclasses import replace

    return replace(fit, table=tuple(table), left_out=tuple(t.name for t in dropped))


def _dropped_terms(R, slices, terms, sizes, cache) -> list:
    """The terms whose columns earlier terms explain entirely (no sequential df left), other
    than those with a single-level factor."""
    # R has the inner products of Xw's columns: projections on it keep every length
    key = ("dropped",) + tuple(t.name for t in terms)
    if cache is not None and key in cache:
        seq = cache[key]
    else:
        seq = _sequential_df(R, slices, terms)
        if cache is not None:
            cache[key] = seq
    return [t for t in terms if seq[t.name] == 0 and not _single_level(t, sizes)]


def _confounding(R, slices, terms, kept, dropped):
    """Which kept earlier terms each dropped term is confounded with (``partners``), and the
    other way round, which dropped terms each kept term carries (``carried``)."""
    partners = {}
    for t in dropped:
        earlier = [s for s in terms[: terms.index(t)] if s in kept]
        partners[t.name] = _confounded_with(R, slices, t, earlier)
    carried = {}
    for d, ps in partners.items():
        for p_ in ps:
            carried.setdefault(p_, []).append(d)
    return partners, carried


def _full_df(t: Term, sizes) -> int:
    """Degrees of freedom of a term with every cell observed: the product of (levels - 1)."""
    df_full = 0
    for part in t.products:
        d = 1
        for f in part:
            d *= sizes[f] - 1
        df_full += d
    return df_full


def _table_with_dropped(terms, dropped, fitted_table, partners, carried, sizes) -> list:
    """The ANOVA rows in the requested term order: the dropped terms as inestimable (df 0),
    the kept ones with the dropped terms they carry."""
    rows = {r.term: r for r in fitted_table}
    table = []
    for t in terms:
        if t in dropped:
            df_full = _full_df(t, sizes)
            with_ = ", ".join(partners[t.name]) or "earlier terms"
            table.append(TermSS(t.name, 0, df_full, float("nan"), t.is_block,
                                f"inestimable: completely confounded with {with_}; left out of "
                                "the model, its effect (if any) is counted there"))
        else:
            r = rows[t.name]
            table.append(TermSS(r.term, r.df, r.df_full, r.sum_sq, r.is_block, r.note,
                                tuple(carried.get(t.name, ()))))
    return table


def _single_level(t: Term, sizes) -> bool:
    return any(sizes[f] < 2 for f in t.factors)


def _solve(X, Q, R, yw, p: int):
    """Weighted least squares through Xw = Q R: the SVD of the small R gives the
    minimum-norm solution and (X'WX)^+. Returns (beta, (X'WX)^+, row space, rank, Q'yw)."""
    # Xw = Q R; the SVD of the small R gives the minimum-norm solution and (X'WX)^+
    _, s, vt = np.linalg.svd(R, full_matrices=False)
    keep = s > (s[0] if s.size else 0.0) * 1e-10 * max(X.shape)
    s_r, vt_r = s[keep], vt[keep]
    rank = int(keep.sum())
    zq = Q.T @ yw                     # coordinates of the projection of yw on col(Xw)
    beta = vt_r.T @ (((vt_r @ R.T) @ zq) / s_r**2) if rank else np.zeros(p)
    cov_unscaled = (vt_r.T / s_r**2) @ vt_r
    return beta, cov_unscaled, vt_r, rank, zq


def _adjusted_for(t: Term, terms, used_type: int) -> list:
    """The terms ``t``'s sum of squares is adjusted for: Type II leaves out the terms that
    contain ``t``, Type III none."""
    if used_type == 2:
        ft = set(t.factors)
        return [o for o in terms if o is not t and not set(o.factors) >= ft]
    return [o for o in terms if o is not t]


def _term_ss(t: Term, others, n_terms: int, sl, full_rank: bool, beta, cov_unscaled, col,
             intercept, zq):
    """Extra sum of squares of ``t`` after ``others`` and its df, by the cheapest exact route."""
    if full_rank and len(others) == n_terms - 1 and sl.stop > sl.start:
        # adjusted for every other term: the Wald form from the full fit
        bt = beta[sl]
        ss = float(bt @ np.linalg.solve(cov_unscaled[sl, sl], bt))
        df = sl.stop - sl.start
    elif full_rank and sl.stop > sl.start:
        # full rank: t's columns last after the others, with the response appended; the
        # triangular factor's last column holds Q'z, whose entries in t's rows are the
        # extra sum of squares of t (one unpivoted QR, no basis formed)
        from scipy.linalg import qr

        a = np.hstack([intercept] + [col[o.name] for o in others] + [col[t.name],
                                                                      zq[:, None]])
        r_aug = qr(a, mode="r", check_finite=False)[0]
        p1 = a.shape[1] - 1
        df = sl.stop - sl.start
        ss = float((r_aug[p1 - df:p1, -1] ** 2).sum())
    else:
        a = np.hstack([intercept] + [col[o.name] for o in others])
        b1 = term_basis(a)
        xt = col[t.name]
        r = xt - b1 @ (b1.T @ xt)
        b2 = term_basis(r, scale=_norm2(xt))
        proj = b2.T @ zq
        ss = float(proj @ proj)
        df = int(b2.shape[1])
    return ss, df


def _term_note(ss: float, df: int, df_full: int, round_off: bool):
    """The sum of squares as reported (0 for round-off of equal values, NaN when there is
    nothing to estimate) and the row's note."""
    note = None
    if round_off:
        ss = 0.0        # round-off of equal values
    if df_full == 0:
        note = "no effect to estimate: a factor in this term has a single level"
        ss = float("nan")
    elif df == 0:
        note = "inestimable: the observed cells cannot separate this effect from the others"
        ss = float("nan")
    elif df < df_full:
        note = (f"only {df} of {df_full} degrees of freedom estimable (empty cells)")
    return ss, note


def _fit(cells: Cells, mom: Moments, terms, ss_type: int = 2, only=None, pre=None) -> Fit:
    if ss_type not in (2, 3):
        raise UsageError(f"sums of squares type {ss_type!r} is not supported; use 2 or 3")
    terms = tuple(terms)
    sizes = cells.sizes
    w = np.sqrt(mom.n)
    if pre is None:
        X, slices = design(cells.levels, terms, sizes)
        Q, R = _factor(X * w[:, None])
    else:
        X, slices, Q, R = pre
    p = X.shape[1]
    yw = mom.mean * w
    n_obs = mom.total_n
    ss_within = float(mom.ss_within.sum())

    beta, cov_unscaled, vt_r, rank, zq = _solve(X, Q, R, yw, p)
    fitted_w = Q @ zq
    resid_w = yw - fitted_w
    rss = ss_within + float(resid_w @ resid_w)
    fitted = fitted_w / w
    leverage = (Q**2).sum(axis=1) / mom.n
    df_resid = n_obs - rank
    # the uncentred sum of squares: the size of the values, against which round-off is judged
    size = float((mom.n * mom.mean**2).sum()) + ss_within
    exact = df_resid > 0 and rss <= ZERO_SPREAD**2 * size

    notes = []
    used_type = ss_type
    if ss_type == 3 and rank < p:
        used_type = 2
        notes.append("Type III sums of squares are not uniquely defined when cells are empty "
                     "(the model is rank deficient); Type II sums of squares are reported instead")
    wanted = None if only is None else set(only)
    col = {t.name: R[:, slices[t.name]] for t in terms}
    full_rank = rank == p and R.shape[0] == p
    table = []
    for t in terms:
        df_full = _full_df(t, sizes)
        if wanted is not None and t.name not in wanted:
            table.append(TermSS(t.name, 0, df_full, float("nan"), t.is_block,
                                "not computed"))
            continue
        others = _adjusted_for(t, terms, used_type)
        ss, df = _term_ss(t, others, len(terms), slices[t.name], full_rank, beta, cov_unscaled,
                          col, R[:, :1], zq)
        ss, note = _term_note(ss, df, df_full, exact and ss <= ZERO_SPREAD**2 * size)
        table.append(TermSS(t.name, df, df_full, ss, t.is_block, note))

    return Fit(terms=terms, sizes=sizes, cells=cells, moments=mom, X=X, slices=slices,
               beta=beta, cov_unscaled=cov_unscaled, rowspace=vt_r, basis=Q, rank=rank,
               n_obs=n_obs, df_resid=df_resid, ss_within=ss_within, rss=rss, fitted=fitted,
               leverage=leverage, table=tuple(table), ss_type=used_type, notes=tuple(notes),
               exact=bool(exact))
